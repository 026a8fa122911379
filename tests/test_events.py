"""Events: CloudEvents 1.0 structured mode, deterministic ids, documented data fields."""

import numpy as np
import orjson
import pytest

from streamdet.events import CLOSED, OPENED, BreachEvent, parse_cloudevent
from tests.helpers import run

# CloudEvents 1.0 core spec: required attributes id, source, specversion, type; optional
# subject, time (RFC 3339), datacontenttype. Reproduced from memory of the spec text.
REQUIRED = {"id", "source", "specversion", "type"}
DATA_FIELDS = {"metric", "labels", "rule", "step_start", "step_end", "observed", "expected", "lower",
               "upper", "score", "direction", "width", "weights", "started"}


def shifted_series():
    rng = np.random.default_rng(5)
    t = np.arange(600) * 60.0 + 1.7e9
    y = 10 + rng.normal(0, 1, 600) + np.where((t >= t[300]) & (t < t[320]), 15.0, 0.0)
    return t, y


def test_opened_and_closed_events_are_valid_cloudevents():
    t, y = shifted_series()
    _, events = run({"rules": [{"name": "r", "warmup": "60 steps"}]}, "svc_latency", t, y)
    assert [e.type for e in events] == [OPENED, CLOSED]
    opened, closed = (orjson.loads(e.to_json()) for e in events)
    for doc in (opened, closed):
        assert doc.keys() >= REQUIRED
        assert doc["specversion"] == "1.0" and doc["datacontenttype"] == "application/json"
        assert doc["subject"] == "svc_latency"
        assert doc["time"].endswith("Z")
        assert doc["data"].keys() >= DATA_FIELDS
        parse_cloudevent(doc)
    assert opened["data"]["direction"] == "above" and opened["data"]["score"] > 3
    assert opened["data"]["lower"] < opened["data"]["expected"] < opened["data"]["upper"]
    assert abs(sum(opened["data"]["weights"].values()) - 1) < 1e-3
    assert closed["data"]["opened_id"] == opened["id"]
    assert 15 * 60 <= closed["data"]["duration_seconds"] <= 25 * 60
    assert closed["data"]["worst_score"] > 3
    # The event time is the end of the deciding step (data time): 3 of 5 steps after the jump.
    assert opened["time"] == opened["data"]["step_end"]


def test_ids_are_deterministic():
    t, y = shifted_series()
    _, a = run({"rules": [{"name": "r", "warmup": "60 steps"}]}, "m", t, y)
    _, b = run({"rules": [{"name": "r", "warmup": "60 steps"}]}, "m", t, y, chunk=37)
    assert [e.id for e in a] == [e.id for e in b]
    assert len({e.id for e in a}) == len(a)


def test_event_validation():
    base = dict(series="m", metric="m", labels={}, rule="r", step_start=0.0, step_end=60.0, observed=1.0,
                expected=0.0, lower=-1, upper=1, score=3.0, direction="above", width=3.0, weights={},
                started=0.0)
    with pytest.raises(ValueError, match="event type"):
        BreachEvent(type="opened", **base)
    with pytest.raises(ValueError, match="needs duration"):
        BreachEvent(type=CLOSED, **base)
    with pytest.raises(ValueError, match="specversion"):
        parse_cloudevent(b'{"specversion": "0.3", "id": "x", "source": "s", "type": "t"}')
