"""Where events and dead letters go: a Kafka topic (idempotent, acks=all) or a JSON lines file.

Deliveries are acknowledged asynchronously; a failed delivery is counted and produced again,
never dropped. ``flush`` reports whether everything handed over so far is acknowledged, which
is what a checkpoint waits for. A full producer queue blocks the caller (the consumer loop) in
``poll`` until there is room: backpressure instead of unbounded memory.
"""

from __future__ import annotations

import logging
import os
import time
from collections import deque
from collections.abc import Sequence
from typing import IO

from confluent_kafka import KafkaError, Producer

from streamdet.daemon.health import Metrics
from streamdet.events import CONTENT_TYPE, BreachEvent

log = logging.getLogger("streamdet.producer")

Headers = list[tuple[str, bytes]]


class Sink:
    """Events to ``output_topic`` (or ``events_file``); dead letters to ``dead_letter_topic``."""

    def __init__(self, *, metrics: Metrics, source: str, producer_conf: dict[str, str] | None,
                 output_topic: str | None, dead_letter_topic: str | None,
                 events_file: str | None = None) -> None:
        self.metrics = metrics
        self.source = source
        self.output_topic = output_topic
        self.dead_letter_topic = dead_letter_topic
        self.file: IO[bytes] | None = open(events_file, "ab") if events_file else None  # noqa: SIM115
        needs_kafka = (output_topic and not events_file) or dead_letter_topic
        self.producer = Producer(producer_conf) if needs_kafka and producer_conf is not None else None
        self.in_flight = 0
        self.retry: deque[tuple[str, bytes, bytes, Headers, str | None, float]] = deque()
        self.backpressure_waits = 0

    # ------------------------------------------------------------ sending

    def send(self, events: Sequence[BreachEvent], decided_at: float) -> None:
        if self.file is not None:
            for e in events:
                self.file.write(e.to_json(self.source) + b"\n")
                self.metrics.events_out.labels(e.type).inc()
                self.metrics.delivery_delay.observe(max(0.0, time.monotonic() - decided_at))
            return
        if self.output_topic is None or self.producer is None:
            return
        headers = [("content-type", CONTENT_TYPE.encode())]
        for e in events:
            self._produce(self.output_topic, e.series.encode(), e.to_json(self.source), headers,
                          e.type, decided_at)

    def dead_letter(self, value: bytes, key: bytes | None, headers: Headers) -> None:
        if self.dead_letter_topic is None or self.producer is None:
            return
        self._produce(self.dead_letter_topic, key or b"", value, headers, None, time.monotonic())
        self.metrics.dead_letters.inc()

    def _produce(self, topic: str, key: bytes, value: bytes, headers: Headers, event_type: str | None,
                 decided_at: float) -> None:
        assert self.producer is not None

        def delivered(err: KafkaError | None, _msg) -> None:
            self.in_flight -= 1
            if err is not None:
                self.metrics.delivery_failures.inc()
                log.warning("delivery to %s failed (%s); retrying", topic, err.str())
                self.retry.append((topic, key, value, headers, event_type, decided_at))
                return
            if event_type is not None:
                self.metrics.events_out.labels(event_type).inc()
                self.metrics.delivery_delay.observe(max(0.0, time.monotonic() - decided_at))

        while True:
            try:
                self.producer.produce(topic, value=value, key=key, headers=headers, on_delivery=delivered)
                self.in_flight += 1
                return
            except BufferError:
                self.backpressure_waits += 1
                self.producer.poll(0.05)

    # ------------------------------------------------------------ acknowledgements

    def poll(self) -> None:
        if self.producer is not None:
            self.producer.poll(0)
            while self.retry:
                self._produce(*self.retry.popleft())

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
        if self.file is not None:
            self.file.close()
        return ok
