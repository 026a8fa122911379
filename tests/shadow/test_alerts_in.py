"""Alertmanager webhook payloads in: parsing, hostile input, label matching, the HTTP receiver.

The payload shape follows Alertmanager's webhook_config documentation (version "4": receiver,
status, alerts[{status, labels, annotations, startsAt, endsAt, generatorURL, fingerprint}],
groupLabels, commonLabels, commonAnnotations, externalURL, groupKey, truncatedAlerts); a firing
alert carries Go's zero time "0001-01-01T00:00:00Z" as endsAt (from memory of the documented
example, and seen again in tests/integration/test_alertmanager.py against the real binary).
"""

from __future__ import annotations

import urllib.error
import urllib.request

import orjson
import pytest
from prometheus_client import CollectorRegistry

from streamdet.config import ConfigError, parse_config
from streamdet.daemon.health import HealthServer, Metrics
from streamdet.events import OPENED, BreachEvent
from streamdet.shadow.alerts_in import (
    PayloadError,
    SeriesMatch,
    parse_payload,
    read_alert_file,
)
from streamdet.shadow.book import ShadowBook
from streamdet.shadow.runtime import SUMMARY, ShadowRuntime, summary_document
from streamdet.shadow.settings import parse_shadow


def alert(status="firing", start="2026-03-02T10:00:00.123456789+01:00", end="0001-01-01T00:00:00Z",
          **labels):
    return {"status": status, "labels": {"alertname": "QueueDeep", **labels},
            "annotations": {"summary": "queue is deep"}, "startsAt": start, "endsAt": end,
            "generatorURL": "http://127.0.0.1:9090/graph", "fingerprint": "c6eadffa33fcdf37"}


def payload(*alerts, **over):
    doc = {"receiver": "streamdet", "status": "firing", "alerts": list(alerts),
           "groupLabels": {"alertname": "QueueDeep"}, "commonLabels": {}, "commonAnnotations": {},
           "externalURL": "http://127.0.0.1:9093", "version": "4",
           "groupKey": "{}:{alertname=\"QueueDeep\"}", "truncatedAlerts": 0}
    doc.update(over)
    return doc


def test_documented_payload_parses_with_times_and_offsets():
    p = parse_payload(orjson.dumps(payload(alert(host="a"), alert("resolved", "2026-03-02T09:00:00Z",
                                                                  "2026-03-02T09:30:00Z", host="b"))))
    assert p.errors == []
    firing, resolved = p.alerts
    assert firing.start == pytest.approx(1772442000.123457)  # 10:00+01:00 = 09:00 UTC
    assert firing.end is None and firing.name == "QueueDeep" and firing.labels["host"] == "a"
    assert resolved.end - resolved.start == 1800.0
    assert firing.fingerprint == "c6eadffa33fcdf37"


@pytest.mark.parametrize("body, code", [
    (b"{not json", "invalid_json"),
    (b"[1, 2]", "malformed"),
    (orjson.dumps({k: v for k, v in payload().items() if k != "alerts"}), "missing_field"),
    (orjson.dumps(payload(version="3")), "version"),
    (orjson.dumps(payload(alerts={"a": 1})), "malformed"),
    (orjson.dumps(payload(truncatedAlerts="x")), "malformed"),
    (orjson.dumps(payload(status="on fire")), "malformed"),
])
def test_bad_envelopes_are_refused_whole_with_a_reason(body, code):
    with pytest.raises(PayloadError) as info:
        parse_payload(body, "p")
    assert info.value.code == code and str(info.value).startswith("p: ")


def test_a_bad_alert_is_refused_alone():
    bad = [
        alert(status="pending"),
        {**alert(), "labels": {"alertname": 3}},
        {k: v for k, v in alert().items() if k != "startsAt"},
        alert("resolved", end="0001-01-01T00:00:00Z"),
        alert("resolved", start="2026-03-02T10:00:00Z", end="2026-03-02T09:00:00Z"),
        alert(start="yesterday"),
        {**alert(), "labels": {}},
        "not an object",
    ]
    p = parse_payload(payload(alert(host="ok"), *bad), "p")
    assert [a.labels["host"] for a in p.alerts] == ["ok"]
    assert len(p.errors) == len(bad)
    assert all(e.startswith(f"p: alerts[{i + 1}]: ") for i, e in enumerate(p.errors))
    assert "missing field 'startsAt'" in p.errors[2]


