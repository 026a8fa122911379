"""Crash at any point, restart, run to the end: the same events as an uninterrupted run.

Each scenario runs the daemon as a subprocess with a test-only fault (``STREAMDET_FAULT``, see
``streamdet.daemon.faults``): an exception, or SIGKILL, after the engine took a batch (``ingest``),
halfway through sending a batch's events (``deliver``), before a checkpoint file is written
(``checkpoint``) and between durable checkpoints and the offset commit (``commit``). After the
crash every checkpoint on disk must cover exactly the points its offset says (the state is never
ahead of its offset); after a restart without the fault the output topic must hold every event
of the uninterrupted run, by id and with identical content (duplicates are allowed: delivery is
at-least-once with deterministic ids, as the design notes promise). The uninterrupted run is the
engine replay of the same points, which ``test_daemon.py`` checks equals the daemon's output.
The eight scenarios run concurrently (most of their time is spent waiting on group joins).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor

import orjson
import pytest
import yaml
from confluent_kafka import OFFSET_BEGINNING, Consumer, TopicPartition

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.state_store import LocalStateStore
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, as_messages, waterflow_points
from tests.integration.test_daemon import replay_events

pytestmark = pytest.mark.broker

PARTITIONS = 2
# (point, call number). The stream is WaterFlow's first 300 hours for 4 sites (two series per
# partition), whose breaches are decided at hours 95-127 and 216-223; batches of 20 messages give
# about 60 batches and ~100 ingest calls, so ``ingest`` and ``deliver`` fail mid-stream with
# checkpoints and events behind them and events still pending. Checkpoint cuts are taken as
# often as the writer is free, which depends on the machine: ``checkpoint`` (files, two per cut)
# and ``commit`` (cuts) fail early, so that they surely fail before the stream ends.
FAULTS = {"ingest": 40, "deliver": 3, "checkpoint": 7, "commit": 3}
HOURS, SITES = 300, 4
SCENARIOS = [(point, kill) for point in FAULTS for kill in (False, True)]


def scenario_id(s):
    return f"{s[0]}-{'kill' if s[1] else 'raise'}"


def read_topic(bootstrap: str, topic: str, partitions: int = 1, idle: float = 1.5) -> list:
    """Every message of a topic, read by assignment (no group join) until ``idle`` s bring nothing.

    (The bundled broker's high watermarks lag behind, so they cannot say where a partition ends.)
    """
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": unique("reader"), "enable.auto.commit": False})
    try:
        c.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in range(partitions)])
        out: list = []
        last = time.monotonic()
        deadline = last + 30
        while time.monotonic() - last < idle and time.monotonic() < deadline:
            for m in c.consume(500, 0.2):
                if m.error() is None:
                    out.append(m)
                    last = time.monotonic()
        return out
    finally:
        c.close()


def checkpoints(state_dir, topic: str) -> dict[int, tuple[int, dict]]:
    """partition -> (next offset, engine counters) of each checkpoint on disk."""
    store = LocalStateStore(state_dir)
    cfg = parse_config(DAEMON_RULES)
    out = {}
    for p in range(PARTITIONS):
        ck = store.load(topic, p)
        if ck is not None:
            out[p] = (ck.next_offset, dict(Engine.restore(cfg, ck.snapshot).counters))
    return out


def run_scenario(broker, tmp_path, in_topic, ends, point, kill) -> dict:
    name = scenario_id((point, kill))
    out_topic = unique("out")
    broker.create_topics(out_topic)
    state = tmp_path / name / "state"
    state.parent.mkdir(parents=True)
    cfg_path = tmp_path / name / "cfg.yaml"
    cfg_path.write_text(yaml.safe_dump({**DAEMON_RULES, "kafka": {
        "bootstrap_servers": broker.bootstrap, "group_id": unique("g"), "input_topics": [in_topic],
        "output_topic": out_topic, "dead_letter_topic": None, "session_timeout": "6s",
        "checkpoint_interval": "0.02s", "poll_timeout": "0.1s", "batch_size": 20},
        "state": {"dir": str(state)}, "health": {"address": "127.0.0.1:0"}}))
    log = open(tmp_path / name / "daemon.log", "ab")  # noqa: SIM115
    cmd = [sys.executable, "-m", "streamdet", "run", "--config", str(cfg_path)]
    fault = f"{point}:{FAULTS[point]}" + (":kill" if kill else "")
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT,
                            env={**os.environ, "STREAMDET_FAULT": fault})
    try:
        first_code = proc.wait(60)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)
        first_code = None
    at_crash = checkpoints(state, in_topic)
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT,
                            env={k: v for k, v in os.environ.items() if k != "STREAMDET_FAULT"})
    finished = False
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline and proc.poll() is None:
            done = checkpoints(state, in_topic)
            if all(done.get(p, (0,))[0] == ends[p] for p in range(PARTITIONS)):
                finished = True
                break
            time.sleep(0.3)
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            second_code = proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
            second_code = None
        log.close()
    return {"first_code": first_code, "at_crash": at_crash, "finished": finished,
            "second_code": second_code, "output": [m.value() for m in read_topic(broker.bootstrap, out_topic)],
            "log": (tmp_path / name / "daemon.log").read_text(errors="replace")[-4000:]}


@pytest.fixture(scope="module")
def crash_runs(broker, tmp_path_factory):
    points = waterflow_points(sites=SITES)[:HOURS * SITES]
    in_topic = unique("in")
    broker.create_topics(in_topic, partitions=PARTITIONS)
    broker.produce(in_topic, as_messages(points))
    ends = {p: 0 for p in range(PARTITIONS)}
    for m in read_topic(broker.bootstrap, in_topic, PARTITIONS):
        ends[m.partition()] = max(ends[m.partition()], m.offset() + 1)
    assert sum(ends.values()) == len(points) and all(ends.values())
    tmp = tmp_path_factory.mktemp("crash")
    with ThreadPoolExecutor(len(SCENARIOS)) as pool:
        futures = {s: pool.submit(run_scenario, broker, tmp, in_topic, ends, *s) for s in SCENARIOS}
        runs = {s: f.result() for s, f in futures.items()}
    expected = replay_events(points)
    assert len(expected) == 24  # 3 breaches opened and closed, 4 sites
    return runs, expected, ends


def _comparable(doc: dict) -> dict:
    """The event without the wall-clock detection time the daemon's sink stamps (replay leaves
    it null): everything decided from the data must be identical."""
    doc["data"].pop("detected_at", None)
    doc["data"].pop("detection_delay_seconds", None)
    return doc


@pytest.mark.parametrize("scenario", SCENARIOS, ids=scenario_id)
def test_restart_after_a_crash_emits_the_uninterrupted_events(crash_runs, scenario):
    runs, expected, ends = crash_runs
    run = runs[scenario]
    point, kill = scenario
    # The first run died where it was told to: SIGKILL, or a loud non-zero exit.
    assert run["first_code"] == (-signal.SIGKILL if kill else 1), run["log"]
    if not kill:
        assert f"injected fault at {point} #{FAULTS[point]}" in run["log"]
    # It died mid-stream, and every checkpoint it left covers exactly the points its offset says
    # (one point per message): the state is never ahead of (or behind) its offset.
    assert sum(off for off, _ in run["at_crash"].values()) < sum(ends.values())
    for p, (offset, counters) in run["at_crash"].items():
        assert counters.get("points_in", 0) == offset, (p, offset, counters)
    assert run["finished"] and run["second_code"] == 0, run["log"]
    # Every event of the uninterrupted run, with identical content; duplicates only identical.
    want = {e.id: _comparable(orjson.loads(e.to_json())) for e in expected}
    got: dict[str, dict] = {}
    for value in run["output"]:
        doc = _comparable(orjson.loads(value))
        assert got.setdefault(doc["id"], doc) == doc, "the same id with different content"
    assert sorted(got) == sorted(want)
    assert all(got[i] == want[i] for i in want)
