"""Where events and dead letters go: a Kafka topic (idempotent, acks=all) or a JSON lines file.

Deliveries are acknowledged asynchronously; a failed delivery is counted and produced again,
never dropped. ``flush`` reports whether everything handed over so far is acknowledged, which
is what a checkpoint waits for. A full producer queue blocks the caller (the consumer loop) in
``poll`` until there is room: backpressure instead of unbounded memory.

A message the producer can never deliver (over ``message.max.bytes``, or refused by the broker
as too large or invalid) is not retried: a dead letter goes again as a truncated copy with a
``streamdet-truncated`` header, and what still cannot go is logged with where it came from,
counted in ``streamdet_undeliverable_total{kind}`` and skipped, so one message never stalls
the partition or the checkpoints behind it.

Every message handed over gets a sequence number (kept across retries and truncation);
``barrier()`` names everything handed over so far and ``acknowledged(barrier)`` says, without
blocking, whether all of it is settled (acknowledged, or declared undeliverable and counted).
A checkpoint in the background waits on that instead of a blocking ``flush``.
"""

from __future__ import annotations

import heapq
import logging
import os
import time
from collections import deque
from collections.abc import Mapping, Sequence
from typing import IO

import orjson
from confluent_kafka import KafkaError, KafkaException, Producer

from streamdet.alerting.routing import Encoder
from streamdet.daemon.faults import FaultPlan
from streamdet.daemon.health import Metrics
from streamdet.daemon.logs import RateLimitedLog
from streamdet.events import CONTENT_TYPE, BreachEvent

log = logging.getLogger("streamdet.producer")

Headers = list[tuple[str, bytes]]
# Delivery errors that no retry can cure for this message.
PERMANENT = frozenset({KafkaError.MSG_SIZE_TOO_LARGE, KafkaError.RECORD_LIST_TOO_LARGE,
                       KafkaError.INVALID_MSG_SIZE, KafkaError.INVALID_RECORD})
DEFAULT_MAX_MESSAGE_BYTES = 1_000_000  # librdkafka's message.max.bytes default
_ENVELOPE = 1024  # room left for the record framing librdkafka adds to key, value and headers


class _Message:
    """One message handed to the producer, with what is needed to retry or report it."""

    __slots__ = ("decided_at", "event_type", "headers", "key", "kind", "seq", "source", "topic",
                 "truncated", "value")

    def __init__(self, topic: str, key: bytes, value: bytes, headers: Headers, *, kind: str,
                 source: str, event_type: str | None = None, decided_at: float = 0.0,
                 truncated: bool = False, seq: int = 0) -> None:
        self.topic, self.key, self.value, self.headers = topic, key, value, headers
        self.kind, self.source, self.event_type, self.decided_at = kind, source, event_type, decided_at
        self.truncated = truncated
        self.seq = seq  # order of hand-over; a retry or truncated copy keeps it


