"""The Kafka state store against the local broker: chunks, manifest last, damaged and unfinished
snapshots, tombstones; then two daemons in one group whose partitions (and state) move."""

from __future__ import annotations

import hashlib
import os
import re

import pytest
from confluent_kafka import OFFSET_BEGINNING, Consumer, KafkaError, Producer, TopicPartition
from confluent_kafka.admin import AdminClient, ConfigResource, NewTopic

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.kafka_store import KafkaStateStore, Manifest, chunk_key, manifest_key
from streamdet.daemon.state_store import Checkpoint, StateError
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, as_batch, waterflow_points

pytestmark = pytest.mark.broker


def raw_records(broker, topic: str, partition: int = 0) -> list[tuple[str, bytes | None]]:
    """Every (key, value) of a state partition, in log order, to the end-of-partition signal."""
    c = Consumer({"bootstrap.servers": broker.bootstrap, "group.id": unique("raw"),
                  "enable.partition.eof": True, "enable.auto.commit": False})
    c.assign([TopicPartition(topic, partition, OFFSET_BEGINNING)])
    out = []
    try:
        for _ in range(200):
            for m in c.consume(1000, 0.5):
                if m.error() is not None:
                    if m.error().code() == KafkaError._PARTITION_EOF:
                        return out
                    continue
                out.append((m.key().decode(), m.value()))
        raise AssertionError("no end of partition")
    finally:
        c.close()


def put(broker, topic: str, records) -> None:
    p = Producer({"bootstrap.servers": broker.bootstrap})
    for k, v in records:
        p.produce(topic, key=k.encode(), value=v, partition=0)
    assert p.flush(10) == 0


_OPEN: list[KafkaStateStore] = []


@pytest.fixture(autouse=True)
def _close_stores():
    yield
    while _OPEN:
        _OPEN.pop().close()


def store(broker, topic=None, **kw) -> KafkaStateStore:
    s = KafkaStateStore({"bootstrap.servers": broker.bootstrap}, topic or unique("state"),
                        group_id=unique("g"), timeout=20.0, **kw)
    _OPEN.append(s)
    return s.open()


def test_chunks_then_manifest_round_trip_and_tombstones(broker):
    s = store(broker, chunk_bytes=100_000)
    try:
        snap = os.urandom(250_000)
        s.save(Checkpoint("metrics", 3, 1234, snap))
        recs = raw_records(broker, s.topic)
        # 250,000 bytes in chunks of at most 100,000: three chunks, then the manifest, last
        assert [k.rsplit("/", 1)[-1] for k, _ in recs[:3]] == ["0", "1", "2"]
        assert [len(v) for _, v in recs[:3]] == [100_000, 100_000, 50_000]
        assert recs[-1][0] == manifest_key("metrics", 3) and len(recs) == 4
        m = Manifest.parse(recs[-1][1], "test")
        assert m.chunks == tuple(k for k, _ in recs[:3]) and m.next_offset == 1234
        # SHA-256 of the snapshot as hashlib computes it (Python standard library)
        assert m.sha256 == hashlib.sha256(snap).hexdigest() and m.size == 250_000
        # a second store (another instance) reads it back whole
        other = store(broker, s.topic, chunk_bytes=100_000)
        got = other.load("metrics", 3)
        assert got == Checkpoint("metrics", 3, 1234, snap)
        assert other.load("metrics", 4) is None and other.load("other-topic", 3) is None
        # the new owner writes the next snapshot: after its manifest, the old chunks get tombstones
        snap2 = os.urandom(120_000)
        other.save(Checkpoint("metrics", 3, 2000, snap2))
        recs = raw_records(broker, s.topic)[4:]
        assert [k.rsplit("/", 1)[-1] for k, _ in recs[:2]] == ["0", "1"] and recs[2][0] == manifest_key("metrics", 3)
        assert sorted(k for k, v in recs[3:] if v is None) == sorted(m.chunks)
        assert s.load("metrics", 3) == Checkpoint("metrics", 3, 2000, snap2)
        other.close()
    finally:
        s.close()


