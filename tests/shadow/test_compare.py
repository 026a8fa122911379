"""Classification of hand-built alert and breach intervals: every case with its expected class.

The rules under test are the ones the module states (meet within slack, incidents as connected
groups); the expected classes are worked out by hand beside each case.
"""

from __future__ import annotations

import pytest

from streamdet.shadow.compare import (
    BOTH,
    ONLY_OURS,
    ONLY_THEIRS,
    Interval,
    Tally,
    compare_series,
    meet,
    union_seconds,
)

M = 60.0
H = 3600.0
DAY = 86400.0


def kinds(theirs, ours, slack=15 * M, horizon=DAY):
    c = compare_series(theirs, ours, slack=slack, horizon=horizon)
    return [(i.kind, len(i.theirs), len(i.ours), i.lead) for i in c.incidents], c.tally


def test_overlap_is_both_with_lead_time():
    got, tally = kinds([Interval(10 * M, 40 * M)], [Interval(12 * M, 30 * M)])
    assert got == [(BOTH, 1, 1, 2 * M)]  # streamdet 2 minutes later: positive lead
    assert tally.both == 1 and tally.only_theirs == 0 and tally.only_ours == 0
    assert tally.leads == [120.0]


def test_streamdet_earlier_gives_negative_lead():
    got, _ = kinds([Interval(10 * M, 40 * M)], [Interval(4 * M, 20 * M)])
    assert got == [(BOTH, 1, 1, -6 * M)]


def test_touching_edges_meet_even_without_slack():
    got, _ = kinds([Interval(0, 10 * M)], [Interval(10 * M, 20 * M)], slack=0.0)
    assert got == [(BOTH, 1, 1, 10 * M)]


def test_gap_just_over_zero_slack_is_two_incidents():
    got, _ = kinds([Interval(0, 10 * M)], [Interval(10 * M + 1, 20 * M)], slack=0.0)
    assert got == [(ONLY_THEIRS, 1, 0, None), (ONLY_OURS, 0, 1, None)]


def test_slack_bridges_a_gap_up_to_its_length_and_not_beyond():
    # a gap of 14 minutes is within 15 minutes of slack ...
    got, _ = kinds([Interval(0, 10 * M)], [Interval(24 * M, 30 * M)])
    assert got == [(BOTH, 1, 1, 24 * M)]
    # ... a gap of exactly 15 minutes still meets (edges included) ...
    got, _ = kinds([Interval(0, 10 * M)], [Interval(25 * M, 30 * M)])
    assert got[0][0] == BOTH
    # ... and one of 16 minutes does not
    got, _ = kinds([Interval(0, 10 * M)], [Interval(26 * M, 30 * M)])
    assert [g[0] for g in got] == [ONLY_THEIRS, ONLY_OURS]


def test_slack_works_on_the_other_side_too():
    # streamdet's breach ended 10 minutes before their alert started: both, with lead -20 min
    got, _ = kinds([Interval(30 * M, 50 * M)], [Interval(10 * M, 20 * M)])
    assert got == [(BOTH, 1, 1, -20 * M)]


def test_open_ended_alert_reaches_to_the_horizon():
    their = Interval(1 * H, None, "DiskLatency")  # still firing
    got, tally = kinds([their], [Interval(5 * H, 6 * H)], horizon=8 * H)
    assert got == [(BOTH, 1, 1, 4 * H)]
    assert tally.theirs_minutes == pytest.approx(7 * 60)  # 1 h .. horizon 8 h
    assert tally.ours_minutes == pytest.approx(60)


def test_open_ended_breach_before_the_horizon_meets_nothing_later():
    got, tally = kinds([Interval(9 * H, 10 * H)], [Interval(5 * H, None)], horizon=6 * H)
    assert [g[0] for g in got] == [ONLY_OURS, ONLY_THEIRS]
    assert tally.ours_minutes == pytest.approx(60)


def test_one_alert_spanning_two_breaches_is_one_incident():
    got, tally = kinds([Interval(0, 4 * H)], [Interval(1 * H, 1.5 * H), Interval(3 * H, 3.5 * H)])
    assert got == [(BOTH, 1, 2, 1 * H)]
    assert (tally.both, tally.only_theirs, tally.only_ours) == (1, 0, 0)
    assert tally.ours_minutes == pytest.approx(60)


def test_one_breach_spanning_two_alerts_is_one_incident():
    got, tally = kinds([Interval(1 * H, 1.5 * H), Interval(3 * H, 3.5 * H)], [Interval(0, 4 * H)])
    assert got == [(BOTH, 2, 1, -1 * H)]
    assert tally.theirs_minutes == pytest.approx(60)


def test_chain_through_slack_joins_three_intervals():
    # theirs 0-10, ours 20-30 (gap 10 <= 15), theirs 40-50 (gap 10): one incident
    got, _ = kinds([Interval(0, 10 * M), Interval(40 * M, 50 * M)], [Interval(20 * M, 30 * M)])
    assert got == [(BOTH, 2, 1, 20 * M)]


def test_lone_alerts_and_breaches_each_count_once():
    theirs = [Interval(0, 10 * M), Interval(5 * H, 5 * H + 10 * M)]
    ours = [Interval(10 * H, 10 * H + 5 * M), Interval(12 * H, 12 * H + 5 * M)]
    _, tally = kinds(theirs, ours)
    assert (tally.both, tally.only_theirs, tally.only_ours) == (0, 2, 2)
    assert tally.theirs_minutes == pytest.approx(20) and tally.ours_minutes == pytest.approx(10)
    assert tally.median_lead is None


def test_nothing_on_either_side():
    got, tally = kinds([], [])
    assert got == [] and tally.to_dict()["both"] == 0


def test_median_lead_over_several_incidents():
    theirs = [Interval(0, 10 * M), Interval(5 * H, 5 * H + 10 * M), Interval(10 * H, 10 * H + 10 * M)]
    ours = [Interval(-5 * M, 5 * M), Interval(5 * H + 3 * M, 5 * H + 20 * M), Interval(10 * H + 8 * M, 11 * H)]
    _, tally = kinds(theirs, ours)
    assert sorted(tally.leads) == [-300.0, 180.0, 480.0]
    assert tally.median_lead == 180.0
    total = Tally()
    total.add(tally)
    total.add(tally)
    assert total.both == 6 and total.median_lead == 180.0


def test_bad_intervals_are_refused():
    with pytest.raises(ValueError, match="before its start"):
        Interval(10.0, 5.0)
    with pytest.raises(ValueError, match="finite"):
        Interval(float("nan"), 5.0)
    with pytest.raises(ValueError, match="slack"):
        compare_series([], [], slack=-1.0, horizon=0.0)


def test_meet_and_union_helpers():
    assert meet(Interval(0, 10), Interval(20, 30), 10.0, 100.0)
    assert not meet(Interval(0, 10), Interval(21, 30), 10.0, 100.0)
    assert union_seconds([Interval(0, None)], 50.0) == 50.0
    assert union_seconds([Interval(100, None)], 50.0) == 0.0  # horizon before the start
