"""Checkpoints in a compacted Kafka topic, so a partition's learned state moves with the partition.

Each input partition's snapshot is cut into chunks under the broker's message size limit and
written to the state topic, then a *manifest* record (written last, after every chunk is
acknowledged) names the chunks, the input offset they cover, the format version and the
snapshot's SHA-256. Chunk keys carry a generation (``<topic>/<partition>/c/<gen>/<i>``), so a new
snapshot never overwrites the chunks the current manifest names; the manifest key
(``<topic>/<partition>/m``) is the same for every generation, so compaction keeps the latest.
Once a new manifest is acknowledged the previous generation's chunks are tombstoned.

A loader reads the partition's records from the beginning to the end-of-partition signal
(not the listed end offset: the bundled test broker lists wrong ones), keeps the latest
value per key, and accepts only the snapshot the latest manifest names, whole and matching
its checksum: chunks of a newer snapshot whose manifest never arrived are ignored, and a
manifest whose chunks are missing or do not match is an error, never a silent reset.

The producer keeps connections and threads, so the store is not ``fork_safe``: the checkpoint
writer uses its copy-and-thread path for it.
"""

from __future__ import annotations

import hashlib
import logging
import threading
import time
import uuid
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import orjson
from confluent_kafka import OFFSET_BEGINNING, Consumer, KafkaError, KafkaException, Producer, TopicPartition
from confluent_kafka.admin import AdminClient, ConfigResource, NewTopic

from streamdet.daemon.state_store import Checkpoint, StateError

log = logging.getLogger("streamdet.state")
MANIFEST_FORMAT = 1
DEFAULT_CHUNK_BYTES = 900_000  # under the broker's default message.max.bytes (1,000,012)
Progress = Callable[[str, int, int], None]  # (what, records read, bytes read)


