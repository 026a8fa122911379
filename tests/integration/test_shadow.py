"""Shadow mode in the daemon against the local broker: events to the shadow topic marked
``shadow: true``, alerts through the webhook receiver, the comparison in the checkpoint, and
switching shadow off keeping what was learnt (events equal a plain replay of the same points)."""

from __future__ import annotations

import urllib.request

import orjson
import pytest

from streamdet.events import parse_cloudevent, rfc3339
from streamdet.shadow.runtime import STATE_FILE, SUMMARY
from tests.integration.kafka import unique
from tests.integration.streams import as_messages, waterflow_points
from tests.integration.test_daemon import Running, make_daemon, replay_events, wait_for

pytestmark = pytest.mark.broker


def webhook(port, alerts):
    body = orjson.dumps({"version": "4", "receiver": "streamdet", "status": "firing", "alerts": alerts,
                         "groupLabels": {}, "commonLabels": {}, "externalURL": "http://127.0.0.1:1",
                         "groupKey": "{}", "truncatedAlerts": 0})
    req = urllib.request.Request(f"http://127.0.0.1:{port}/alerts", data=body,
                                 headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=5) as r:
        return r.status


def their(name, start, end, fp):
    return {"status": "resolved", "labels": {"alertname": name, "site": "s0"}, "annotations": {},
            "startsAt": rfc3339(start), "endsAt": rfc3339(end), "fingerprint": fp, "generatorURL": ""}


def test_shadow_run_then_shadow_off_keeps_state(broker, tmp_path):
    topics = broker.daemon_topics()
    shadow_topic = unique("shadow")
    broker.create_topics(shadow_topic)
    points = waterflow_points(sites=1)
    msgs = as_messages(points)
    split = 600  # WaterFlow's fourth breach (message 875) comes after the switch
    broker.produce(topics[0], msgs[:split])
    expected = replay_events(points)
    sections = {"shadow": {"topic": shadow_topic, "summary_interval": "1s", "settle": 0,
                           "match": {"labels": ["site"]}}}
    daemon, metrics = make_daemon(broker, tmp_path, topics, sections=sections)
    get = metrics.registry.get_sample_value
    with Running(daemon):
        assert wait_for(lambda: get("streamdet_points_accepted_total") == split)
        assert wait_for(lambda: daemon.health_port is not None)
        first = expected[0]  # opened at 2022-03-24T09:00Z, closed 2022-03-25T01:00Z
        assert webhook(daemon.health_port, [
            their("FlowLow", first.time - 2400, first.time + 3600, "a1"),      # both, lead +40 min
            their("FlowLow", 1649000000.0, 1649003600.0, "a2"),                # only theirs
        ]) == 200
        assert wait_for(lambda: (get("streamdet_shadow_incidents_total", {"kind": "only_theirs"}) or 0) == 1)
    got = broker.read_all(shadow_topic, expect=7)
    docs = [parse_cloudevent(m.value()) for m in got]
    breaches = [d for d in docs if d["type"] != SUMMARY]
    summaries = [d for d in docs if d["type"] == SUMMARY]
    assert [d["id"] for d in breaches] == [e.id for e in expected[:6]]
    assert all(d["shadow"] is True for d in docs)
    assert summaries and summaries[-1]["data"]["total"]["both"] == 1
    assert broker.read_all(topics[1], timeout=4, idle=2) == []  # nothing on the paging topic
    assert get("streamdet_shadow_incidents_total", {"kind": "both"}) == 1
    assert get("streamdet_shadow_incidents_total", {"kind": "only_ours"}) == 2
    # +40 min lands between the 1800 and 3600 bucket bounds (prometheus_client exports no _sum
    # for a histogram with negative buckets)
    assert get("streamdet_shadow_lead_seconds_count") == 1
    assert get("streamdet_shadow_lead_seconds_bucket", {"le": "1800.0"}) == 0
    assert get("streamdet_shadow_lead_seconds_bucket", {"le": "3600.0"}) == 1
    state = orjson.loads((tmp_path / "state" / STATE_FILE).read_bytes())
    assert len(state["alerts"]) == 2 and len(state["ours"]['waterflow{site="s0"}']) == 3

    # Shadow off, same state directory and group: the rest of the stream continues the same engine.
    broker.produce(topics[0], msgs[split:])
    plain, m2 = make_daemon(broker, tmp_path, topics, extra={"group_id": daemon.settings.group_id},
                            shadow=False)
    with Running(plain):
        assert wait_for(lambda: m2.registry.get_sample_value("streamdet_points_accepted_total")
                        == len(points) - split)
        out = broker.read_all(topics[1], expect=2)
    docs = [parse_cloudevent(m.value()) for m in out]
    assert [d["id"] for d in docs] == [e.id for e in expected[6:]]
    assert all("shadow" not in d for d in docs)


def test_alerts_from_a_kafka_topic(broker, tmp_path):
    from prometheus_client import CollectorRegistry

    from streamdet.config import parse_config
    from streamdet.shadow.runtime import ShadowRuntime
    from streamdet.shadow.settings import parse_shadow

    topic = unique("alerts")
    broker.create_topics(topic)
    good = orjson.dumps({"version": "4", "receiver": "r", "status": "resolved",
                         "alerts": [their("FlowLow", 1649000000.0, 1649003600.0, "k1")]})
    broker.produce(topic, [(None, b"{broken"), (None, b"x" * 10_000), (None, good),
                           (None, orjson.dumps({"version": "4", "status": "firing", "alerts": [{"status": "?"}]}))])
    registry = CollectorRegistry()
    cfg = parse_config({"shadow": {"alerts_topic": topic, "max_body": 4096, "match": {"labels": ["site"]}}})
    rt = ShadowRuntime(parse_shadow(cfg), registry=registry, state_dir=tmp_path,
                       consumer_conf={"bootstrap.servers": broker.bootstrap, "group.id": unique("g"),
                                      "auto.offset.reset": "earliest", "session.timeout.ms": 6000})
    get = registry.get_sample_value
    try:
        assert wait_for(lambda: (get("streamdet_shadow_payloads_bad_total", {"reason": "bad_alert"}) or 0) == 1,
                        timeout=30)
    finally:
        rt.stop()
    assert get("streamdet_shadow_alerts_in_total", {"status": "resolved"}) == 1
    assert get("streamdet_shadow_payloads_bad_total", {"reason": "invalid_json"}) == 1
    assert get("streamdet_shadow_payloads_bad_total", {"reason": "too_large"}) == 1
    (a,) = rt.book.alerts.values()
    assert a.start == 1649000000.0 and a.end == 1649003600.0 and a.labels["site"] == "s0"