def test_unfinished_snapshot_is_ignored_and_later_tombstoned(broker):
    s = store(broker, chunk_bytes=50_000)
    try:
        snap = os.urandom(80_000)
        s.save(Checkpoint("in", 0, 10, snap))
        # a newer snapshot whose writer died before its manifest: chunks only (same key space)
        orphans = [chunk_key("in", 0, "ffffffffffffffff-dead00", i) for i in range(2)]
        put(broker, s.topic, [(k, os.urandom(50_000)) for k in orphans])
        fresh = store(broker, s.topic)
        assert fresh.load("in", 0) == Checkpoint("in", 0, 10, snap)
        fresh.save(Checkpoint("in", 0, 20, b"next"))
        tombstoned = {k for k, v in raw_records(broker, s.topic) if v is None}
        assert set(orphans) <= tombstoned
        assert fresh.load("in", 0) == Checkpoint("in", 0, 20, b"next")
        fresh.close()
    finally:
        s.close()


DAMAGES = {  # what is done to one partition's records -> the reason the loader must give
    "flipped chunk": "does not match its manifest",
    "missing chunk": "1 of 3 chunk(s) the manifest names are missing",
    "bad json": "manifest is not JSON",
    "format 9": "manifest format 9",
    "other partition": "belongs to in:99",
    "no fields": "lacks a usable field",
}


def test_damaged_snapshots_are_refused_with_the_reason(broker):
    s = store(broker, chunk_bytes=10_000)
    snaps = {}
    for p, _damage in enumerate(DAMAGES):  # one input partition per kind of damage
        snaps[p] = os.urandom(25_000)
        s.save(Checkpoint("in", p, 5, snaps[p]))
    manifests = {Manifest.parse(v, "t").partition: Manifest.parse(v, "t")
                 for k, v in raw_records(broker, s.topic) if k.endswith("/m")}
    bad = []
    for p, damage in enumerate(DAMAGES):
        m, mk = manifests[p], manifest_key("in", p)
        if damage == "flipped chunk":  # same key, one byte changed: the checksum no longer matches
            flipped = bytearray(snaps[p][10_000:20_000])
            flipped[7] ^= 1
            bad.append((m.chunks[1], bytes(flipped)))
        elif damage == "missing chunk":
            bad.append((m.chunks[2], None))
        elif damage == "bad json":
            bad.append((mk, b"{not json"))
        elif damage == "format 9":
            bad.append((mk, m.to_bytes().replace(b'"format":1', b'"format":9')))
        elif damage == "other partition":
            bad.append((mk, m.to_bytes().replace(f'"partition":{p}'.encode(), b'"partition":99')))
        else:
            bad.append((mk, b'{"format": 1}'))
    put(broker, s.topic, bad)
    reader = store(broker, s.topic)
    for p, damage in enumerate(DAMAGES):
        with pytest.raises(StateError, match=re.escape(DAMAGES[damage])) as info:
            reader.load("in", p)
        assert str(info.value).endswith(f"(start this partition fresh with --fresh-partition in:{p})")
    # an undamaged partition still loads; discarding a damaged one starts it fresh
    s.save(Checkpoint("in", 50, 6, b"fine"))
    assert reader.load("in", 50) == Checkpoint("in", 50, 6, b"fine")
    reader.discard("in", 0)
    assert reader.load("in", 0) is None


def test_state_topic_is_created_compacted_or_refused(broker):
    s = store(broker, input_topics=())
    admin = AdminClient({"bootstrap.servers": broker.bootstrap})
    cfg = next(iter(admin.describe_configs([ConfigResource("topic", s.topic)]).values())).result(10)
    assert cfg["cleanup.policy"].value == "compact"
    s.close()
    deleting = unique("state")
    admin.create_topics([NewTopic(deleting, num_partitions=1, replication_factor=1,
                                  config={"cleanup.policy": "delete"})])[deleting].result(10)
    with pytest.raises(StateError, match=re.escape("cleanup.policy is 'delete'")):
        store(broker, deleting)


def test_engine_snapshot_travels_whole(broker):
    """A real engine's snapshot through the store restores to the same state (same bytes again)."""
    eng = Engine(parse_config(DAEMON_RULES))
    eng.ingest(as_batch(waterflow_points(sites=3)))
    snap = eng.snapshot()
    s = store(broker)  # default 900 KB chunks
    try:
        s.save(Checkpoint("in", 0, 99, snap))
        got = store(broker, s.topic).load("in", 0)
        assert Engine.restore(parse_config(DAEMON_RULES), got.snapshot).snapshot() == snap
    finally:
        s.close()


# ---------------------------------------------------------------- two daemons, one group

