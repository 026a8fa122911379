"""One daemon reading two topics in different formats: OTLP protobuf and Influx line protocol."""

from __future__ import annotations

import pytest
from prometheus_client import CollectorRegistry

from streamdet.codecs.otlp import encode_gauges
from streamdet.codecs.readers import MessageReader
from streamdet.config import InputConfig, parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.consumer import Daemon
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import parse_settings
from streamdet.events import parse_cloudevent
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, as_batch, waterflow_points
from tests.integration.test_daemon import Running, wait_for

pytestmark = pytest.mark.broker


def test_one_daemon_reads_an_otlp_topic_and_a_line_protocol_topic(broker, tmp_path):
    lp_topic, out, dlq = broker.daemon_topics()
    otlp_topic = unique("otlp")
    broker.create_topics(otlp_topic)
    points = waterflow_points(sites=1)  # river.datasets.WaterFlow (outside data)
    lines = [f"waterflow,site=lp flow={p['value']} {int(p['time'] * 1e9)}" for p in points]
    lp_msgs = [(b"lp", "\n".join(lines[i:i + 10]).encode()) for i in range(0, len(lines), 10)]
    # OTLP: ten points per ExportMetricsServiceRequest, as the Collector's Kafka exporter sends them
    otlp_points = [{**p, "labels": {"site": "otlp"}} for p in points]
    otlp_msgs = [(b"otlp", encode_gauges(otlp_points[i:i + 10], resource={"service.name": "pumps"}))
                 for i in range(0, len(otlp_points), 10)]
    otlp_msgs.append((b"otlp", b"\x0a\xff\xff not protobuf"))  # poison: dead-lettered
    broker.produce(lp_topic, lp_msgs)
    broker.produce(otlp_topic, otlp_msgs)
    cfg = parse_config({**DAEMON_RULES, "input": {"format": "influx"}, "kafka": {
        "bootstrap_servers": broker.bootstrap, "group_id": unique("g"),
        "input_topics": [lp_topic, {"topic": otlp_topic, "format": "otlp_proto"}],
        "output_topic": out, "dead_letter_topic": dlq, "session_timeout": "6s",
        "checkpoint_interval": "1s", "poll_timeout": "0.2s"},
        "state": {"dir": str(tmp_path / "state")}, "health": {"address": "127.0.0.1:0"}})
    metrics = Metrics(CollectorRegistry())
    daemon = Daemon(cfg, parse_settings(cfg), metrics=metrics)
    with Running(daemon):
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_points_accepted_total")
                        == 2 * len(points))
    # Expected: each topic replayed on its own engine (one engine per partition in the daemon).
    expected = Engine(parse_config(DAEMON_RULES)).ingest(
        as_batch([{**p, "metric": "waterflow_flow", "labels": {"site": "lp"}} for p in points]))
    otlp_batch, bad, _ = MessageReader(InputConfig(format="otlp_proto")).decode_messages(
        [v for _k, v in otlp_msgs], str)
    assert len(bad) == 1
    expected += Engine(parse_config(DAEMON_RULES)).ingest(otlp_batch)
    got = [parse_cloudevent(m.value()) for m in broker.read_all(out, expect=len(expected))]
    assert sorted(d["id"] for d in got) == sorted(e.id for e in expected)
    subjects = {d["subject"] for d in got}
    assert subjects == {'waterflow_flow{site="lp"}', 'waterflow{service.name="pumps",site="otlp"}'}
    dead = broker.read_all(dlq, expect=1)
    assert len(dead) == 1 and dict(dead[0].headers())["streamdet-error"].startswith(b"not an OTLP")
