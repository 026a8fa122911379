"""Routed alerts end to end: the daemon posts to a real Alertmanager, `streamdet tail` follows
the output topic."""

from __future__ import annotations

import io

import pytest

from streamdet.alerting import tail as tail_mod
from streamdet.cli import build_parser
from streamdet.events import CLOSED, OPENED
from tests.alertmanager_fixtures import ALERTMANAGER, SKIP_REASON, RealAlertmanager
from tests.integration.streams import as_messages, waterflow_points
from tests.integration.test_daemon import Running, make_daemon, replay_events, wait_for

pytestmark = pytest.mark.broker


@pytest.mark.skipif(ALERTMANAGER is None, reason=SKIP_REASON)
def test_daemon_posts_breaches_to_alertmanager(broker, tmp_path):
    am = RealAlertmanager(tmp_path)
    try:
        topics = broker.daemon_topics()
        points = waterflow_points(sites=1)
        expected = replay_events(points)
        opened = sum(e.type == OPENED for e in expected)
        closed = sum(e.type == CLOSED for e in expected)
        broker.produce(topics[0], as_messages(points))
        daemon, metrics = make_daemon(broker, tmp_path, topics, sections={"output": {"alertmanager": {
            "url": am.url, "resend_interval": "2s"}}})
        get = metrics.registry.get_sample_value
        with Running(daemon):
            assert wait_for(lambda: (get("streamdet_alertmanager_alerts_sent_total",
                                         {"state": "resolved"}) or 0) == closed)
            # The whole history arrives as a backlog: a breach that opened and closed before its
            # alert went out is posted once, resolved (Alertmanager records it; nothing pages).
            assert (get("streamdet_alertmanager_alerts_sent_total", {"state": "firing"}) or 0) <= opened
            # WaterFlow's breaches all close within the data, so nothing stays firing
            assert wait_for(lambda: am.alerts() == [], timeout=10)
        assert closed == opened == 4
    finally:
        am.stop()


def test_tail_follows_the_output_topic(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=1)
    expected = replay_events(points)
    broker.produce(topics[0], as_messages(points))
    daemon, metrics = make_daemon(broker, tmp_path, topics)
    with Running(daemon):
        assert wait_for(lambda: metrics.registry.get_sample_value("streamdet_events_out_total",
                                                                  {"type": OPENED}) == 4)
    broker.produce(topics[1], [b"poison: not an event"])
    out, err = io.StringIO(), io.StringIO()
    args = build_parser().parse_args(["tail", "--bootstrap-servers", broker.bootstrap, "--topic",
                                      topics[1], "--from-beginning", "--idle-exit", "4"])
    assert tail_mod.main(args, out=out, err=err) == 0
    lines = out.getvalue().splitlines()
    assert len(lines) == len(expected)
    assert sum(" OPENED  waterflow{site=\"s0\"}" in line for line in lines) == 4
    assert all("detected" in line for line in lines)  # the daemon stamps the detection time
    assert f"{topics[1]}/0@{len(expected)}: not a streamdet event" in err.getvalue()
