"""Warm start: build each input partition's engine state from history, so the daemon starts with
weeks of seasonal profiles instead of learning them live.

History comes from files (any replay format) or from a Kafka topic since a time. Points run
through the same :class:`~streamdet.core.engine.Engine` as the daemon, at full speed and with no
events emitted, and each partition's snapshot is written to the daemon's state store together
with the offset where live consumption continues (the partition's end when warming began). So
warm-then-live gives the same bands and events as all-live on the same points.

Which partition a series lives in is the producer's choice. For files (and for a history topic
other than the input topic) warm start assumes producers key each message by the series key
(``metric{label="value",...}``, UTF-8) and use librdkafka's default partitioner,
``consistent_random``: CRC-32 of the key modulo the partition count (random only for empty
keys, which series keys never are). Java clients default to murmur2 instead: pass
``--partitioner murmur2`` (librdkafka's ``murmur2_random``, Kafka's ``Utils.toPositive(murmur2(key))
% partitions``). Both are tested against the partition librdkafka itself picks.

>>> crc32_partition(b'cpu{host="a"}', 6) == zlib.crc32(b'cpu{host="a"}') % 6
True
"""

from __future__ import annotations

import time
import zlib
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from streamdet.config import Config
from streamdet.core.engine import Engine
from streamdet.core.points import DecodeError, PointBatch
from streamdet.daemon.state_store import Checkpoint, StateStore

CHUNK = 50_000


def crc32_partition(key: bytes, partitions: int) -> int:
    """librdkafka's ``consistent`` / ``consistent_random`` partitioner for a non-empty key."""
    return zlib.crc32(key) % partitions


def murmur2(data: bytes) -> int:
    """Kafka's murmur2 (seed 0x9747b28c), as in the Java client's ``Utils.murmur2``; 32-bit signed.

    >>> murmur2(b"21")  # value listed in Kafka's UtilsTest (from memory)
    -973932308
    """
    m, r = 0x5BD1E995, 24
    length = len(data)
    h = (0x9747B28C ^ length) & 0xFFFFFFFF
    n4 = length // 4
    for i in range(n4):
        k = int.from_bytes(data[4 * i:4 * i + 4], "little")
        k = (k * m) & 0xFFFFFFFF
        k ^= k >> r
        k = (k * m) & 0xFFFFFFFF
        h = (h * m) & 0xFFFFFFFF
        h ^= k
    rest = data[4 * n4:]
    if len(rest) >= 3:
        h ^= rest[2] << 16
    if len(rest) >= 2:
        h ^= rest[1] << 8
    if len(rest) >= 1:
        h ^= rest[0]
        h = (h * m) & 0xFFFFFFFF
    h ^= h >> 13
    h = (h * m) & 0xFFFFFFFF
    h ^= h >> 15
    return h - (1 << 32) if h & 0x80000000 else h


def murmur2_partition(key: bytes, partitions: int) -> int:
    """librdkafka's ``murmur2_random`` (Java's default) for a non-empty key."""
    return (murmur2(key) & 0x7FFFFFFF) % partitions


PARTITIONERS: dict[str, Callable[[bytes, int], int]] = {"crc32": crc32_partition,
                                                        "murmur2": murmur2_partition}


@dataclass(slots=True, kw_only=True)
class WarmResult:
    points: int = 0
    records: int = 0
    seconds: float = 0.0
    errors: list[DecodeError] = field(default_factory=list)
    partitions: dict[int, tuple[int, int]] = field(default_factory=dict)  # partition -> (series, offset)

    @property
    def points_per_second(self) -> float:
        return self.points / self.seconds if self.seconds > 0 else float("nan")


def partition_of_points(points: PointBatch, partitions: int, partitioner: str = "crc32") -> np.ndarray:
    """The partition of every point, from its series key as the message key."""
    fn = PARTITIONERS[partitioner]
    of_key = {k: fn(k.encode(), partitions) for k in points.series}
    return np.fromiter((of_key[k] for k in points.keys), dtype=np.int64, count=len(points))


def build_engines(config: Config, points: PointBatch, part_of: np.ndarray,
                  partitions: Iterable[int]) -> dict[int, Engine]:
    """One engine per partition fed its points in time order (ties keep input order); no events kept."""
    engines = {p: Engine(config) for p in partitions}
    order = np.argsort(points.time, kind="stable")
    for p, engine in engines.items():
        idx = order[part_of[order] == p]
        for lo in range(0, idx.shape[0], CHUNK):
            engine.ingest(points.take(idx[lo:lo + CHUNK]))  # events are dropped: history only
    return engines


def save_engines(store: StateStore, topic: str, engines: Mapping[int, Engine],
                 offsets: Mapping[int, int]) -> dict[int, tuple[int, int]]:
    out = {}
    for p, engine in sorted(engines.items()):
        store.save(Checkpoint(topic, p, int(offsets[p]), engine.snapshot()))
        out[p] = (engine.stats()["series_active"], int(offsets[p]))
    return out


def warm_from_files(config: Config, paths: Sequence[str | Path], *, store: StateStore, topic: str,
                    offsets: Mapping[int, int], partitioner: str = "crc32", fmt: str | None = None,
                    now: float | None = None) -> WarmResult:
    """History files -> one checkpoint per partition of ``topic`` (``offsets``: partition -> next offset)."""
    from streamdet.replay import read_inputs

    started = time.perf_counter()
    points, errors, records = read_inputs(paths, config, fmt=fmt, now=now)
    part_of = partition_of_points(points, len(offsets), partitioner)
    return _warm(config, points, part_of, offsets, store, topic, records, errors, started)


