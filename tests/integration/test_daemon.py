"""The daemon against the real (local) broker: events, replay equality, dead letters, crashes."""

from __future__ import annotations

import threading
import time

import orjson
import pytest
from prometheus_client import CollectorRegistry

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.consumer import Daemon
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import parse_settings
from streamdet.events import CONTENT_TYPE, parse_cloudevent
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, as_batch, as_messages, waterflow_points

pytestmark = pytest.mark.broker


def make_daemon(broker, tmp_path, topics, *, extra=None, registry=None, sections=None, **kw):
    inp, out, dlq = topics
    cfg = parse_config({**DAEMON_RULES, **(sections or {}), "kafka": {
        "bootstrap_servers": broker.bootstrap, "group_id": unique("g"), "input_topics": [inp],
        "output_topic": out, "dead_letter_topic": dlq, "session_timeout": "6s",
        "checkpoint_interval": "1s", "poll_timeout": "0.2s", **(extra or {})},
        "state": {"dir": str(tmp_path / "state")}, "health": {"address": "127.0.0.1:0"}})
    metrics = Metrics(registry or CollectorRegistry())
    return Daemon(cfg, parse_settings(cfg), metrics=metrics, **kw), metrics


class Running:
    """A daemon in a thread; ``wait_for`` polls a condition; leaving the block stops it."""

    def __init__(self, daemon):
        self.daemon = daemon
        self.code = None
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        self.code = self.daemon.run(install_signals=False)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.daemon.stop()
        self.thread.join(20)
        assert not self.thread.is_alive()


def wait_for(cond, timeout=60.0, every=0.2):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(every)
    return False


def replay_events(points):
    eng = Engine(parse_config(DAEMON_RULES))
    return eng.ingest(as_batch(points))


def test_events_reach_the_output_topic_and_equal_replay(broker, tmp_path):
    topics = broker.daemon_topics(partitions=2)
    points = waterflow_points(sites=2)
    broker.produce(topics[0], as_messages(points))
    expected = replay_events(points)
    # 3 WaterFlow low segments + 1 breach after the first recovery, x opened/closed x 2 sites
    assert len(expected) == 16
    daemon, metrics = make_daemon(broker, tmp_path, topics)
    with Running(daemon):
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_points_accepted_total")
                        == len(points))
        msgs = broker.read_all(topics[1], expect=len(expected))
    docs = [parse_cloudevent(m.value()) for m in msgs]
    assert sorted(d["id"] for d in docs) == sorted(e.id for e in expected)
    assert all(dict(m.headers())["content-type"] == CONTENT_TYPE.encode() for m in msgs)
    assert all(m.key().decode() == d["subject"] for m, d in zip(msgs, docs, strict=True))
    by_id = {e.id: e for e in expected}
    for d in docs:
        want = orjson.loads(by_id[d["id"]].to_json())
        # the daemon stamps the wall-clock detection time; replay leaves it null
        assert want["data"].pop("detected_at") is None and want["data"].pop("detection_delay_seconds") is None
        assert d["data"].pop("detected_at").endswith("Z")
        assert 0 <= d["data"].pop("detection_delay_seconds") < 86400 * 365 * 30
        assert d == want
    assert metrics.registry.get_sample_value("streamdet_events_out_total",
                                             {"type": "streamdet.breach.opened"}) == 8


def test_malformed_records_go_to_the_dead_letter_topic(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=1)
    good = as_messages(points)
    bad = [(b"x", b'{"metric": "waterflow", "time": 1650000000, "value": "lots"}'),
           (b"x", b"this is not json"),
           (b"x", b'[{"metric": "waterflow", "labels": {"site": "s0"}, "time": "2022-04-01T00:30:00",'
                  b' "value": 1}, {"metric": "m", "time": "soon", "value": 2}]')]
    stream = good[:400] + bad[:1] + good[400:800] + bad[1:] + good[800:]
    broker.produce(topics[0], stream)
    daemon, metrics = make_daemon(broker, tmp_path, topics)
    with Running(daemon):
        # every good point is processed, including the good half of the mixed message
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_records_in_total")
                        == len(points) + 4)
        dead = broker.read_all(topics[2], expect=3)
    assert len(dead) == 3
    h = [dict(m.headers()) for m in dead]
    assert [x["streamdet-error"].decode() for x in h] == [
        "value 'lots' is not numeric", h[1]["streamdet-error"].decode(), "time 'soon' is not ISO 8601 or an epoch"]
    assert h[1]["streamdet-error"].startswith(b"invalid JSON")
    assert all(x["source-topic"].decode() == topics[0] and x["source-partition"] == b"0" for x in h)
    assert [int(x["source-offset"]) for x in h] == [400, 801, 802]
    assert dead[1].value() == b"this is not json"
    get = metrics.registry.get_sample_value
    assert get("streamdet_dead_letters_total") == 3
    assert get("streamdet_records_bad_total", {"reason": "bad_value"}) == 1
    assert get("streamdet_records_bad_total", {"reason": "invalid_json"}) == 1
    assert get("streamdet_records_bad_total", {"reason": "bad_time"}) == 1
    # the mixed message's good point was accepted (it is a late point for its series here)
    assert get("streamdet_points_accepted_total") + get("streamdet_points_late_total") == len(points) + 1


def test_events_file_sink_and_corrupt_checkpoint(broker, tmp_path):
    topics = (unique("in"), None, None)
    broker.create_topics(topics[0])
    points = waterflow_points(sites=1)
    broker.produce(topics[0], as_messages(points))
    out = tmp_path / "events.jsonl"
    daemon, metrics = make_daemon(broker, tmp_path, topics, events_file=str(out))
    with Running(daemon):
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_points_accepted_total")
                        == len(points))
    lines = out.read_bytes().splitlines()
    assert [orjson.loads(x)["id"] for x in lines] == [e.id for e in replay_events(points)]
    # Damage the checkpoint: the next start fails loudly naming the file, unless told to start fresh.
    ckpt = next((tmp_path / "state").glob("*.ckpt"))
    ckpt.write_bytes(ckpt.read_bytes()[:-20])
    group = daemon.settings.group_id
    again, _ = make_daemon(broker, tmp_path, topics, events_file=str(out), extra={"group_id": group})
    assert again.run(install_signals=False) == 2
    fresh, m2 = make_daemon(broker, tmp_path, topics, events_file=str(out),
                            extra={"group_id": group}, fresh_partitions=[(topics[0], 0)])
    with Running(fresh):
        assert wait_for(lambda: m2.registry.get_sample_value("streamdet_ready") == 1)


def test_influx_line_protocol_input(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=1)
    # Line protocol, ten lines per message; field "flow" makes the series waterflow_flow.
    lines = [f"waterflow,site={p['labels']['site']} flow={p['value']} {int(p['time'] * 1e9)}" for p in points]
    msgs = [(b"waterflow", "\n".join(lines[i:i + 10]).encode()) for i in range(0, len(lines), 10)]
    broker.produce(topics[0], msgs)
    daemon, metrics = make_daemon(broker, tmp_path, topics, sections={"input": {"format": "influx"}})
    with Running(daemon):
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_points_accepted_total")
                        == len(points))
    renamed = [{**p, "metric": "waterflow_flow"} for p in points]
    expected = replay_events(renamed)
    got = [parse_cloudevent(m.value()) for m in broker.read_all(topics[1], expect=len(expected))]
    assert sorted(d["id"] for d in got) == sorted(e.id for e in expected) and len(expected) == 8
