"""Routing data on events: safe templates, severity, summaries, rounded numbers, CloudEvents rules."""

from __future__ import annotations

import re
from datetime import UTC, datetime

import numpy as np
import orjson
import pytest

from streamdet.alerting.routing import Encoder, human_number, once_in, route, severity_of, summary
from streamdet.alerting.templates import MAX_OUTPUT, MAX_VALUE, Template, TemplateError
from streamdet.config import ConfigError, SeverityLevels, parse_config
from streamdet.events import CLOSED, OPENED, BreachEvent
from tests.helpers import run

# ---------------------------------------------------------------- CloudEvents 1.0 rules
# From the CloudEvents 1.0.2 core specification (spec.md, "Attribute Naming Convention" and
# "Context Attributes"): attribute names MUST consist of lower-case letters 'a'-'z' or digits
# '0'-'9' and SHOULD NOT exceed 20 characters; REQUIRED attributes are id, source, specversion
# and type, each a non-empty string, specversion "1.0" for this version; `time` is an RFC 3339
# timestamp; extension attributes use the same naming rule and the spec's type system (boolean,
# integer, string, binary, URI, URI-reference, timestamp: no objects or lists). The JSON event
# format (json-format.md) reserves `data` and `data_base64` as members beside the attributes.
CE_NAME = re.compile(r"[a-z0-9]+")
CE_REQUIRED = ("id", "source", "specversion", "type")
CE_OPTIONAL = ("datacontenttype", "dataschema", "subject", "time")
RFC3339 = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?(Z|[+-]\d\d:\d\d)")


def check_cloudevent(doc: dict) -> list[str]:
    """Problems with a structured-mode JSON CloudEvent under the 1.0 rules above."""
    problems = []
    for name in CE_REQUIRED:
        if not isinstance(doc.get(name), str) or not doc[name]:
            problems.append(f"required attribute {name!r} missing or empty")
    if doc.get("specversion") != "1.0":
        problems.append("specversion is not 1.0")
    for name, value in doc.items():
        if name in ("data", "data_base64"):
            continue
        if not CE_NAME.fullmatch(name):
            problems.append(f"attribute name {name!r} is not lower-case a-z0-9")
        if len(name) > 20:
            problems.append(f"attribute name {name!r} is longer than 20 characters")
        if name not in CE_REQUIRED + CE_OPTIONAL and not isinstance(value, str | bool | int):
            problems.append(f"extension {name!r} has a value outside the type system")
    if "time" in doc and not RFC3339.fullmatch(doc["time"]):
        problems.append("time is not RFC 3339")
    return problems


def test_the_checker_catches_what_the_spec_forbids():
    assert check_cloudevent({"specversion": "1.0", "id": "1", "source": "s", "type": "t"}) == []
    bad = {"specversion": "1.0", "id": "", "source": "s", "type": "t", "Severity": "x",
           "averyveryverylongattributename": "x", "ext": {"a": 1}, "time": "yesterday"}
    assert len(check_cloudevent(bad)) == 5


def shifted_events(cfg=None):
    rng = np.random.default_rng(5)
    t = np.arange(600) * 60.0 + 1.7e9
    y = 10 + rng.normal(0, 1, 600) + np.where((t >= t[300]) & (t < t[320]), 15.0, 0.0)
    cfg = cfg or {"rules": [{"name": "r", "warmup": "60 steps"}]}
    _, events = run(cfg, "svc_latency", t, y)
    return events


def test_routed_events_are_valid_cloudevents_with_routing_data():
    cfg = {"rules": [{"name": "payments-latency", "warmup": "60 steps",
                      "labels": {"team": "payments", "tier": 1},
                      "annotations": {"runbook": "https://runbooks.example/{rule}?series={series|url}",
                                      "dashboard": "https://dash.example/d/lat?from={started_ms}"},
                      "severity": {"warning": 4, "critical": 1000}}]}
    events = shifted_events(cfg)
    assert [e.type for e in events] == [OPENED, CLOSED]
    enc = Encoder(parse_config(cfg), source="/streamdet/test")
    detected = events[0].step_end + 2.5
    for e in events:
        doc = orjson.loads(enc.to_json(e, detected_at=detected))
        assert check_cloudevent(doc) == [], doc
        d = doc["data"]
        assert doc["severity"] == d["severity"] == "warning"
        assert d["routing"]["labels"] == {"team": "payments", "tier": "1"}
        ann = d["routing"]["annotations"]
        assert ann["runbook"] == "https://runbooks.example/payments-latency?series=svc_latency"
        assert ann["dashboard"] == f"https://dash.example/d/lat?from={int(e.started * 1000)}"
        assert ann["summary"] == d["summary"]
        assert d["detected_at"] is not None
        assert d["detection_delay_seconds"] == pytest.approx(detected - e.step_end)
        # full precision in the numbers, rounded text beside them
        assert d["observed"] == e.observed and d["expected"] == e.expected
        assert d["display"]["observed"] == human_number(e.observed)
        # people's fields first, forecaster weights last
        keys = list(d)
        assert keys[:3] == ["summary", "severity", "metric"] and keys[-1] == "weights"
    opened = orjson.loads(enc.to_json(events[0]))["data"]
    assert opened["detected_at"] is None and opened["detection_delay_seconds"] is None
    assert re.fullmatch(r"svc_latency is \d+ % above its usual [\d.]+ for \w+day \d\d:\d\d; "
                        r"unusual like once in .+", opened["summary"]), opened["summary"]


