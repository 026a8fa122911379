"""Steps: aggregation, lateness, counters to rates, gaps, and independence from batching."""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamdet.config import parse_config
from streamdet.core.engine import Engine, infer_step
from tests.helpers import batch, run, step_log


def closed_values(eng, key="s"):
    log = step_log(eng, key)
    return log["start"].tolist(), log["observed"].tolist()


@pytest.mark.parametrize("agg,expected", [("mean", 2.0), ("sum", 6.0), ("min", 1.0), ("max", 3.0),
                                          ("last", 3.0), ("count", 3.0)])
def test_aggregations(agg, expected):
    # Three points in step [0, 60): 1, 2, 3 (the last one arrives last); then one in the next step.
    eng, _ = run({"rules": [{"name": "r", "aggregation": agg}]}, "s", [1, 20, 59, 61], [1, 2, 3, 9])
    starts, values = closed_values(eng)
    assert starts[0] == 0.0 and values[0] == expected


def test_last_is_by_time_not_arrival():
    eng, _ = run({"rules": [{"name": "r", "aggregation": "last", "lateness": "30s"}]}, "s",
                 [50, 10, 70], [5, 1, 7])
    assert closed_values(eng)[1][0] == 5.0


def test_step_closes_when_its_series_moves_on_or_the_partition_passes_grace():
    # Event time is per series: another series' newer point does not close a's step; the
    # partition's event time closes it only once past its end plus grace (default 2 h).
    eng = Engine(parse_config({"rules": [{"name": "r"}]}), record_steps=True)
    eng.ingest(batch("a", [0, 30], [1, 3]))
    assert eng.counters["steps_closed"] == 0
    eng.ingest(batch("b", [65], [0]))
    assert eng.counters["steps_closed"] == 0
    eng.ingest(batch("b", [60 + 7199], [0]))  # b's own step 0 closes; a's is within grace
    assert eng.counters["steps_closed"] == 1 and closed_values(eng, "a") == ([], [])
    eng.ingest(batch("b", [60 + 7200], [0]))  # the partition passes a's step end + grace
    assert closed_values(eng, "a") == ([0.0], [2.0])
    eng.ingest(batch("a", [40], [5]))  # that step has closed for a now: late
    assert eng.counters["points_late"] == eng.counters["points_late_grace"] == 1


def test_lateness_merges_recent_points_and_drops_older_ones():
    cfg = {"rules": [{"name": "r", "lateness": "20s"}]}
    eng = Engine(parse_config(cfg), record_steps=True)
    eng.ingest(batch("s", [10, 70], [1, 5]))  # clock 70 < 60 + 20: step 0 still open
    eng.ingest(batch("s", [50], [3]))  # late but within lateness: merges into step 0
    eng.ingest(batch("s", [85], [5]))  # clock 85 >= 80: step 0 closes
    eng.ingest(batch("s", [40], [100]))  # too late: dropped and counted
    assert eng.counters["points_late"] == 1
    assert closed_values(eng)[1] == [2.0]


def test_gaps_are_allowed():
    t = np.concatenate([np.arange(0, 600, 60), np.arange(6000, 6600, 60)])
    eng, _ = run({"rules": [{"name": "r"}]}, "s", t, np.ones(len(t)))
    starts, _ = closed_values(eng)
    assert len(starts) == 20 and 600 not in starts


def test_counter_rates_and_resets():
    # Counter samples every 60 s increasing by 120 (2/s), reset to 0 then 60 (1/s after the reset).
    t = [0, 60, 120, 180, 240]
    v = [1000, 1120, 1240, 60, 180]
    eng, _ = run({"rules": [{"name": "r", "kind": "counter"}]}, "s", t, v)
    starts, values = closed_values(eng)
    assert starts == [60.0, 120.0, 180.0, 240.0]
    assert values == [2.0, 2.0, 1.0, 2.0]  # the reset's increase is the new value (60 in 60 s)
    assert eng.counters["counter_samples_first"] == 1


def test_auto_step_inference():
    assert infer_step([0, 3600, 7201, 10800]) == 3600.0
    assert infer_step([0, 0]) is None
    t = np.arange(0, 300 * 30, 300.0)
    eng, _ = run({"rules": [{"name": "r", "step": "auto"}]}, "s", t, np.arange(len(t)))
    assert eng.table.step[eng.table.index["s"]] == 300.0
    assert len(closed_values(eng)[0]) == len(t)


@settings(max_examples=30, deadline=None)
@given(cuts=st.lists(st.integers(1, 399), max_size=6), seed=st.integers(0, 1000))
def test_events_do_not_depend_on_batching(cuts, seed):
    # Common practice (no source): a stream processor's output must not depend on how input is
    # chunked. Two series, jittered times, a level shift to trigger events.
    rng = np.random.default_rng(seed)
    n = 400
    t = np.repeat(np.arange(n // 2) * 60.0, 2) + rng.uniform(0, 59, n)
    keys = ["a", "b"] * (n // 2)
    y = rng.normal(size=n) + np.where(np.arange(n) > 300, 12.0, 0.0)
    cfg = {"rules": [{"name": "r", "warmup": "20 steps", "lateness": "30s"}]}
    _, whole = run(cfg, keys, t, y, record=False)
    eng = Engine(parse_config(cfg))
    b = batch(keys, t, y)
    parts = []
    bounds = [0, *sorted(set(cuts)), n]
    for lo, hi in itertools.pairwise(bounds):
        parts += eng.ingest(b.take(np.arange(lo, hi)))
    parts += eng.finish()
    assert sorted(e.id for e in parts) == sorted(e.id for e in whole)
    assert len(whole) >= 2


def test_advance_closes_steps_of_quiet_series():
    # Event time can be moved on without points (an input known to be idle up to a time).
    # Without points of its own a series' step closes when event time passes its end + grace.
    eng = Engine(parse_config({"rules": [{"name": "r", "grace": "10m"}]}), record_steps=True)
    eng.ingest(batch("s", [10, 20], [1, 3]))
    assert eng.counters["steps_closed"] == 0
    assert eng.advance(659) == [] and eng.counters["steps_closed"] == 0  # not past end + grace
    eng.advance(660)
    assert closed_values(eng) == ([0.0], [2.0])
    assert eng.advance(10) == []  # time never goes back
