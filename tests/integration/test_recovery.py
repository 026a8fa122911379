"""Crashes and outages: kill -9 and restart, a frozen broker, a broker that starts late."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
import urllib.request
from collections import Counter

import pytest
import yaml

from streamdet.local_broker import free_port
from tests.integration.kafka import Broker, unique
from tests.integration.streams import DAEMON_RULES, as_messages, waterflow_points, without_wall_clock
from tests.integration.test_daemon import replay_events, wait_for

pytestmark = pytest.mark.broker


def write_config(path, broker, topics, state_dir, port, **kafka):
    inp, out, dlq = topics
    cfg = {**DAEMON_RULES,
           "kafka": {"bootstrap_servers": broker.bootstrap, "group_id": unique("g"), "input_topics": [inp],
                     "output_topic": out, "dead_letter_topic": dlq, "session_timeout": "6s",
                     "checkpoint_interval": "0.5s", "poll_timeout": "0.2s", **kafka},
           "state": {"dir": str(state_dir)}, "health": {"address": f"127.0.0.1:{port}"}}
    path.write_text(yaml.safe_dump(cfg))
    return path


def start(config_path, log_path):
    return subprocess.Popen([sys.executable, "-m", "streamdet", "run", "--config", str(config_path)],
                            stdout=open(log_path, "ab"), stderr=subprocess.STDOUT)


def stop(proc, timeout=15):
    """SIGTERM and wait; a process that does not exit is killed (never left behind) and fails."""
    proc.send_signal(signal.SIGTERM)
    try:
        return proc.wait(timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)
        raise


def metric(port, name, labels=""):
    try:
        text = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2).read().decode()
    except OSError:
        return None
    m = re.search(rf"^{re.escape(name)}{re.escape(labels)} (\S+)$", text, re.M)
    return float(m.group(1)) if m else None


def status(port, path):
    try:
        return urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=2).status
    except urllib.error.HTTPError as exc:
        return exc.code
    except OSError:
        return None


def test_kill_9_and_restart_loses_nothing(broker, tmp_path):
    topics = broker.daemon_topics(partitions=3)
    points = waterflow_points(sites=12)
    broker.produce(topics[0], as_messages(points))
    expected = replay_events(points)
    port = free_port()
    cfg = write_config(tmp_path / "cfg.yaml", broker, topics, tmp_path / "state", port, batch_size=50)
    log = tmp_path / "daemon.log"
    proc = start(cfg, log)
    try:
        assert wait_for(lambda: (metric(port, "streamdet_points_accepted_total") or 0) > len(points) * 0.3,
                        timeout=60, every=0.05), log.read_text()
        at_kill = metric(port, "streamdet_points_accepted_total")
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        assert at_kill < len(points)  # killed mid-stream
        seen_before = metric(port, "streamdet_points_accepted_total")
        assert seen_before is None  # really gone
        proc = start(cfg, log)
        assert wait_for(lambda: len(broker.read_all(topics[1], idle=1.0)) >= len(expected), timeout=90)
    finally:
        stop(proc)
    msgs = broker.read_all(topics[1])
    ids = Counter(m.value() for m in msgs)
    import orjson

    by_id: dict[str, dict] = {}
    for m in msgs:  # a re-sent event differs only in the wall-clock time the sink stamps
        doc = without_wall_clock(orjson.loads(m.value()))
        assert by_id.setdefault(doc["id"], doc) == doc, "the same id with different content"
    assert sorted(by_id) == sorted(e.id for e in expected)  # nothing missing, nothing extra
    assert sum(ids.values()) >= len(expected)


def test_sigterm_exits_cleanly_within_10_s(broker, tmp_path):
    topics = broker.daemon_topics()
    port = free_port()
    cfg = write_config(tmp_path / "cfg.yaml", broker, topics, tmp_path / "state", port)
    proc = start(cfg, tmp_path / "log")
    assert wait_for(lambda: status(port, "/readyz") == 200, timeout=40)
    assert status(port, "/healthz") == 200
    t0 = time.monotonic()
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(10) == 0
    assert time.monotonic() - t0 < 10


def test_frozen_broker_not_ready_then_resumes_without_loss(tmp_path):
    b = Broker().start()
    try:
        topics = b.daemon_topics()
        points = waterflow_points(sites=1)
        half = len(points) // 2
        b.produce(topics[0], as_messages(points[:half]))
        port = free_port()
        cfg = write_config(tmp_path / "cfg.yaml", b, topics, tmp_path / "state", port)
        proc = start(cfg, tmp_path / "log")
        try:
            assert wait_for(lambda: metric(port, "streamdet_points_accepted_total") == half, timeout=60)
            assert status(port, "/readyz") == 200
            os.kill(b.proc.pid, signal.SIGSTOP)  # longer than the 6 s session timeout
            assert wait_for(lambda: status(port, "/readyz") == 503, timeout=20)
            time.sleep(8)
            os.kill(b.proc.pid, signal.SIGCONT)
            b.produce(topics[0], as_messages(points[half:]))
            assert wait_for(lambda: status(port, "/readyz") == 200, timeout=60)
            assert wait_for(lambda: (metric(port, "streamdet_points_accepted_total") or 0) >= len(points),
                            timeout=60)
            expected = replay_events(points)
            msgs = b.read_all(topics[1], expect=len(expected))
        finally:
            stop(proc)
        import orjson

        assert {orjson.loads(m.value())["id"] for m in msgs} == {e.id for e in expected}
    finally:
        os.kill(b.proc.pid, signal.SIGCONT)
        b.stop()


def test_broker_absent_at_start_then_started(tmp_path):
    b = Broker()  # port chosen, not started
    topics = (unique("in"), unique("out"), unique("dlq"))
    port = free_port()
    cfg = write_config(tmp_path / "cfg.yaml", b, topics, tmp_path / "state", port)
    proc = start(cfg, tmp_path / "log")
    try:
        assert wait_for(lambda: status(port, "/healthz") == 200, timeout=20)
        assert status(port, "/readyz") == 503
        time.sleep(10)
        assert proc.poll() is None  # still retrying
        b.start()
        b.create_topics(*topics)
        points = waterflow_points(sites=1)
        b.produce(topics[0], as_messages(points))
        assert wait_for(lambda: metric(port, "streamdet_points_accepted_total") == len(points), timeout=90), (
            (tmp_path / "log").read_text()[-3000:])
        assert wait_for(lambda: status(port, "/readyz") == 200, timeout=20)
    finally:
        stop(proc)
        b.stop()