def test_severity_levels():
    levels = SeverityLevels(warning=6, critical=10)
    assert [severity_of(s, levels) for s in (5.2, 6.0, 9.99, 10.0, float("inf"), float("nan"))] == [
        "info", "warning", "warning", "critical", "critical", "info"]


def test_once_in_reads_the_p_value_per_step():
    # One step in 1/p: with p = 1/1440 and 1-minute steps, once a day (arithmetic).
    assert once_in(1 / 1440, 60.0) == "once in 1 day"
    assert once_in(1 / (7 * 1440), 60.0) == "once in 1 week"
    assert once_in(300 / (365.25 * 86400), 300.0) == "once in 1 year"
    assert once_in(float("nan"), 60.0) == "of unknown rarity"
    assert once_in(0.0, 60.0) == "of unknown rarity"


def test_human_numbers():
    assert [human_number(x) for x in (53.912345678, 18.6, 0.30137545, 1e-7, 123456.7, float("nan"))] == [
        "53.9", "18.6", "0.301", "1e-07", "123,457", "n/a"]


def test_summary_in_the_rule_time_zone():
    e = BreachEvent(type=OPENED, series='orders{shop="a"}', metric="orders", labels={"shop": "a"},
                    rule="orders", step_start=1_717_405_200.0, step_end=1_717_405_500.0,
                    observed=18.87, expected=53.91, lower=45.0, upper=62.0, score=-6.0,
                    direction="below", width=3.0, weights={}, started=1_717_405_200.0,
                    p_value=300 / (91 * 86400), surprise=4.4)
    # 1717405200 is Monday 2024-06-03 09:00 UTC (checked with datetime below), 11:00 in Berlin.
    assert datetime.fromtimestamp(1_717_405_200, tz=UTC).strftime("%A %H:%M") == "Monday 09:00"
    assert summary(e, "Europe/Berlin") == ('orders{shop="a"} is 65 % below its usual 53.9 for '
                                           "Monday 11:00; unusual like once in 3 months")
    # an expected value near zero reads as levels, not an absurd percentage
    z = BreachEvent(**{**_fields(e), "expected": 0.001, "observed": 12.0, "direction": "above"})
    assert "is at 12, above its usual 0.001" in summary(z)


def _fields(e: BreachEvent) -> dict:
    return {k: getattr(e, k) for k in e.__slots__ if k != "id"}


# ---------------------------------------------------------------- templates

HOSTILE = ["{__class__}", "${x}", "{0.__init__}", "{rule.__globals__}", "%(x)s", "{{x}}", "{x!r}",
           "__import__('os').system('echo hi')", "\x00\u202e", "}{"]


@pytest.mark.parametrize("value", HOSTILE)
def test_templates_paste_hostile_label_values_as_text(value):
    t = Template.parse("shop={shop} rule={rule}")
    assert t.render({"shop": value, "rule": "r"}) == f"shop={value} rule=r"


def test_template_values_are_bounded_and_url_encoded():
    t = Template.parse("{a}|{b|url}")
    out = t.render({"a": "x" * 100_000, "b": "a b&c=/{}"})
    assert out.startswith("x" * (MAX_VALUE - 3) + "...|") and out.endswith("|a%20b%26c%3D%2F%7B%7D")
    many = Template.parse("{a}" * 50).render({"a": "y" * 500})
    assert len(many) == MAX_OUTPUT and many.endswith("...")
    assert Template.parse("{missing} ok").render({}) == " ok"


@pytest.mark.parametrize("text", ["{0.__init__}", "{__class__.__mro__}", "{a[0]}", "{a!r}", "{a:>10}",
                                  "{", "}", "{a|upper}", "{}", "${x", "{" + "a" * 100 + "}"])
def test_templates_refuse_anything_but_plain_names(text):
    with pytest.raises(TemplateError):
        Template.parse(text)


def test_routing_config_errors_name_the_key():
    with pytest.raises(ConfigError) as exc:
        parse_config({"rules": [{"name": "r", "labels": {"bad-name": "x", "severity": "high", "ok": ""},
                                 "annotations": {"runbook": "{x.y}", "fine": "{x}"},
                                 "severity": {"warning": 9, "critical": 3, "other": 1}}]})
    text = "\n".join(exc.value.problems)
    for key in ("rules[0].labels.bad-name", "rules[0].labels.severity", "rules[0].labels.ok",
                "rules[0].annotations.runbook", "rules[0].severity.critical", "rules[0].severity.other"):
        assert key in text
    assert "rules[0].annotations.fine" not in text


def test_default_routing_without_config():
    events = shifted_events()
    routed = route(events[0], None)
    assert routed.labels == {} and set(routed.annotations) == {"summary"}
    doc = orjson.loads(events[0].to_json())
    assert check_cloudevent(doc) == []
    assert doc["severity"] in ("info", "warning", "critical")