def test_fingerprint_falls_back_to_the_labels():
    a = {k: v for k, v in alert(host="x").items() if k != "fingerprint"}
    one, two = parse_payload(payload(a)).alerts[0], parse_payload(payload(dict(a))).alerts[0]
    assert one.fingerprint == two.fingerprint and len(one.fingerprint) == 16


def test_alert_file_names_bad_lines_and_keeps_the_rest(tmp_path):
    f = tmp_path / "alerts.jsonl"
    f.write_bytes(orjson.dumps(payload(alert(host="a"))) + b"\n\n{oops\n"
                  + orjson.dumps(payload(alert(status="x"))) + b"\n")
    alerts, errors = read_alert_file(f)
    assert len(alerts) == 1 and len(errors) == 2
    assert errors[0].startswith(f"{f}:3: ") and errors[1].startswith(f"{f}:4: alerts[0]")


def test_series_match_on_labels_and_alert_name_map():
    m = SeriesMatch(labels=("site", "env"), metrics={"QueueDeep": "queue_depth"})
    known = [("q1", "queue_depth", {"site": "north", "env": "prod"}),
             ("q2", "queue_depth", {"site": "south", "env": "prod"}),
             ("c1", "cpu", {"site": "north", "env": "prod"})]
    assert m.series_for({"alertname": "QueueDeep", "site": "north", "env": "prod"}, known) == ["q1"]
    # an alert name not in the map matches any metric with equal labels
    assert m.series_for({"alertname": "Other", "site": "north", "env": "prod"}, known) == ["q1", "c1"]
    # the chosen labels the alert carries are compared; it must carry at least one
    assert m.series_for({"alertname": "Other", "site": "north"}, known) == ["q1", "c1"]
    assert m.series_for({"alertname": "Other", "site": "north", "env": "dev"}, known) == []
    assert m.series_for({"alertname": "QueueDeep", "region": "eu"}, known) == []


def opened(series="queue_depth{site=\"north\"}", t=1772445600.0):
    return BreachEvent(type=OPENED, series=series, metric="queue_depth", labels={"site": "north"},
                       rule="queues", step_start=t - 60, step_end=t, observed=9.0, expected=1.0,
                       lower=0.0, upper=2.0, score=8.0, direction="above", width=3.0, weights={},
                       started=t - 300)


def test_book_round_trip_and_unmatched_alerts():
    match = SeriesMatch(labels=("site",))
    book = ShadowBook(match=match, slack=900.0)
    book.add_events([opened()])
    p = parse_payload(payload(alert(start="2026-03-02T10:05:00Z", site="north"),
                              {**alert(start="2026-03-02T11:00:00Z", site="west"), "fingerprint": "ff"}))
    unmatched = book.add_alerts(p.alerts)
    assert [a.labels["site"] for a in unmatched] == ["west"]
    copy = ShadowBook.from_dict(orjson.loads(orjson.dumps(book.to_dict())), match=match, slack=900.0)
    c = copy.compare()
    assert (c.total.both, c.total.only_theirs, c.total.only_ours) == (1, 0, 0)
    assert c.total.leads == [-300.0]  # opened at 10:00 UTC, their alert from 10:05
    assert [a.labels["site"] for a in c.unmatched] == ["west"]
    assert c.rules["queues"].both == 1
    doc = summary_document(c, "streamdet")
    assert doc["type"] == SUMMARY and doc["shadow"] is True and doc["data"]["unmatched_alerts"] == 1


