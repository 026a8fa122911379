"""Event time per series: lagging producers, early points, backfill, late points, batching.

Values come from river's WaterFlow dataset (hourly flow readings shipped with river), laid out
here on 1-minute steps; the arrival orders are the scenarios of the tests. What the tests check
is the ordering contract -- a stream processor's result must not depend on how its input is
batched, and one series' clock must not make another series' points late (common practice in
event-time stream processing, no source).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from river import datasets

from streamdet.codecs import TimeRules
from streamdet.codecs.json import decode_json_messages
from streamdet.config import ConfigError, parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.core.steps import series_running_clock
from streamdet.replay import ReplayResult, format_summary

N = 480  # eight hours of 1-minute steps; WaterFlow opens and closes breaches within them
FLOW = np.array([float(v) for _x, v in itertools.islice(datasets.WaterFlow(), N)])
T0 = 1_650_000_000.0 - 1_650_000_000.0 % 60  # a minute boundary in April 2022
RULES = {"rules": [{"name": "flow", "warmup": "60 steps"}]}
AHEAD = 50 * 60.0


def series(key: str) -> tuple[np.ndarray, np.ndarray]:
    """Times (one point 13 s into every minute) and values of one series."""
    values = {"a": FLOW, "b": FLOW[::-1].copy(), "c": np.roll(FLOW, 150)}[key]
    return T0 + 60.0 * np.arange(N) + 13.0, values


def stream(*parts: tuple[str, float, float]) -> PointBatch:
    keys, t, v = zip(*parts, strict=True) if parts else ((), (), ())
    return PointBatch(list(keys), np.asarray(t, float), np.asarray(v, float),
                      {k: ("flow", (("site", k),)) for k in set(keys)})


def interleave(lags: dict[str, int]) -> list[tuple[str, float, float]]:
    """Arrival order of series arriving ``lags[key]`` minutes behind the live minute."""
    out = []
    for i in range(N + max(lags.values())):
        for key, lag in lags.items():
            j = i - lag
            if 0 <= j < N:
                t, v = series(key)
                out.append((key, t[j], v[j]))
    return out


def feed(points, cfg=RULES, chunk: int | None = None) -> tuple[Engine, list]:
    eng = Engine(parse_config(cfg))
    b = stream(*points)
    events = []
    size = chunk or max(len(b), 1)
    for lo in range(0, len(b), size):
        events += eng.ingest(b.take(np.arange(lo, min(lo + size, len(b)))))
    events += eng.finish()
    return eng, events


def alone(key: str, cfg=RULES) -> list:
    t, v = series(key)
    return feed([(key, ti, vi) for ti, vi in zip(t, v, strict=True)], cfg)[1]


def by_id(events) -> list:
    return sorted(events, key=lambda e: e.id)


def of(events, key: str) -> list:
    return by_id(e for e in events if e.labels["site"] == key)


@pytest.fixture(scope="module")
def solo():
    return {k: by_id(alone(k)) for k in "abc"}


def test_two_producers_six_minutes_apart_lose_nothing(solo):
    eng, events = feed(interleave({"a": 0, "b": 6}))
    assert eng.counters["points_late"] == 0
    assert eng.counters["points_accepted"] == 2 * N
    assert by_id(events) == by_id(solo["a"] + solo["b"])  # every field, not only the ids
    assert len(solo["a"]) >= 2 and len(solo["b"]) >= 2
    # The same stream under one clock per partition (grace equal to lateness, the old rule)
    # loses about half of b's points: the failure this guards against.
    old, _ = feed(interleave({"a": 0, "b": 6}), {"rules": [{**RULES["rules"][0], "grace": "0s"}]})
    assert old.counters["points_late"] > 0.9 * N


def test_a_point_fifty_minutes_ahead_costs_only_its_own_series(solo):
    points = interleave({"a": 0, "b": 0})
    at = 2 * 200  # after minute 199 of both series
    t_a = points[at - 2][1]
    points.insert(at, ("a", t_a + AHEAD, 99.0))  # within the default max_future (1 h): accepted
    eng = Engine(parse_config(RULES))
    b = stream(*points)
    events = eng.ingest(b.take(np.arange(at)))
    row_b = eng.table.index["b"]
    before = float(eng.table.last_seen[row_b])
    events += eng.ingest(b.take(np.array([at])))
    assert eng.table.last_seen[row_b] == before  # b's clock did not move
    assert eng.clock == t_a + AHEAD  # the partition's did
    events += eng.ingest(b.take(np.arange(at + 1, len(b)))) + eng.finish()
    assert of(events, "b") == solo["b"]
    # a's own points up to its early point's minute are late for a (counted, described, a only)
    assert eng.counters["points_late"] == eng.counters["points_late_series"] == 49
    assert eng.counters["points_late_grace"] == 0
    assert {d.key for d in eng.dropped} == {"a"}


def test_a_point_beyond_max_future_is_refused_and_moves_no_clock():
    rules = TimeRules(now=T0, max_future=3600)
    msgs = [b'{"metric": "flow", "labels": {"site": "b"}, "time": %d, "value": 1}' % (T0 - 30),
            b'{"metric": "flow", "labels": {"site": "a"}, "time": %d, "value": 1}' % (T0 + 7200)]
    batch, bad, records = decode_json_messages(msgs, lambda i: f"m{i}", rules=rules)
    assert records == 2 and len(batch) == 1 and [i for i, _ in bad] == [1]
    assert "in the future (more than max_future=3600 s)" in bad[0][1].errors[0].reason
    eng = Engine(parse_config(RULES))
    eng.ingest(batch)
    assert eng.clock == T0 - 30 and "a" not in eng.table.index


def test_backfilling_a_series_an_hour_behind_loses_nothing(solo):
    # c arrives an hour behind a and b throughout ...
    eng, events = feed(interleave({"a": 0, "b": 0, "c": 60}))
    assert eng.counters["points_late"] == 0
    assert of(events, "c") == solo["c"] and of(events, "a") == solo["a"]
    # ... or goes silent for an hour and then sends the hour in one burst.
    live = interleave({"a": 0, "b": 0})
    t, v = series("c")
    cut = 2 * 300  # live minute 300
    burst = [("c", t[j], v[j]) for j in range(240, 300)]
    head = [p for p in live[:cut]] + [("c", t[j], v[j]) for j in range(240)]
    head.sort(key=lambda p: p[1])  # c live until minute 240
    tail = [x for j in range(300, N) for x in (live[2 * j], live[2 * j + 1], ("c", t[j], v[j]))]
    eng, events = feed(head + burst + tail)
    assert eng.counters["points_late"] == 0
    assert of(events, "c") == solo["c"]


def test_late_points_are_counted_and_described():
    eng = Engine(parse_config({"rules": [{"name": "r", "grace": "1h"}]}))
    eng.ingest(stream(*[("s", T0 + 60.0 * i, 1.0) for i in range(10)]))
    eng.ingest(stream(("q", T0 + 5.0, 1.0)))
    eng.ingest(stream(("s", T0 + 150.0, 7.0)))  # s has moved on to minute 9: late for s
    assert eng.counters["points_late_series"] == 1 and eng.dropped_counts == {"late_series": 1}
    d = eng.dropped[0]
    assert (d.key, d.time, d.reason, d.behind, d.allowed) == ("s", T0 + 150, "late_series", 390.0, 0.0)
    assert "s: late point" in str(d) and "390 s behind its series' newest point" in str(d)
    # q is quiet; once the partition passes its step's end plus grace, that step is closed for q
    eng.ingest(stream(("s", T0 + 3660.0, 1.0), ("q", T0 + 30.0, 2.0)))
    assert eng.counters["points_late_grace"] == 1
    d = eng.dropped[0]
    assert (d.key, d.reason, d.behind, d.allowed) == ("q", "late_grace", 3630.0, 3600.0)
    assert "behind the partition's newest point" in str(d)
    summary = format_summary(ReplayResult(eng, [], [], 12, 0.0, dropped=[d]))
    assert "late: 2" in summary and "1 after their series had moved on, 1 after the partition's grace" \
        in summary and "q: late point" in summary


def mixed_stream() -> list[tuple[str, float, float]]:
    """Everything at once: a lagging producer, a backfill, an early point, jitter within
    lateness, and genuinely late points."""
    rng = np.random.default_rng(7)
    pts = interleave({"a": 0, "b": 6, "c": 60})
    pts.insert(700, ("a", pts[698][1] + AHEAD, 5.0))
    pts = [(k, t + rng.uniform(-20, 20), v) for k, t, v in pts]  # jitter across step ends
    pts.insert(300, ("b", T0 + 10.0, 3.0))  # long closed for b
    pts.insert(900, ("x", T0, 1.0))  # a new series far behind the partition
    return pts


@pytest.mark.parametrize("chunk", [1, 7])
def test_batching_does_not_change_events_or_counts(chunk):
    cfg = {"rules": [{"name": "b", "match": {"labels": {"site": "b"}}, "warmup": "60 steps",
                      "grace": "30m"},  # a second rule: grace per row
                     {"name": "flow", "warmup": "60 steps", "lateness": "30s", "grace": "70m"}]}
    whole_eng, whole = feed(mixed_stream(), cfg)
    eng, parts = feed(mixed_stream(), cfg, chunk=chunk)
    assert by_id(parts) == by_id(whole)  # same events, every field
    assert eng.counters == whole_eng.counters
    assert whole_eng.counters["points_late_series"] > 0 and whole_eng.counters["points_late_grace"] > 0
    assert len(whole) >= 6


def test_impossible_times_are_dropped_counted_and_move_no_clock():
    eng = Engine(parse_config(RULES))
    eng.ingest(stream(("a", T0, 1.0)))
    bad = [math.nan, math.inf, -math.inf, 1e300, -1e300, 1e12]  # 1e12 s is the year 33658
    pts = [("a", T0 + 60, 2.0)] + [(f"z{i}", t, 1.0) for i, t in enumerate(bad)]
    pts += [("a", 5.0, 1.0), ("y", 5.0, 1.0), ("a", T0 + 120, 3.0)]  # 1970: far in the past
    eng.ingest(stream(*pts))
    c = eng.counters
    assert c["points_bad_time"] == 6 and c["points_accepted"] == 3
    assert c["points_late_series"] == 1 and c["points_late_grace"] == 1  # a has moved on; y is new
    assert eng.clock == T0 + 120
    assert [d.reason for d in eng.dropped] == ["bad_time"] * 6 + ["late_series", "late_grace"]
    assert str(eng.dropped[0]) == "z0: time nan is not a finite number within the years 1 to 9999"
    assert all(f"z{i}" not in eng.table.index for i in range(6))  # no series created for them
    assert eng.advance(math.nan) == [] and eng.clock == T0 + 120
    # a batch of nothing but impossible times
    assert eng.ingest(stream(("a", math.nan, 1.0))) == [] and eng.counters["points_bad_time"] == 7
    # through the JSON codec the same records are refused with a reason each
    msgs = [b'{"metric": "m", "time": 1e400, "value": 1}', b'{"metric": "m", "time": "NaN", "value": 1}',
            b'{"metric": "m", "time": -1e300, "value": 1}', b'{"metric": "m", "time": 1e30, "value": 1}']
    batch, bad_msgs, _ = decode_json_messages(msgs, lambda i: f"m{i}")
    assert len(batch) == 0 and len(bad_msgs) == 4


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 4), st.integers(-5, 5)), max_size=40),
       st.lists(st.integers(-9, 9), min_size=5, max_size=5))
def test_series_running_clock_matches_a_plain_loop(points, start):
    rows = np.array([r for r, _ in points], np.int64)
    t = np.array([float(x) for _, x in points])
    clock = [float(s) for s in start]
    want = []
    for r, x in zip(rows.tolist(), t.tolist(), strict=True):
        want.append(clock[r])
        clock[r] = max(clock[r], x)
    before = np.array([float(start[r]) for r in rows.tolist()])
    assert series_running_clock(before, rows, t).tolist() == want


def test_grace_config():
    assert parse_config({"rules": [{"grace": "10m"}]}).rules[0].grace == 600.0
    assert parse_config({}).rules[0].grace == 7200.0
    with pytest.raises(ConfigError) as err:
        parse_config({"rules": [{"lateness": "30s", "grace": "10s"}, {"grace": "soon"}]})
    assert "rules[0].grace: must be at least lateness (30 s), got 10 s" in err.value.problems
    assert any(p.startswith("rules[1].grace: expected a duration") for p in err.value.problems)
