"""Poison never stalls a partition (issue 7, item 1), against the bundled broker.

Each case crashed the daemon before (it exited 1, and a restart re-read the same message and
died again); now the message is counted, dead-lettered or logged, and skipped, and every good
point behind it is still processed.
"""

from __future__ import annotations

import logging

import orjson
import pytest
from confluent_kafka import Producer

from streamdet.events import parse_cloudevent
from tests.integration.streams import as_messages, waterflow_points
from tests.integration.test_daemon import Running, make_daemon, replay_events, wait_for

pytestmark = pytest.mark.broker


def _get(metrics, name, labels=None):
    return metrics.registry.get_sample_value(name, labels or {}) or 0.0


def test_label_values_that_are_objects_or_lists_are_dead_lettered(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=1)
    good = as_messages(points)
    poison = [(b"x", b'{"metric": "g", "labels": {"h": {"x": 1}}, "time": 1650000000, "value": 1}'),
              (b"x", b'{"metric": "g", "labels": {"h": [1, 2]}, "time": 1650000000, "value": 1}')]
    broker.produce(topics[0], good[:300] + poison + good[300:])
    daemon, metrics = make_daemon(broker, tmp_path, topics)
    with Running(daemon) as running:
        assert wait_for(lambda: _get(metrics, "streamdet_points_accepted_total") == len(points))
        dead = broker.read_all(topics[2], expect=2)
        expected = replay_events(points)
        got = broker.read_all(topics[1], expect=len(expected))
    assert running.code == 0
    assert [dict(m.headers())["streamdet-error"] for m in dead] == [
        b"label 'h': value is an object; label values must be strings or numbers",
        b"label 'h': value is a list; label values must be strings or numbers"]
    assert [int(dict(m.headers())["source-offset"]) for m in dead] == [300, 301]
    assert _get(metrics, "streamdet_records_bad_total", {"reason": "bad_label"}) == 2
    assert sorted(parse_cloudevent(m.value())["id"] for m in got) == sorted(e.id for e in expected)


def test_line_protocol_with_400_digit_numbers_is_dead_lettered(broker, tmp_path):
    topics = broker.daemon_topics()
    digits = "9" * 400
    msgs = [(b"m", f"cpu,host=a used={digits}i 1650000000000000000".encode()),
            (b"m", f"cpu,host=a used=1 {digits}".encode()),
            (b"m", b"cpu,host=a used=2 1650000060000000000")]
    broker.produce(topics[0], msgs)
    daemon, metrics = make_daemon(broker, tmp_path, topics, sections={"input": {"format": "influx"}})
    with Running(daemon) as running:
        assert wait_for(lambda: _get(metrics, "streamdet_records_in_total") == 3)
        dead = broker.read_all(topics[2], expect=2)
    assert running.code == 0
    assert [dict(m.headers())["streamdet-error"] for m in dead] == [
        b"integer field value of 400 digits is out of range", b"timestamp of 400 digits is out of range"]


def test_oversized_undecodable_message_is_dead_lettered_truncated(broker, tmp_path, caplog):
    topics = broker.daemon_topics()
    big = b"x" * 5_000_000
    p = Producer({"bootstrap.servers": broker.bootstrap, "message.max.bytes": 10_000_000})
    p.produce(topics[0], value=big, key=b"k1")
    p.produce(topics[0], value=b"y" * 2_000, key=b"k" * 2_000)  # the truncated copy cannot fit either
    p.produce(topics[0], value=orjson.dumps({"metric": "m", "time": 1650000000, "value": 1}), key=b"k")
    assert p.flush(30) == 0
    # message.max.bytes 3000 for the daemon's producer: the second message's key and headers
    # alone leave no room for even a truncated copy.
    daemon, metrics = make_daemon(broker, tmp_path, topics, extra={"producer": {"message.max.bytes": 3000}})
    with caplog.at_level(logging.WARNING, logger="streamdet"), Running(daemon) as running:
        assert wait_for(lambda: _get(metrics, "streamdet_records_in_total") == 3)
        assert wait_for(lambda: _get(metrics, "streamdet_undeliverable_total", {"kind": "dead_letter"}) == 1)
        dead = broker.read_all(topics[2], expect=1)
        assert wait_for(lambda: _get(metrics, "streamdet_checkpoints_total") >= 1)
    assert running.code == 0
    assert len(dead) == 1
    h = dict(dead[0].headers())
    assert h["streamdet-truncated"] == b"true" and h["streamdet-original-size"] == b"5000000"
    assert h["source-offset"] == b"0" and h["streamdet-error"].startswith(b"invalid JSON")
    assert dead[0].key() == b"k1" and dead[0].value() == big[:len(dead[0].value())]
    assert 0 < len(dead[0].value()) < 3000
    assert _get(metrics, "streamdet_dead_letters_truncated_total") == 1
    assert f"dead letter from {topics[0]}/0@1" in caplog.text and "cannot be delivered" in caplog.text


def test_event_over_the_message_size_limit_is_skipped_and_others_go_out(broker, tmp_path, caplog):
    topics = broker.daemon_topics()
    long_site = "s" * 1000  # within the 1024-character label limit, but its events exceed 3000 bytes
    points = waterflow_points(sites=1)
    both = [q for p in points for q in (p, {**p, "labels": {"site": long_site}})]
    broker.produce(topics[0], as_messages(both))
    expected = replay_events(points)
    assert len(expected) >= 2  # the long series has the same values, so as many events
    daemon, metrics = make_daemon(broker, tmp_path, topics, extra={"producer": {"message.max.bytes": 3000}})
    with caplog.at_level(logging.WARNING, logger="streamdet"), Running(daemon) as running:
        assert wait_for(lambda: _get(metrics, "streamdet_points_accepted_total") == len(both))
        assert wait_for(lambda: _get(metrics, "streamdet_undeliverable_total", {"kind": "event"}) == len(expected))
        got = broker.read_all(topics[1], expect=len(expected))
        assert wait_for(lambda: _get(metrics, "streamdet_checkpoints_total") >= 1)
    assert running.code == 0
    assert sorted(parse_cloudevent(m.value())["id"] for m in got) == sorted(e.id for e in expected)
    assert "cannot be delivered" in caplog.text
