"""Engine state: snapshots, series caps and idle eviction, rule selection."""

import numpy as np
import pytest

from streamdet.config import parse_config
from streamdet.core.engine import Engine, SnapshotError
from tests.helpers import batch

CFG = {"rules": [{"name": "r", "warmup": "30 steps"}]}


def stream(n=900, seed=2):
    rng = np.random.default_rng(seed)
    t = np.repeat(np.arange(n) * 60.0 + 1.7e9, 3)
    keys = ["a", "b", "c"] * n
    y = rng.normal(0, 1, 3 * n) + np.where(np.arange(3 * n) > 2000, 9.0, 0.0)
    return keys, t, y


def test_snapshot_restore_gives_the_same_events_as_an_uninterrupted_run():
    keys, t, y = stream()
    whole = Engine(parse_config(CFG))
    b = batch(keys, t, y)
    expected = whole.ingest(b) + whole.finish()
    first = Engine(parse_config(CFG))
    cut = 1234
    got = first.ingest(b.take(np.arange(cut)))
    blob = first.snapshot()
    second = Engine.restore(parse_config(CFG), blob)
    got += second.ingest(b.take(np.arange(cut, len(b)))) + second.finish()
    assert [e.id for e in got] == [e.id for e in expected]
    assert [e.to_json() for e in got] == [e.to_json() for e in expected]
    assert len(expected) >= 3


def test_damaged_snapshots_are_refused_with_a_reason():
    eng = Engine(parse_config(CFG))
    eng.ingest(batch(*stream(50)))
    blob = eng.snapshot()
    with pytest.raises(SnapshotError, match="checksum"):
        Engine.restore(parse_config(CFG), blob[:-10])
    with pytest.raises(SnapshotError, match="bad magic"):
        Engine.restore(parse_config(CFG), b"nonsense")
    with pytest.raises(SnapshotError, match="lag_resolution"):
        Engine.restore(parse_config({**CFG, "engine": {"lag_resolution": "1h"}}), blob)


def test_max_series_cap_is_counted():
    eng = Engine(parse_config({"series": {"max_series": 2}}))
    eng.ingest(batch(["a", "b", "c", "c", "a"], [0, 0, 0, 1, 1], [1, 1, 1, 1, 1]))
    assert eng.stats()["series_active"] == 2
    assert eng.counters["points_series_limit"] == 2


def test_idle_series_are_evicted_and_counted_and_rows_reused():
    eng = Engine(parse_config({"series": {"idle_ttl": "1h"}}))
    eng.ingest(batch(["old", "new"], [0, 0], [1, 1]))
    eng.ingest(batch(["new"] * 100, np.arange(1, 101) * 60.0, np.ones(100)))
    assert eng.counters["series_evicted"] == 1
    assert "old" not in eng.table.index
    eng.ingest(batch(["fresh"], [6100], [1]))
    assert eng.table.index["fresh"] == 0  # the freed row was reused


def test_series_no_rule_selects_are_ignored_and_counted():
    eng = Engine(parse_config({"rules": [{"name": "only-cpu", "match": {"metric": "cpu*"}}]}))
    eng.ingest(batch(["cpu_load", "disk_free", "disk_free"], [0, 0, 60], [1, 2, 3]))
    assert eng.counters["points_no_rule"] == 2 and eng.stats()["series_active"] == 1


def test_direction_filter():
    rng = np.random.default_rng(1)
    t = np.arange(400) * 60.0
    y = rng.normal(0, 1, 400) + np.where(t >= 300 * 60, -10.0, 0.0)
    for direction, expect in (("above", 0), ("below", 1), ("both", 1)):
        eng = Engine(parse_config({"rules": [{"name": "r", "direction": direction, "warmup": "50 steps"}]}))
        events = eng.ingest(batch("m", t, y)) + eng.finish()
        assert sum(e.type.endswith("opened") for e in events) == expect, direction


def test_learning_series_produce_no_events():
    t = np.arange(100) * 60.0
    y = np.where(t > 3000, 100.0, 1.0)
    eng = Engine(parse_config({"rules": [{"name": "r", "warmup": "1d"}]}))
    assert eng.ingest(batch("m", t, y)) + eng.finish() == []
    assert eng.stats()["series_learning"] == 1 and eng.is_learning("m")


def test_evicting_a_series_with_an_open_breach_closes_it():
    t = np.arange(200) * 60.0
    y = np.where(t >= 150 * 60, 50.0, 1.0 + np.sin(t))
    eng = Engine(parse_config({"rules": [{"name": "r", "warmup": "50 steps", "relearn_after": "1d"}],
                               "series": {"idle_ttl": "1h"}}))
    events = eng.ingest(batch("m", t, y))
    assert [e.type for e in events] == ["streamdet.breach.opened"]
    later = eng.ingest(batch("other", [t[-1] + 4 * 3600], [1.0]))  # event time moves on; "m" is idle
    assert [(e.type, e.reason) for e in later] == [("streamdet.breach.closed", "series went quiet")]
    assert later[0].opened_id == events[0].id and eng.counters["series_evicted"] == 1