@dataclass(frozen=True, slots=True)
class Manifest:
    """What the manifest record says; ``chunks`` are record keys in order."""

    topic: str
    partition: int
    next_offset: int
    generation: str
    chunks: tuple[str, ...]
    size: int
    sha256: str

    def to_bytes(self) -> bytes:
        return orjson.dumps({"format": MANIFEST_FORMAT, "topic": self.topic, "partition": self.partition,
                             "next_offset": self.next_offset, "generation": self.generation,
                             "chunks": list(self.chunks), "size": self.size, "sha256": self.sha256})

    @classmethod
    def parse(cls, data: bytes, where: str) -> Manifest:
        try:
            doc = orjson.loads(data)
        except orjson.JSONDecodeError as exc:
            raise StateError(f"{where}: manifest is not JSON ({exc})") from None
        if not isinstance(doc, dict):
            raise StateError(f"{where}: manifest is not a JSON object")
        if doc.get("format") != MANIFEST_FORMAT:
            raise StateError(f"{where}: manifest format {doc.get('format')!r}; this build reads "
                             f"format {MANIFEST_FORMAT}")
        try:
            chunks = doc["chunks"]
            if not isinstance(chunks, list) or not all(isinstance(c, str) for c in chunks):
                raise TypeError("chunks is not a list of keys")
            return cls(str(doc["topic"]), int(doc["partition"]), int(doc["next_offset"]),
                       str(doc["generation"]), tuple(chunks), int(doc["size"]), str(doc["sha256"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(f"{where}: manifest lacks a usable field ({exc!r})") from None


def prefix(topic: str, partition: int) -> str:
    return f"{topic}/{partition}/"


def manifest_key(topic: str, partition: int) -> str:
    return f"{prefix(topic, partition)}m"


def chunk_key(topic: str, partition: int, generation: str, index: int) -> str:
    return f"{prefix(topic, partition)}c/{generation}/{index}"


def split_chunks(data: bytes, chunk_bytes: int) -> list[bytes]:
    """``data`` in pieces of at most ``chunk_bytes`` (at least one piece, maybe empty)."""
    return [data[i:i + chunk_bytes] for i in range(0, len(data), chunk_bytes)] or [b""]


class KafkaStateStore:
    """Checkpoints in ``topic`` (compacted), one key space per input partition.

    Input partition ``p`` of any input topic is kept in state partition ``p % partitions``, so
    a loader reads only the state partition that holds it. :meth:`open` checks or creates the
    topic; a store is used by one daemon at a time per input partition (the consumer group's
    owner), from one thread at a time.
    """

    fork_safe = False  # a producer with threads and sockets: never used from a forked child

    def __init__(self, bootstrap: Mapping[str, Any], topic: str, *, chunk_bytes: int = DEFAULT_CHUNK_BYTES,
                 partitions: int | None = None, input_topics: tuple[str, ...] = (),
                 group_id: str = "streamdet", timeout: float = 60.0,
                 producer: Mapping[str, Any] | None = None) -> None:
        if chunk_bytes < 1024:
            raise ValueError(f"chunk_bytes must be at least 1024, got {chunk_bytes}")
        self.client = dict(bootstrap)  # bootstrap.servers plus the shared librdkafka properties
        self.topic = topic
        self.chunk_bytes = chunk_bytes
        self.partitions = partitions
        self.input_topics = input_topics
        self.group_id = group_id
        self.timeout = timeout
        self.producer_extra = dict(producer or {})
        self.progress: Progress | None = None  # the daemon's /readyz hook while loading
        self._producer: Producer | None = None
        self._consumer: Consumer | None = None
        self._lock = threading.Lock()
        # chunk keys written (or seen) for each input partition and not yet tombstoned
        self._stale: dict[tuple[str, int], set[str]] = {}
        self._current: dict[tuple[str, int], set[str]] = {}
        self.bytes_written = 0  # chunks, manifests and tombstones: for the benchmark and metrics

    # ------------------------------------------------------------ set-up

    def open(self) -> KafkaStateStore:
        """Check the state topic (or create it, compacted); StateError says what is wrong."""
        admin = AdminClient({**self.client})
        try:
            meta = admin.list_topics(timeout=self.timeout)
        except KafkaException as exc:
            raise StateError(f"state topic {self.topic}: brokers not reachable ({exc})") from None
        if self.topic not in meta.topics or meta.topics[self.topic].error is not None:
            n = self.partitions or max([len(meta.topics[t].partitions) for t in self.input_topics
                                        if t in meta.topics] or [1])
            fut = admin.create_topics([NewTopic(self.topic, num_partitions=n, replication_factor=-1,
                                                config={"cleanup.policy": "compact"})])[self.topic]
            try:
                fut.result(self.timeout)
                log.info("created state topic %s (%d partitions, cleanup.policy=compact)", self.topic, n)
            except KafkaException as exc:
                err = exc.args[0]
                if getattr(err, "code", lambda: None)() != KafkaError.TOPIC_ALREADY_EXISTS:
                    raise StateError(f"state topic {self.topic}: cannot create it ({err}); create it with "
                                     f"cleanup.policy=compact or give the daemon the right to") from None
            meta = admin.list_topics(topic=self.topic, timeout=self.timeout)
        self.partitions = len(meta.topics[self.topic].partitions)
        if self.partitions == 0:
            raise StateError(f"state topic {self.topic}: no partitions listed")
        policy = self._cleanup_policy(admin)
        if policy is not None and "compact" not in policy:
            raise StateError(f"state topic {self.topic}: cleanup.policy is {policy!r}; it must be "
                             f"'compact' or snapshots are deleted by retention (set it on the topic)")
        self._producer = Producer({**self.client, "enable.idempotence": True, "acks": "all",
                                   "linger.ms": 5, "compression.type": "none",
                                   "message.max.bytes": max(1_000_000, self.chunk_bytes + 64 * 1024),
                                   **self.producer_extra})
        self._consumer = Consumer({**self.client, "group.id": f"{self.group_id}-state-loader",
                                   "enable.auto.commit": False, "enable.partition.eof": True,
                                   "max.partition.fetch.bytes": 16 * 1024 * 1024, "fetch.wait.max.ms": 50})
        return self

    def _cleanup_policy(self, admin: AdminClient) -> str | None:
        try:
            res = admin.describe_configs([ConfigResource("topic", self.topic)])
            entries = next(iter(res.values())).result(self.timeout)
        except Exception as exc:  # not every broker answers DescribeConfigs: then trust the topic
            log.warning("state topic %s: cannot read its cleanup.policy (%s)", self.topic, exc)
            return None
        entry = entries.get("cleanup.policy")
        return None if entry is None else str(entry.value)

    def close(self) -> None:
        if self._producer is not None:
            self._producer.flush(10)
            self._producer = None
        if self._consumer is not None:
            self._consumer.close()
            self._consumer = None

    def state_partition(self, partition: int) -> int:
        assert self.partitions
        return partition % self.partitions

    # ------------------------------------------------------------ writing

    def _produce_all(self, records: list[tuple[str, bytes | None]], partition: int,
                     what: str) -> None:
        """Produce ``records`` and wait until every one is acknowledged; StateError otherwise."""
        assert self._producer is not None
        failures: list[str] = []

        def report(err, _msg) -> None:
            if err is not None:
                failures.append(err.str())

        for key, value in records:
            while True:
                try:
                    self._producer.produce(self.topic, value=value, key=key.encode(), partition=partition,
                                           on_delivery=report)
                    break
                except BufferError:
                    self._producer.poll(0.05)
            self.bytes_written += len(key) + (0 if value is None else len(value))
        left = self._producer.flush(self.timeout)
        if left:
            raise StateError(f"state topic {self.topic}: {left} {what} record(s) not acknowledged in "
                             f"{self.timeout:g} s; the checkpoint is not durable")
        if failures:
            raise StateError(f"state topic {self.topic}: writing {what} failed ({failures[0]}); "
                             f"the checkpoint is not durable")

    def save(self, checkpoint: Checkpoint) -> None:
        """Chunks, then (once acknowledged) the manifest, then tombstones for the old chunks.

        Returns once the manifest is acknowledged: only then is the checkpoint durable.
        """
        with self._lock:
            if self._producer is None:
                self.open()
            key = (checkpoint.topic, checkpoint.partition)
            part = self.state_partition(checkpoint.partition)
            generation = f"{time.time_ns():x}-{uuid.uuid4().hex[:6]}"
            pieces = split_chunks(checkpoint.snapshot, self.chunk_bytes)
            keys = [chunk_key(*key, generation, i) for i in range(len(pieces))]
            self._produce_all(list(zip(keys, pieces, strict=True)), part, "chunk")
            manifest = Manifest(checkpoint.topic, checkpoint.partition, checkpoint.next_offset, generation,
                                tuple(keys), len(checkpoint.snapshot),
                                hashlib.sha256(checkpoint.snapshot).hexdigest())
            self._produce_all([(manifest_key(*key), manifest.to_bytes())], part, "manifest")
            old = self._stale.pop(key, set()) | self._current.get(key, set())
            self._current[key] = set(keys)
            if old:
                self._produce_all([(k, None) for k in sorted(old)], part, "tombstone")

    def discard(self, topic: str, partition: int) -> None:
        """Tombstone the partition's manifest and every chunk (``--fresh-partition``)."""
        latest = self._read(topic, partition)
        with self._lock:
            keys = sorted(latest)
            if keys:
                self._produce_all([(k, None) for k in keys], self.state_partition(partition), "tombstone")
            self._stale.pop((topic, partition), None)
            self._current.pop((topic, partition), None)

    # ------------------------------------------------------------ reading

    def _read(self, topic: str, partition: int) -> dict[str, bytes]:
        """The latest value of every live key of this input partition (to end of partition)."""
        if self._consumer is None:
            self.open()
        assert self._consumer is not None
        part = self.state_partition(partition)
        mine = prefix(topic, partition).encode()
        what = f"{topic}:{partition}"
        latest: dict[str, bytes] = {}
        records = nbytes = 0
        self._consumer.assign([TopicPartition(self.topic, part, OFFSET_BEGINNING)])
        deadline = time.monotonic() + self.timeout
        last_report = 0.0
        try:
            while True:
                if time.monotonic() > deadline:
                    raise StateError(f"state topic {self.topic}[{part}]: end of partition not reached in "
                                     f"{self.timeout:g} s while restoring {what} ({records} records read)")
                m = self._consumer.poll(0.5)  # poll, not consume(n): that waits for n records or the timeout
                if m is not None:
                    err = m.error()
                    if err is not None:
                        if err.code() == KafkaError._PARTITION_EOF:
                            if self.progress is not None:
                                self.progress(what, records, nbytes)
                            return latest
                        if err.fatal():
                            raise StateError(f"state topic {self.topic}: {err.str()}")
                    else:
                        records += 1
                        k = m.key() or b""
                        if k.startswith(mine):
                            v = m.value()
                            if v is None:
                                latest.pop(k.decode(), None)
                            else:
                                latest[k.decode()] = v
                                nbytes += len(v)
                if self.progress is not None and time.monotonic() - last_report > 0.5:
                    last_report = time.monotonic()
                    self.progress(what, records, nbytes)
        finally:
            self._consumer.unassign()

    def load(self, topic: str, partition: int) -> Checkpoint | None:
        """The snapshot the latest manifest names, verified; None if there is no manifest."""
        latest = self._read(topic, partition)
        where = f"state topic {self.topic}, {topic}:{partition}"
        hint = f"(start this partition fresh with --fresh-partition {topic}:{partition})"
        raw = latest.pop(manifest_key(topic, partition), None)
        with self._lock:
            if raw is None:
                self._stale[(topic, partition)] = set(latest)  # chunks of snapshots never finished
                return None
            try:
                manifest = Manifest.parse(raw, where)
            except StateError as exc:
                raise StateError(f"{exc} {hint}") from None
            if (manifest.topic, manifest.partition) != (topic, partition):
                raise StateError(f"{where}: manifest belongs to {manifest.topic}:{manifest.partition} {hint}")
            missing = [k for k in manifest.chunks if k not in latest]
            if missing:
                raise StateError(f"{where}: {len(missing)} of {len(manifest.chunks)} chunk(s) the manifest "
                                 f"names are missing (first: {missing[0]}) {hint}")
            snapshot = b"".join(latest[k] for k in manifest.chunks)
            if len(snapshot) != manifest.size or hashlib.sha256(snapshot).hexdigest() != manifest.sha256:
                raise StateError(f"{where}: snapshot of generation {manifest.generation} does not match "
                                 f"its manifest (size {len(snapshot)} vs {manifest.size}, or SHA-256) {hint}")
            named = set(manifest.chunks)
            self._current[(topic, partition)] = named
            self._stale[(topic, partition)] = set(latest) - named
        return Checkpoint(topic, partition, manifest.next_offset, snapshot)


def kafka_store_from_settings(settings) -> KafkaStateStore:
    """The store ``state.store: kafka`` describes, not yet opened."""
    return KafkaStateStore({"bootstrap.servers": settings.bootstrap_servers, **settings.client},
                           settings.state_topic or f"{settings.group_id}-state",
                           chunk_bytes=settings.state_chunk_bytes, input_topics=settings.input_topics,
                           group_id=settings.group_id)
