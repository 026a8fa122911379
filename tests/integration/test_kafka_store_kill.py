"""Two daemon processes in one group with the Kafka state store; one is killed with SIGKILL mid-stream
and restarted: the union of their events is a single run's, and no series starts learning again."""

from __future__ import annotations

import signal
from collections import Counter

import orjson
import pytest
import yaml
from confluent_kafka import OFFSET_BEGINNING, Consumer, Producer, TopicPartition

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.kafka_store import KafkaStateStore
from streamdet.local_broker import free_port
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, as_messages, waterflow_points, without_wall_clock
from tests.integration.test_daemon import replay_events, wait_for
from tests.integration.test_recovery import metric, start

pytestmark = pytest.mark.broker

SITES, PARTITIONS = 8, 4


def site_partition(point) -> int:
    """Sites s0..s7 spread over the four input partitions, two sites each."""
    return int(point["labels"]["site"][1:]) % PARTITIONS


def produce(broker, topic, points) -> None:
    p = Producer({"bootstrap.servers": broker.bootstrap, "linger.ms": 5})
    for pt, (k, v) in zip(points, as_messages(points), strict=True):
        while True:
            try:
                p.produce(topic, key=k, value=v, partition=site_partition(pt))
                break
            except BufferError:
                p.poll(0.1)
    assert p.flush(30) == 0


def write_config(path, broker, topics, group, state_topic, state_dir, port):
    inp, out, dlq = topics
    cfg = {**DAEMON_RULES,
           "kafka": {"bootstrap_servers": broker.bootstrap, "group_id": group, "input_topics": [inp],
                     "output_topic": out, "dead_letter_topic": dlq, "session_timeout": "6s",
                     "checkpoint_interval": "0.5s", "poll_timeout": "0.2s", "batch_size": 50},
           "state": {"store": "kafka", "topic": state_topic, "chunk_bytes": 20_000, "dir": str(state_dir)},
           "health": {"address": f"127.0.0.1:{port}"}}
    path.write_text(yaml.safe_dump(cfg))
    return path


class OutputReader:
    """The output topic (one partition) from its start, assigned rather than subscribed: no group join
    and so no rebalance wait on each look."""

    def __init__(self, broker, topic: str) -> None:
        self.consumer = Consumer({"bootstrap.servers": broker.bootstrap, "group.id": unique("reader"),
                                  "enable.auto.commit": False})
        self.consumer.assign([TopicPartition(topic, 0, OFFSET_BEGINNING)])
        self.docs: list[dict] = []

    def ids(self) -> set[str]:
        for m in self.consumer.consume(1000, 0.2):
            if m.error() is None:
                self.docs.append(orjson.loads(m.value()))
        return {d["id"] for d in self.docs}


def accepted(port) -> float:
    return metric(port, "streamdet_points_accepted_total") or 0


def kept(port) -> float:
    return metric(port, "streamdet_restored_series_total", '{outcome="kept"}') or 0


def test_kill_9_of_one_of_two_daemons_moves_its_partitions_and_state(broker, tmp_path):
    topics = broker.daemon_topics(partitions=PARTITIONS)
    group, state_topic = unique("g"), unique("state")
    points = waterflow_points(sites=SITES)  # river.datasets.WaterFlow, one copy per site
    n = len(points)
    parts = [points[: n // 4], points[n // 4: n // 2], points[n // 2: 3 * n // 4], points[3 * n // 4:]]
    ports = {"a": free_port(), "b": free_port()}
    cfgs = {k: write_config(tmp_path / f"{k}.yaml", broker, topics, group, state_topic, tmp_path / k, port)
            for k, port in ports.items()}
    logs = {k: tmp_path / f"{k}.log" for k in ports}
    procs = {}

    def tail() -> str:
        return "\n".join(f"--- {k}\n{p.read_text()[-2000:]}" for k, p in logs.items() if p.exists())

    per_part = Counter(site_partition(p) for p in points)
    store = KafkaStateStore({"bootstrap.servers": broker.bootstrap}, state_topic, group_id=unique("g"),
                            timeout=20.0)

    def covered() -> dict[int, int]:
        """Each input partition's offset its last checkpoint covers (0: none yet)."""
        cps = {part: store.load(topics[0], part) for part in range(PARTITIONS)}
        return {part: cp.next_offset if cp else 0 for part, cp in cps.items()}

    expected = {e.id: orjson.loads(e.to_json()) for e in replay_events(points)}
    out = OutputReader(broker, topics[1])
    try:
        produce(broker, topics[0], parts[0])
        procs["a"] = start(cfgs["a"], logs["a"])
        assert wait_for(lambda: accepted(ports["a"]) == len(parts[0]), 40, 0.1), tail()
        procs["b"] = start(cfgs["b"], logs["b"])
        # the second instance takes two partitions (two sites each; the cooperative-sticky assignor
        # splits four partitions 2/2) with the first one's state
        assert wait_for(lambda: kept(ports["b"]) == SITES // 2, 40, 0.1), tail()
        produce(broker, topics[0], parts[1])
        # kill -9 the first instance while it reads its share of the second part
        assert wait_for(lambda: accepted(ports["a"]) > len(parts[0]) + 100, 40, 0.02), tail()
        procs["a"].send_signal(signal.SIGKILL)
        procs["a"].wait(10)
        produce(broker, topics[0], parts[2])
        # after the session timeout its partitions (and their last checkpoints) go to the second
        assert wait_for(lambda: kept(ports["b"]) == SITES, 40, 0.1), tail()
        procs["a"] = start(cfgs["a"], logs["a"])  # restarted: two partitions move back
        produce(broker, topics[0], parts[3])
        assert wait_for(lambda: kept(ports["a"]) == SITES // 2, 40, 0.1), tail()
        assert wait_for(lambda: out.ids() >= set(expected), 40, 0.05), tail()
        store.open()
        # and every point is read: each partition's checkpoint covers it to its end
        assert wait_for(lambda: covered() == per_part, 40, 0.2), (covered(), tail())
        for k in ("a", "b"):
            assert metric(ports[k], "streamdet_restored_series_total", '{outcome="relearning"}') == 0
            procs[k].send_signal(signal.SIGTERM)  # both leave at once: a final checkpoint each
        for k in ("a", "b"):
            assert procs.pop(k).wait(15) == 0
        # the final checkpoints: each partition's engine took each of its points exactly once, and
        # its series were created once (none started learning again after a move)
        final = {part: store.load(topics[0], part) for part in range(PARTITIONS)}
    finally:
        for p in procs.values():
            p.kill()
            p.wait(5)
        for _ in range(3):  # anything sent while stopping
            out.ids()
        out.consumer.close()
        store.close()
    for part, cp in final.items():
        assert cp.next_offset == per_part[part]
        eng = Engine.restore(parse_config(DAEMON_RULES), cp.snapshot)
        assert eng.counters["points_in"] == per_part[part]
        assert eng.counters["series_created"] == SITES // PARTITIONS
    by_id: dict[str, dict] = {}
    for doc in out.docs:  # duplicates (re-sent after the kill) only with the same id and the same content
        doc = without_wall_clock(doc)
        assert doc == without_wall_clock(expected[doc["id"]])
        by_id[doc["id"]] = doc
    assert sorted(by_id) == sorted(expected)  # nothing missing, nothing extra
