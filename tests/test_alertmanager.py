"""The Alertmanager sink: against the real Alertmanager when installed, and against a stand-in
server that fails in every way a network peer can (down, 500, 400, slow)."""

from __future__ import annotations

import time
from datetime import datetime

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

from streamdet.alerting.alertmanager import AlertmanagerSink, label_name, parse_alertmanager
from streamdet.alerting.routing import Encoder
from streamdet.config import ConfigError, _Section, parse_config
from streamdet.daemon.health import Metrics
from streamdet.events import CLOSED, OPENED, BreachEvent
from streamdet.local_broker import free_port
from tests.alertmanager_fixtures import ALERTMANAGER, SKIP_REASON, RealAlertmanager, StandIn
from tests.helpers import run

RULES = {"rules": [{"name": "CheckoutLatency", "warmup": "60 steps",
                    "labels": {"team": "payments"},
                    "annotations": {"runbook": "https://runbooks.example/{rule}/{region|url}"}}]}


def breach_events() -> list[BreachEvent]:
    """One opened and one closed event of a series with a 20-step jump; times end now."""
    rng = np.random.default_rng(5)
    t = np.arange(600) * 60.0 + (time.time() - 600 * 60.0)
    y = 10 + rng.normal(0, 1, 600) + np.where((t >= t[300]) & (t < t[320]), 15.0, 0.0)
    _, events = run(RULES, 'checkout_latency{region="eu-1",az.name="b"}', t, y)
    assert [e.type for e in events] == [OPENED, CLOSED]
    # the helper gives series without labels; give them labels as a decoder would
    labels = {"region": "eu-1", "az.name": "b"}
    return [BreachEvent(**{**{k: getattr(e, k) for k in e.__slots__ if k != "id"},
                           "metric": "checkout_latency", "labels": labels}) for e in events]


def make_sink(url: str, **kw) -> tuple[AlertmanagerSink, Metrics]:
    cfg = parse_config({**RULES, "output": {"alertmanager": {"url": url, **kw}}})
    problems: list[str] = []
    settings = parse_alertmanager(_Section(cfg.extra["output"]["alertmanager"], "output.alertmanager",
                                           problems))
    assert not problems and settings is not None
    metrics = Metrics(CollectorRegistry())
    return AlertmanagerSink(settings, encoder=Encoder(cfg), metrics=metrics).start(), metrics


def wait_for(cond, timeout=20.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.1)
    return False


def sample(metrics: Metrics, name: str, labels: dict | None = None) -> float:
    return metrics.registry.get_sample_value(f"streamdet_{name}", labels or {}) or 0.0


@pytest.mark.skipif(ALERTMANAGER is None, reason=SKIP_REASON)
def test_alert_fires_in_alertmanager_then_resolves(tmp_path):
    am = RealAlertmanager(tmp_path)
    opened, closed = breach_events()
    sink, metrics = make_sink(am.url, resend_interval="1s")
    try:
        sink.submit([opened])
        assert wait_for(lambda: len(am.alerts()) == 1)
        alert = am.alerts()[0]
        # Alertmanager API v2 (GET /api/v2/alerts, gettableAlert): labels, annotations, status.state
        assert alert["labels"] == {"alertname": "CheckoutLatency", "team": "payments", "region": "eu-1",
                                   "az_name": "b", "metric": "checkout_latency",
                                   "severity": alert["labels"]["severity"]}
        assert alert["labels"]["severity"] in ("info", "warning", "critical")
        assert alert["status"]["state"] == "active"
        assert alert["annotations"]["runbook"] == "https://runbooks.example/CheckoutLatency/eu-1"
        assert alert["annotations"]["summary"].startswith('checkout_latency{region="eu-1",az.name="b"}')
        first_update = alert["updatedAt"]
        # re-sent while firing: Alertmanager sees the update (and would otherwise end it at endsAt)
        assert wait_for(lambda: am.alerts()[0]["updatedAt"] != first_update, timeout=10)
        sink.submit([closed])
        assert wait_for(lambda: am.alerts() == [])  # GET /api/v2/alerts lists no resolved alerts
        # the sink counts a post once Alertmanager's answer is back, which can come after the
        # alert has left its list: wait for the count rather than race it
        assert wait_for(lambda: sample(metrics, "alertmanager_alerts_sent_total", {"state": "resolved"}) == 1)
        assert sample(metrics, "alertmanager_alerts_sent_total", {"state": "firing"}) >= 2
        assert sample(metrics, "alertmanager_post_failures_total", {"reason": "connection"}) == 0
    finally:
        sink.close(5)
        am.stop()