class Sink:
    """Events to ``output_topic`` (or ``events_file``); dead letters to ``dead_letter_topic``."""

    def __init__(self, *, metrics: Metrics, source: str, producer_conf: dict[str, str] | None,
                 output_topic: str | None, dead_letter_topic: str | None,
                 events_file: str | None = None, log_interval: float = 10.0,
                 encoder: Encoder | None = None, alerts=None,
                 faults: FaultPlan | None = None,
                 extensions: Mapping[str, object] | None = None) -> None:
        self.metrics = metrics
        self.faults = faults or FaultPlan()
        self.extensions = dict(extensions or {})  # CloudEvents extension attributes (shadow mode)
        self.source = source
        # Routing data (severity, summary, labels, annotations) and the wall-clock detection time
        # are added here, in the adapter; ``alerts`` (an AlertmanagerSink) gets every event too.
        self.encoder = encoder or Encoder(None, source)
        self.alerts = alerts
        self.output_topic = output_topic
        self.dead_letter_topic = dead_letter_topic
        self.file: IO[bytes] | None = open(events_file, "ab") if events_file else None  # noqa: SIM115
        needs_kafka = (output_topic and not events_file) or dead_letter_topic
        self.producer = Producer(producer_conf) if needs_kafka and producer_conf is not None else None
        self.max_message_bytes = int((producer_conf or {}).get("message.max.bytes",
                                                                DEFAULT_MAX_MESSAGE_BYTES))
        self.in_flight = 0
        self.retry: deque[_Message] = deque()
        self.backpressure_waits = 0
        self.log = RateLimitedLog(log, log_interval)
        self.handed = 0  # sequence number of the last message handed over
        self._open: list[int] = []  # heap: sequence numbers not yet settled (with settled ones)
        self._settled: set[int] = set()  # settled but still in the heap

    # ------------------------------------------------------------ sending

    def send(self, events: Sequence[BreachEvent], decided_at: float) -> None:
        detected_at = time.time()  # wall clock of the detection, beside the data time
        if self.alerts is not None and events:
            self.alerts.submit(events)  # never blocks: a bounded queue, drops counted
        if self.file is not None:
            for e in events:
                self.file.write(self._encode(e, detected_at) + b"\n")
                self.metrics.events_out.labels(e.type).inc()
                self.metrics.delivery_delay.observe(max(0.0, time.monotonic() - decided_at))
            return
        if self.output_topic is None or self.producer is None:
            return
        headers = [("content-type", CONTENT_TYPE.encode())]
        half = len(events) // 2
        for i, e in enumerate(events):
            if i == half:
                self.faults.hit("deliver")  # test-only (STREAMDET_FAULT)
            # breaches are keyed by series, peer outliers by group: each stays in order
            self._produce(_Message(self.output_topic, e.partition_key.encode(),
                                   self._encode(e, detected_at), headers,
                                   kind="event", source=f"{e.type} {e.id}", event_type=e.type,
                                   decided_at=decided_at, seq=self._next_seq()))

    def _encode(self, e: BreachEvent, detected_at: float | None) -> bytes:
        if not self.extensions:
            return self.encoder.to_json(e, detected_at)
        return orjson.dumps({**self.encoder.to_cloudevent(e, detected_at), **self.extensions})

    def send_document(self, key: bytes, doc: Mapping[str, object]) -> None:
        """Any other CloudEvent (a shadow summary) to the same place as the events."""
        value = orjson.dumps(doc)
        if self.file is not None:
            self.file.write(value + b"\n")
        elif self.output_topic is not None and self.producer is not None:
            self._produce(_Message(self.output_topic, key, value, [("content-type", CONTENT_TYPE.encode())],
                                   kind="event", source=f"{doc.get('type')} {doc.get('id')}"))

    def dead_letter(self, value: bytes, key: bytes | None, headers: Headers, source: str = "") -> None:
        """Send an undecodable message on; ``source`` (topic/partition@offset) is for the log."""
        if self.dead_letter_topic is None or self.producer is None:
            return
        self._produce(_Message(self.dead_letter_topic, key or b"", value, headers, kind="dead_letter",
                               source=source, seq=self._next_seq()))
        self.metrics.dead_letters.inc()

    def _produce(self, m: _Message) -> None:
        assert self.producer is not None

        def delivered(err: KafkaError | None, _msg) -> None:
            self.in_flight -= 1
            if err is not None:
                if err.code() in PERMANENT:
                    self._undeliverable(m, err.str())
                    return
                self.metrics.delivery_failures.inc()
                self.log.log(logging.WARNING, "delivery to %s failed (%s); retrying", m.topic, err.str(),
                             key=("delivery", m.topic))
                self.retry.append(m)
                return
            self._settle(m.seq)
            if m.event_type is not None:
                self.metrics.events_out.labels(m.event_type).inc()
                self.metrics.delivery_delay.observe(max(0.0, time.monotonic() - m.decided_at))

        while True:
            try:
                self.producer.produce(m.topic, value=m.value, key=m.key, headers=m.headers,
                                      on_delivery=delivered)
                self.in_flight += 1
                return
            except BufferError:
                self.backpressure_waits += 1
                self.producer.poll(0.05)
            except KafkaException as exc:  # refused before it was queued: too large, bad argument
                self._undeliverable(m, exc.args[0].str() if exc.args else str(exc))
                return

    def _undeliverable(self, m: _Message, why: str) -> None:
        """A dead letter goes again as a truncated copy (once); anything else is logged and counted."""
        if m.kind == "dead_letter" and not m.truncated:
            copy = self._truncated(m)
            if copy is not None:
                self.metrics.dead_letters_truncated.inc()
                self.log.log(logging.WARNING, "dead letter from %s refused (%s); sending the first %d of "
                             "%d bytes", m.source, why, len(copy.value), len(m.value), key="truncated")
                self._produce(copy)
                return
        self.metrics.undeliverable.labels(m.kind).inc()
        self._settle(m.seq)
        what = "dead letter" if m.kind == "dead_letter" else "event"
        self.log.log(logging.ERROR, "%s from %s (%d bytes) cannot be delivered to %s (%s); skipped",
                     what, m.source or "?", len(m.key) + len(m.value), m.topic, why,
                     key=("undeliverable", m.kind))

    def _truncated(self, m: _Message) -> _Message | None:
        """A copy of a dead letter cut to fit ``message.max.bytes``; None if even the headers do not."""
        room = (self.max_message_bytes - _ENVELOPE - len(m.key)
                - sum(len(k) + len(v) for k, v in m.headers) - 64)
        if room <= 0:
            return None
        headers = [*m.headers, ("streamdet-truncated", b"true"),
                   ("streamdet-original-size", str(len(m.value)).encode())]
        return _Message(m.topic, m.key, m.value[:min(room, max(0, len(m.value) - 1))], headers,
                        kind=m.kind, source=m.source, truncated=True, seq=m.seq)

    # ------------------------------------------------------------ acknowledgements

    def _next_seq(self) -> int:
        self.handed += 1
        heapq.heappush(self._open, self.handed)
        return self.handed

    def _settle(self, seq: int) -> None:
        self._settled.add(seq)
        while self._open and self._open[0] in self._settled:
            self._settled.discard(heapq.heappop(self._open))

    def barrier(self) -> int:
        """Everything handed over so far, as one number for :meth:`acknowledged`.

        Events written to a file are flushed and synced here (a small file: cheap)."""
        if self.file is not None:
            self.file.flush()
            os.fsync(self.file.fileno())
        return self.handed

    def acknowledged(self, barrier: int) -> bool:
        """Whether every message up to ``barrier`` is settled (serves delivery reports first)."""
        if self.producer is None:
            return True
        self.poll()
        return not self._open or self._open[0] > barrier

    def poll(self) -> None:
        if self.producer is not None:
            self.producer.poll(0)
            while self.retry:
                self._produce(self.retry.popleft())

    def flush(self, timeout: float) -> bool:
        """Wait until everything sent so far is acknowledged (or written and synced)."""
        if self.file is not None:
            self.file.flush()
            os.fsync(self.file.fileno())
        if self.producer is None:
            return True
        deadline = time.monotonic() + timeout
        while True:
            self.poll()
            remaining = deadline - time.monotonic()
            if self.in_flight == 0 and not self.retry:
                return True
            if remaining <= 0:
                return False
            self.producer.flush(min(remaining, 0.5))

    def close(self, timeout: float = 5.0) -> bool:
        ok = self.flush(timeout)
        if self.alerts is not None:
            self.alerts.close(timeout)
        if self.file is not None:
            self.file.close()
        return ok
