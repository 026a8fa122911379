"""The event sink against the broker: backpressure on a full queue, and failed deliveries retried."""

from __future__ import annotations

import os
import signal
import time

import pytest
from prometheus_client import CollectorRegistry

from streamdet.daemon.health import Metrics
from streamdet.daemon.producer import Sink
from streamdet.events import OPENED, BreachEvent
from tests.integration.kafka import Broker, unique

pytestmark = pytest.mark.broker


def events(n):
    return [BreachEvent(type=OPENED, series=f"s{i}", metric="s", labels={}, rule="r", step_start=60.0 * i,
                        step_end=60.0 * i + 60, observed=9.0, expected=1.0, lower=0.0, upper=2.0, score=8.0,
                        direction="above", width=3.0, weights={"holt": 1.0}, started=60.0 * i)
            for i in range(n)]


def test_full_queue_blocks_instead_of_growing(broker):
    topic = unique("out")
    broker.create_topics(topic)
    metrics = Metrics(CollectorRegistry())
    sink = Sink(metrics=metrics, source="test", output_topic=topic, dead_letter_topic=None,
                producer_conf={"bootstrap.servers": broker.bootstrap, "queue.buffering.max.messages": 20,
                               "linger.ms": 50})
    sink.send(events(500), time.monotonic())
    assert sink.backpressure_waits > 0  # it waited for room rather than queueing 500
    assert sink.flush(20)
    assert len(broker.read_all(topic, expect=500)) == 500
    assert metrics.registry.get_sample_value("streamdet_events_out_total", {"type": OPENED}) == 500


def test_failed_deliveries_are_counted_and_retried():
    b = Broker().start()
    try:
        topic = unique("out")
        b.create_topics(topic)
        metrics = Metrics(CollectorRegistry())
        sink = Sink(metrics=metrics, source="test", output_topic=topic, dead_letter_topic=None,
                    producer_conf={"bootstrap.servers": b.bootstrap, "message.timeout.ms": 1500,
                                   "enable.idempotence": False, "acks": "all"})
        os.kill(b.proc.pid, signal.SIGSTOP)
        sink.send(events(5), time.monotonic())
        assert not sink.flush(4)  # cannot be acknowledged while the broker is frozen
        assert metrics.registry.get_sample_value("streamdet_delivery_failures_total") >= 5
        os.kill(b.proc.pid, signal.SIGCONT)
        assert sink.flush(30)
        ids = {m.key() for m in b.read_all(topic, expect=5)}
        assert ids == {f"s{i}".encode() for i in range(5)}
    finally:
        os.kill(b.proc.pid, signal.SIGCONT)
        b.stop()