def kafka_daemon(broker, tmp_path, topics, group, state_topic, name):
    from prometheus_client import CollectorRegistry

    from streamdet.daemon.consumer import Daemon
    from streamdet.daemon.health import Metrics
    from streamdet.daemon.settings import parse_settings

    inp, out, dlq = topics
    cfg = parse_config({**DAEMON_RULES, "kafka": {
        "bootstrap_servers": broker.bootstrap, "group_id": group, "input_topics": [inp],
        "output_topic": out, "dead_letter_topic": dlq, "session_timeout": "6s",
        "checkpoint_interval": "1s", "poll_timeout": "0.2s"},
        "state": {"store": "kafka", "topic": state_topic, "chunk_bytes": 20_000,
                  "dir": str(tmp_path / name)},
        "health": {"address": "127.0.0.1:0"}})
    metrics = Metrics(CollectorRegistry())
    return Daemon(cfg, parse_settings(cfg), metrics=metrics), metrics


def accepted(*metrics) -> float:
    return sum(m.registry.get_sample_value("streamdet_points_accepted_total") or 0 for m in metrics)


def test_partitions_and_their_state_move_between_two_daemons(broker, tmp_path):
    import orjson

    from streamdet.events import parse_cloudevent
    from tests.integration.streams import as_messages, without_wall_clock
    from tests.integration.test_daemon import Running, replay_events, wait_for

    topics = broker.daemon_topics(partitions=4)
    group, state_topic = unique("g"), unique("state")
    points = waterflow_points(sites=8)  # river.datasets.WaterFlow, 8 copies keyed by site
    n = len(points)
    parts = [points[: n // 3], points[n // 3: 2 * n // 3], points[2 * n // 3:]]
    broker.produce(topics[0], as_messages(parts[0]))
    a, ma = kafka_daemon(broker, tmp_path, topics, group, state_topic, "a")
    b, mb = kafka_daemon(broker, tmp_path, topics, group, state_topic, "b")
    seen_ready: list[tuple[bool, str]] = []
    with Running(a):
        assert wait_for(lambda: accepted(ma) == len(parts[0]), 40)
        # idle now: the engines hold exactly the first third; these are the states a new owner must get
        assert wait_for(lambda: not any(p.dirty for p in a.parts.values()) and not a.writer.busy, 20)
        before = {k: p.engine.snapshot() for k, p in a.parts.items()}
        assert len(before) == 4
        load = b.store.load

        def load_and_look(topic, partition):
            got = load(topic, partition)
            seen_ready.append(b.ready())  # what /readyz says while this partition is restoring
            return got

        b.store.load = load_and_look
        with Running(b):
            assert wait_for(lambda: len(b.parts) >= 1 and len(a.parts) + len(b.parts) == 4, 40)
            moved = set(b.parts)
            # the new owner's engines are exactly the old owner's (same snapshot bytes again)
            assert {k: b.parts[k].engine.snapshot() for k in moved} == {k: before[k] for k in moved}
            assert any(b.parts[k].engine.stats()["series_active"] for k in moved)
            broker.produce(topics[0], as_messages(parts[1]))
            # each point read once in all: the new owner resumes at the offset the state covers
            assert wait_for(lambda: accepted(ma, mb) == len(parts[0]) + len(parts[1]), 40)
            a.stop()  # the first instance leaves; its partitions (and state) go to the second
            assert wait_for(lambda: len(b.parts) == 4, 40)
            broker.produce(topics[0], as_messages(parts[2]))
            assert wait_for(lambda: accepted(ma, mb) == n, 40)
            expected = {e.id: orjson.loads(e.to_json()) for e in replay_events(points)}
            msgs = broker.read_all(topics[1], expect=len(expected), timeout=20)
    assert not seen_ready[0][0] and seen_ready[0][1].startswith("restoring 1 partition(s): ")
    assert "state records read" in seen_ready[0][1]
    docs = [without_wall_clock(parse_cloudevent(m.value())) for m in msgs]
    # the union of both instances' events is a single uninterrupted run's (replay of all points)
    assert {d["id"] for d in docs} == set(expected)
    for d in docs:  # duplicates (if any) only with the same id and the same content
        assert d == without_wall_clock(expected[d["id"]])


def test_daemon_refuses_a_state_topic_that_is_not_compacted(broker, tmp_path, caplog):
    topics = broker.daemon_topics()
    state_topic = unique("state")
    admin = AdminClient({"bootstrap.servers": broker.bootstrap})
    admin.create_topics([NewTopic(state_topic, num_partitions=1, replication_factor=1,
                                  config={"cleanup.policy": "delete"})])[state_topic].result(10)
    d, _ = kafka_daemon(broker, tmp_path, topics, unique("g"), state_topic, "x")
    assert d.run(install_signals=False, health=False) == 2
    assert f"state topic {state_topic}: cleanup.policy is 'delete'" in caplog.text