def topic_layout(conf: Mapping[str, object], topic: str, timeout: float = 10.0) -> dict[int, tuple[int, int]]:
    """partition -> (low, high) watermark offsets of a topic; RuntimeError when it does not exist."""
    from confluent_kafka import Consumer, TopicPartition

    c = Consumer({**conf, "enable.auto.commit": False})
    try:
        md = c.list_topics(topic, timeout=timeout).topics.get(topic)
        if md is None or md.error is not None or not md.partitions:
            raise RuntimeError(f"topic {topic!r} not found ({md.error if md is not None else 'no metadata'})")
        return {p: c.get_watermark_offsets(TopicPartition(topic, p), timeout=timeout)
                for p in sorted(md.partitions)}
    finally:
        c.close()


TopicHistory = tuple[dict[int, PointBatch], dict[int, int], list[DecodeError], int]


def read_topic(conf: Mapping[str, object], topic: str, config: Config, *, since: float, now: float,
               limit_seconds: float = 3600.0) -> TopicHistory:
    """Every message of ``topic`` from ``now - since`` (message timestamps) to each partition's end.

    Returns points per partition, next offsets, decode errors and records."""
    from confluent_kafka import OFFSET_END, Consumer, KafkaError, TopicPartition

    from streamdet.codecs import TimeRules
    from streamdet.codecs.readers import MessageReader

    layout = topic_layout(conf, topic)
    # Read to the end-of-partition signal rather than to the listed end offsets: that is where the
    # fetches stopped, whatever the broker's offset listing says (the bundled test broker's is off).
    c = Consumer({**conf, "enable.auto.commit": False, "auto.offset.reset": "earliest",
                  "enable.partition.eof": True})
    rules = TimeRules(now=now, max_future=config.input.max_future)
    try:
        wanted = [TopicPartition(topic, p, int((now - since) * 1000)) for p in layout]
        starts = {tp.partition: tp.offset for tp in c.offsets_for_times(wanted, timeout=10.0)}
        # offsets_for_times gives -1 when nothing is that recent: start at the end then
        c.assign([TopicPartition(topic, p, starts[p] if starts[p] >= 0 else OFFSET_END) for p in layout])
        ends: dict[int, int] = {}
        batches: dict[int, list[PointBatch]] = {p: [] for p in layout}
        readers = {p: MessageReader(config.input) for p in layout}  # the daemon's decoders
        errors: list[DecodeError] = []
        records = 0
        deadline = time.monotonic() + limit_seconds
        pending = set(layout)
        while pending and time.monotonic() < deadline:
            msgs = c.consume(20_000, 1.0)
            by_part: dict[int, list] = {}
            for m in msgs:
                if m.error() is not None:
                    if m.error().code() != KafkaError._PARTITION_EOF:
                        raise RuntimeError(f"reading {topic}: {m.error().str()}")
                    if m.partition() in pending:
                        ends[m.partition()] = m.offset()
                        pending.discard(m.partition())
                    continue
                if m.partition() in pending:
                    by_part.setdefault(m.partition(), []).append(m)
            for p, items in by_part.items():
                def where(i: int, items=items, p=p) -> str:
                    return f"{topic}/{p}@{items[i].offset()}"

                batch, bad, n = readers[p].decode_messages([m.value() or b"" for m in items], where,
                                                           rules=rules)
                records += n
                for _i, d in bad:
                    errors.extend(d.errors)
                batches[p].append(batch)
        if pending:
            raise RuntimeError(f"reading {topic}: partitions {sorted(pending)} not read to their end in time")
    finally:
        c.close()
    return {p: PointBatch.concat(b) for p, b in batches.items()}, ends, errors, records


def warm_from_topic(config: Config, conf: Mapping[str, object], source: str, *, store: StateStore,
                    topic: str, since: float, now: float, partitioner: str = "crc32") -> WarmResult:
    """History from a topic. When ``source`` is the input ``topic`` each partition's points warm that
    partition and live consumption continues at its end; from any other topic the points are
    spread over ``topic``'s partitions by series key, as for files."""
    started = time.perf_counter()
    per_part, ends, errors, records = read_topic(conf, source, config, since=since, now=now)
    if source == topic:
        points = PointBatch.concat(per_part.values())
        part_of = np.concatenate([np.full(len(b), p, np.int64) for p, b in per_part.items()] or
                                 [np.zeros(0, np.int64)])
        offsets = ends
    else:
        points = PointBatch.concat(per_part.values())
        offsets = {p: high for p, (_low, high) in topic_layout(conf, topic).items()}
        part_of = partition_of_points(points, len(offsets), partitioner)
    return _warm(config, points, part_of, offsets, store, topic, records, errors, started)


def _warm(config: Config, points: PointBatch, part_of: np.ndarray, offsets: Mapping[int, int],
          store: StateStore, topic: str, records: int, errors: list, started: float) -> WarmResult:
    """Engines per partition from the points, saved as checkpoints; the result with its timing."""
    engines = build_engines(config, points, part_of, offsets)
    result = WarmResult(points=len(points), records=records, errors=errors)
    result.partitions = save_engines(store, topic, engines, offsets)
    result.seconds = time.perf_counter() - started
    return result