def test_shadow_settings_parse_and_refuse():
    assert parse_shadow(parse_config({"shadow": True})).enabled
    assert not parse_shadow(parse_config({})).enabled
    s = parse_shadow(parse_config({"shadow": {"slack": "5m", "match": {"labels": ["site"],
                                                                       "metrics": {"A": "b"}}}}))
    assert s.enabled and s.slack == 300.0 and s.match.labels == ("site",)
    with pytest.raises(ConfigError) as info:
        parse_shadow(parse_config({"shadow": {"slack": "soon", "webhook_path": "/metrics", "colour": 1,
                                              "match": {"labels": 5}}}))
    text = "\n".join(info.value.problems)
    for path in ("shadow.slack", "shadow.webhook_path", "shadow.colour", "shadow.match.labels"):
        assert path in text


# ---------------------------------------------------------------- the receiver over HTTP (loopback)


def post(port, body, ctype="application/json", method="POST", headers=None):
    req = urllib.request.Request(f"http://127.0.0.1:{port}/alerts", data=body, method=method,
                                 headers={"Content-Type": ctype, **(headers or {})})
    try:
        with urllib.request.urlopen(req, timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read().decode()


def test_receiver_keeps_good_payloads_and_refuses_bad_ones_with_4xx(tmp_path):
    registry = CollectorRegistry()
    metrics = Metrics(registry)
    rt = ShadowRuntime(parse_shadow(parse_config({"shadow": {"max_body": 4096}})), registry=registry,
                       state_dir=tmp_path)
    server = HealthServer(metrics, lambda: (True, "ok"), "127.0.0.1", 0, rt.routes()).start()
    try:
        port = server.port
        assert post(port, orjson.dumps(payload(alert(instance="a"))))[0] == 200
        assert post(port, b"{nope")[0] == 400
        assert post(port, orjson.dumps(payload(version="2")))[0] == 400
        assert post(port, orjson.dumps(payload(alert(instance="a")))[:-1] + b" ")[0] == 400
        assert post(port, orjson.dumps(payload(alert(instance="a"))), ctype="text/plain")[0] == 415
        assert post(port, b"x" * 10_000)[0] == 413
        assert post(port, None, method="GET")[0] == 405
        second = {**alert(instance="b"), "fingerprint": "0b"}
        code, text = post(port, orjson.dumps(payload(second, alert(status="odd"))))
        assert code == 422 and "kept 1" in text
        # the health endpoints still answer after all that
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=5) as r:
            assert r.status == 200
    finally:
        server.stop()
    get = registry.get_sample_value
    assert get("streamdet_shadow_alerts_in_total", {"status": "firing"}) == 2
    for reason, n in (("invalid_json", 2), ("version", 1), ("content_type", 1), ("too_large", 1),
                      ("method", 1), ("bad_alert", 1)):
        assert get("streamdet_shadow_payloads_bad_total", {"reason": reason}) == n, reason
    assert get("streamdet_shadow_alerts_unmatched_total") == 2  # no series known yet
    assert len(rt.book.alerts) == 2


def test_runtime_state_survives_a_restart_and_a_damaged_file_does_not_stop_it(tmp_path):
    settings = parse_shadow(parse_config({"shadow": {"match": {"labels": ["site"]}}}))
    rt = ShadowRuntime(settings, registry=CollectorRegistry(), state_dir=tmp_path)
    rt.observe([opened()])
    rt.accept(parse_payload(payload(alert(start="2026-03-02T10:05:00Z", site="north"))))
    rt.save()
    again = ShadowRuntime(settings, registry=CollectorRegistry(), state_dir=tmp_path)
    assert again.book.to_dict() == rt.book.to_dict() and again.book.compare().total.both == 1
    (tmp_path / "shadow-comparison.json").write_bytes(b'{"version": 1, "alerts": 5}')
    fresh = ShadowRuntime(settings, registry=CollectorRegistry(), state_dir=tmp_path)
    assert fresh.book.alerts == {} and fresh.book.ours == {}
    (tmp_path / "shadow-comparison.json").write_bytes(b"\x00garbage")
    assert ShadowRuntime(settings, registry=CollectorRegistry(), state_dir=tmp_path).book.alerts == {}