@pytest.mark.skipif(ALERTMANAGER is None, reason=SKIP_REASON)
def test_a_refused_alert_does_not_hold_back_the_others(tmp_path):
    """Alertmanager answers 400 to a whole request when one alert is invalid; the sink finds it,
    drops and counts it, and posts the rest (here: an invalid label name set by hand)."""
    am = RealAlertmanager(tmp_path)
    opened, _closed = breach_events()
    sink, metrics = make_sink(am.url)
    try:
        sink.firing["bad"] = {"labels": {"alertname": "x", "bad-name": "1"}, "annotations": {},
                              "startsAt": "2024-01-01T00:00:00Z"}
        sink.fresh.add("bad")
        sink.submit([opened])
        assert wait_for(lambda: len(am.alerts()) == 1)
        assert wait_for(lambda: sample(metrics, "alertmanager_rejected_total") == 1)
        assert "bad" not in sink.firing
    finally:
        sink.close(5)
        am.stop()


def test_alertmanager_down_is_retried_with_backoff_and_counted():
    port = free_port()  # nothing listens here
    opened, closed = breach_events()
    sink, metrics = make_sink(f"http://127.0.0.1:{port}", max_backoff="1s", timeout="1s")
    try:
        sink.submit([opened, closed])
        assert wait_for(lambda: sample(metrics, "alertmanager_post_failures_total",
                                       {"reason": "connection"}) >= 3)
        n = sample(metrics, "alertmanager_post_failures_total", {"reason": "connection"})
        time.sleep(2.0)
        # bounded backoff: at most 1 s apart, so 1-3 more tries in 2 s, not a busy loop
        more = sample(metrics, "alertmanager_post_failures_total", {"reason": "connection"}) - n
        assert 1 <= more <= 4
        assert sink.thread.is_alive() and len(sink.resolved) == 1
    finally:
        sink.close(1)


def test_server_errors_are_retried_until_they_pass():
    server = StandIn()
    server.status = 500
    opened, closed = breach_events()
    sink, metrics = make_sink(server.url, max_backoff="0.5s")
    try:
        sink.submit([opened])
        assert wait_for(lambda: sample(metrics, "alertmanager_post_failures_total",
                                       {"reason": "server_error"}) >= 2)
        server.status = 200
        sink.submit([closed])
        assert wait_for(lambda: sample(metrics, "alertmanager_alerts_sent_total", {"state": "resolved"}) == 1)
        last = server.bodies[-1]
        assert [a.get("endsAt") is not None for a in last] == [True]
        # the resolution carries the labels the alert fired with
        assert last[0]["labels"] == server.bodies[0][0]["labels"]
        ends = datetime.fromisoformat(last[0]["endsAt"].replace("Z", "+00:00")).timestamp()
        assert ends <= time.time()
    finally:
        sink.close(2)
        server.stop()


def test_refused_alerts_are_dropped_not_retried_forever():
    server = StandIn()
    server.refuse = "eu-1"
    opened, _ = breach_events()
    sink, metrics = make_sink(server.url)
    try:
        sink.submit([opened])
        assert wait_for(lambda: sample(metrics, "alertmanager_rejected_total") == 1)
        time.sleep(0.5)
        assert len(server.bodies) == 1 and not sink.firing
    finally:
        sink.close(2)
        server.stop()


def test_a_slow_alertmanager_never_blocks_submit_and_overflow_is_counted():
    server = StandIn()
    server.delay = 1.5
    opened, _ = breach_events()
    sink, metrics = make_sink(server.url, timeout="0.5s", queue_size=5, max_backoff="0.5s")
    try:
        sink.submit([opened])
        assert wait_for(lambda: sample(metrics, "alertmanager_post_failures_total",
                                       {"reason": "timeout"}) >= 1)
        started = time.monotonic()
        sink.submit([opened] * 2000)  # the worker is stuck in a slow post: most are dropped
        assert time.monotonic() - started < 0.5
        assert sample(metrics, "alertmanager_dropped_total", {"reason": "queue_full"}) >= 1000
        assert sink.thread.is_alive()
    finally:
        sink.close(1)
        server.stop()


def test_label_names_and_settings():
    # Alertmanager label names: [a-zA-Z_][a-zA-Z0-9_]* (Prometheus data model; its 400 above)
    assert [label_name(n) for n in ("az.name", "0day", "ok_1", "")] == ["az_name", "_0day", "ok_1", "_"]
    for bad in ({"url": "ftp://x"}, {"url": "http://"}, {"url": "http://h", "resend_interval": "0s"},
                {"url": "http://h", "generator_url": "{x.y}"}, {"url": "http://h", "nope": 1}):
        problems: list[str] = []
        parse_alertmanager(_Section(bad, "output.alertmanager", problems))
        assert problems and all(p.startswith("output.alertmanager.") for p in problems), (bad, problems)
    problems = []
    s = parse_alertmanager(_Section({"url": "http://am:9093/"}, "output.alertmanager", problems))
    assert s is not None and s.url == "http://am:9093/api/v2/alerts" and not problems
    with pytest.raises(ConfigError, match=r"output\.alertmanager\.url"):
        from streamdet.daemon.settings import parse_settings
        parse_settings(parse_config({"output": {"alertmanager": {"url": "nope"}}}))
