"""Silences and maintenance windows in the core (streamdet/core/mutes.py, Engine._judge_muted).

Fictional scenario of our own: a shop's services (checkout, search) send one gauge a minute;
a planned database migration takes checkout down for an hour. Expected behaviour is the
feature's own contract (README, "Silences and maintenance windows"), not an outside source.
"""

from __future__ import annotations

import numpy as np
import pytest
import yaml

from streamdet.config import ConfigError, parse_config
from streamdet.core.engine import Engine, SnapshotError, encode_snapshot
from streamdet.core.mutes import MAX_MUTES, MuteError, Mutes, parse_mute
from streamdet.core.points import PointBatch

T0 = 1_700_000_040.0  # a multiple of 60 s: every batch holds one step of every series
STEP = 60.0
LABELS = {"co": ("latency", (("service", "checkout"), ("zone", "a"))),
          "se": ("latency", (("service", "search"), ("zone", "a"))),
          "db": ("queries", (("service", "checkout"), ("zone", "b")))}
RULES = [{"name": "r", "step": "60s", "warmup": "30 steps"}]
W0, W1 = 300, 360  # the maintenance window, in steps


def series(n=500, outage=(W0, W1), after=0.0, keys=("co", "se"), seed=3):
    """Per key: noise around 100; 0 during the outage; ``after`` added from the outage's start on."""
    rng = np.random.default_rng(seed)
    s = np.arange(n)
    out = {}
    for key in keys:
        y = 100.0 + rng.normal(0, 1, n) + np.where(s >= outage[0], after, 0.0)
        y = np.where((s >= outage[0]) & (s < outage[1]), 0.0, y)
        out[key] = y
    return out


def feed(eng: Engine, ys: dict, skip=None, lo=0, hi=None):
    """One batch per step (all series); steps in ``skip`` (a range) are not sent at all."""
    events = []
    n = len(next(iter(ys.values())))
    for i in range(lo, n if hi is None else hi):
        if skip is not None and i in skip:
            continue
        keys = list(ys)
        t = np.full(len(keys), T0 + i * STEP + 1.0)
        y = np.array([ys[k][i] for k in keys])
        events += eng.ingest(PointBatch(keys, t, y, {k: LABELS[k] for k in keys}))
    return events


def mute(learn=False, start=W0, end=W1, labels=None, mid="m1", **kw):
    return {"id": mid, "match": {"labels": labels or {"service": "checkout"}, **kw},
            "start": T0 + start * STEP, "end": T0 + end * STEP, "learn": learn}


def engine(*mutes):
    return Engine(parse_config({"rules": RULES, "mutes": list(mutes)}))


def opened(events, key):
    return [e for e in events if e.series == key and e.type.endswith("opened")]


def test_the_outage_opens_a_breach_without_a_mute():
    ys = series()
    events = feed(engine(), ys)
    assert opened(events, "co") and opened(events, "se")


def test_muted_steps_raise_no_events_and_others_are_untouched():
    ys = series()
    eng = engine(mute())
    events = feed(eng, ys)
    assert not [e for e in events if e.series == "co"]
    assert opened(events, "se")  # search is not selected by the mute
    assert eng.counters["steps_muted"] == W1 - W0


def test_learn_false_leaves_the_state_as_if_the_steps_never_arrived():
    ys = series()
    muted = engine(mute())
    feed(muted, ys)
    unseen = engine()
    feed(unseen, {"co": ys["co"]}, skip=range(W0, W1))
    row_a, row_b = muted.table.index["co"], unseen.table.index["co"]
    compared = 0
    for part_a, part_b in zip(muted.parts, unseen.parts, strict=True):
        cols_b = part_b.state_views(unseen.table.n)
        for name, col_a in part_a.state_views(muted.table.n).items():
            assert np.array_equal(col_a[row_a], cols_b[name][row_b], equal_nan=True), name
            compared += 1
    assert compared > 30


def test_learn_true_teaches_the_new_level_learn_false_does_not():
    # the migration moves checkout's level from 100 to 130 for good
    ys = series(n=520, after=30.0, keys=("co",))
    ys["co"][W0:W1] = 130.0 + np.random.default_rng(9).normal(0, 1, W1 - W0)
    taught, kept = engine(mute(learn=True)), engine(mute(learn=False))
    ev_taught, ev_kept = feed(taught, ys, hi=W1), feed(kept, ys, hi=W1)
    row = taught.table.index["co"]
    assert abs(taught.judge.forecasters[0].level[row] - 130) < 3  # Holt's level moved
    assert abs(kept.judge.forecasters[0].level[row] - 100) < 3  # not taught: still near 100
    ev_taught += feed(taught, ys, lo=W1)
    ev_kept += feed(kept, ys, lo=W1)
    assert not opened(ev_taught, "co")  # learned the new level while muted
    after = opened(ev_kept, "co")
    assert after and after[0].step_start >= T0 + W1 * STEP  # opens once the window is over


def test_a_breach_open_before_the_mute_can_close_during_it_and_none_opens():
    ys = series(n=500, outage=(W0, W1), keys=("co",))
    ys["co"][W0 - 20:W0] = 0.0  # the outage started 20 steps before the window was declared
    eng = engine(mute())
    events = feed(eng, ys, hi=W0)
    assert len(opened(events, "co")) == 1
    ys["co"][W0 + 10:W1] = 100.0  # back during the window; then down again, still muted
    ys["co"][W0 + 40:W1] = 0.0
    events = feed(eng, ys, lo=W0, hi=W1)
    assert [e.type.rsplit(".", 1)[1] for e in events] == ["closed"]
    assert not opened(events, "co")


def test_matchers_metric_glob_not_regex_and_missing_labels():
    m = parse_mute(mute(labels={"service": "check*", "zone": {"not": "b"}}))
    assert m.selects("latency", dict(LABELS["co"][1]))
    assert not m.selects("latency", dict(LABELS["db"][1]))  # zone b
    assert not m.selects("latency", {"zone": "a"})  # no service label: a glob does not match
    r = parse_mute(mute(labels={"service": {"regex": "se[a-z]+h"}}, metric="lat*"))
    assert r.selects("latency", {"service": "search"}) and not r.selects("queries", {"service": "search"})
    n = parse_mute(mute(labels={"service": {"not_regex": "check.*"}}))
    assert n.selects("x", {"service": "search"}) and n.selects("x", {})  # negation of no value


def test_the_match_cache_follows_changes_of_the_mute_set():
    ys = series(keys=("co", "se"))
    eng = engine()
    feed(eng, ys, hi=W0)
    eng.mutes.add(parse_mute(mute(labels={"service": "search"})))
    events = feed(eng, ys, lo=W0, hi=W0 + 5)
    eng.mutes.remove("m1")
    eng.mutes.add(parse_mute(mute(mid="m2")))  # now checkout instead
    events += feed(eng, ys, lo=W0 + 5)
    # checkout's outage began before its mute was posted: it may open in those 5 steps only
    assert all(e.step_start < T0 + (W0 + 5) * STEP for e in opened(events, "co"))
    # a step is muted by the mutes known when it closes: step W0+4 closed after the swap
    assert opened(events, "se") and opened(events, "se")[0].step_start >= T0 + (W0 + 4) * STEP
    assert eng.counters["steps_muted"] == 4 + (W1 - W0 - 4)  # search 300..303, checkout 304..359


def test_api_mutes_survive_a_snapshot_and_config_mutes_come_from_the_config():
    ys = series()
    eng = engine(mute(mid="planned", start=0, end=10_000))
    feed(eng, ys, hi=W0)
    eng.mutes.add(parse_mute(mute(mid="adhoc", labels={"service": "search"})))
    blob = eng.snapshot()
    back = Engine.restore(parse_config({"rules": RULES}), blob)  # the planned one left the config
    assert sorted(back.mutes.entries) == ["adhoc"]
    events = feed(back, ys, lo=W0)
    assert not opened(events, "se")
    assert opened(events, "co")
    # a damaged mute in the header is refused with a reason
    bad = eng.snapshot_parts()
    bad.header["mutes"] = [{"id": "x", "start": "soon"}]
    with pytest.raises(SnapshotError, match="bad mute"):
        Engine.restore(parse_config({"rules": RULES}), encode_snapshot(bad))


def test_mutes_expire_by_data_time():
    eng = engine(mute())
    ys = series(n=W1 + 200)
    feed(eng, ys, hi=W1 + 2)
    assert "m1" in eng.mutes.entries  # grace (2 h) has not passed since the end
    feed(eng, ys, lo=W1 + 2)
    assert "m1" not in eng.mutes.entries and eng.mutes_expired == ["m1"]
    assert eng.counters["mutes_expired"] == 1


def test_finish_does_not_expire_mutes():
    eng = engine(mute())
    feed(eng, series(n=W0 + 2))
    eng.finish()
    assert "m1" in eng.mutes.entries


def test_peer_groups_leave_muted_members_out():
    rules = [{"name": "web", "step": "60s", "warmup": "30 steps",
              "peers": {"group_by": ["zone"], "min_members": 3}}]
    rng = np.random.default_rng(4)
    keys = [f"w{i}" for i in range(6)]
    labels = {k: ("latency", (("host", k), ("zone", "a"))) for k in keys}

    def run(mutes):
        eng = Engine(parse_config({"rules": rules, "mutes": mutes}))
        events = []
        for s in range(200):
            y = 100.0 + rng.normal(0, 1, 6)
            if s >= 100:
                y[0] = 160.0  # w0 drifts away from its peers
            events += eng.ingest(PointBatch(keys, np.full(6, T0 + s * STEP + 1), y, labels))
        return eng, [e for e in events if "outlier" in e.type]

    _eng, plain = run([])
    assert [e.series for e in plain if e.type.endswith("opened")][:1] == ["w0"]
    eng, muted = run([{"match": {"labels": {"host": "w0"}}, "start": T0, "end": T0 + 1e6}])
    assert not muted
    assert eng.counters["peer_members_judged"] < _eng.counters["peer_members_judged"]


def test_no_mute_covering_the_wave_costs_no_matching():
    eng = engine(mute(start=10_000, end=10_100))
    feed(eng, series(n=40))
    assert eng.counters["steps_muted"] == 0
    assert eng._mute_cols == {}  # no wave fell in the window: nothing was matched


@pytest.mark.parametrize(("raw", "why"), [
    ({"match": {"labels": {"service": "a"}}, "start": 10, "end": 5}, r"mutes\[0\]\.end: must be after"),
    ({"match": {"labels": {"service": "a"}}, "start": "2024-05-01T22:00:00", "end": 5},
     r"mutes\[0\]\.start: give a UTC offset"),
    ({"match": {"labels": {"service": "a"}}, "start": "tomorrow", "end": 5}, r"not an RFC 3339"),
    ({"match": {"labels": {"service": "a"}}, "start": float("nan"), "end": 5}, r"out of range"),
    ({"match": {"labels": {"service": "a"}}, "start": True, "end": 5}, r"start: expected epoch"),
    ({"match": {}, "start": 1, "end": 5}, r"mutes\[0\]\.match: selects every series"),
    ({"start": 1, "end": 5}, r"mutes\[0\]\.match: required"),
    ({"match": {"labels": {"s": {"regex": "(a+)+$"}}}, "start": 1, "end": 5}, r"labels\.s: regular"),
    ({"match": {"labels": {"s": {"regex": "(a)\\1"}}}, "start": 1, "end": 5}, r"labels\.s: regular"),
    ({"match": {"labels": {"s": {"regex": "(?=a)a"}}}, "start": 1, "end": 5}, r"labels\.s: regular"),
    ({"match": {"labels": {"s": {"regex": "a.*b.*c.*"}}}, "start": 1, "end": 5}, r"unbounded"),
    ({"match": {"labels": {"s": {"regex": "x" * 300}}}, "start": 1, "end": 5}, r"at most 200"),
    ({"match": {"labels": {"s": {"regex": "("}}}, "start": 1, "end": 5}, r"invalid regular"),
    ({"match": {"labels": {"s": "a"}}, "start": 1, "end": 5, "learn": "no"}, r"learn: expected true"),
    ({"match": {"labels": {"s": "a"}}, "start": 1, "end": 5, "comment": 7}, r"comment: expected a str"),
    ({"match": {"labels": {"s": "a"}}, "start": 1, "end": 5, "comment": "c" * 600}, r"at most 500"),
    ({"match": {"labels": {"s": "a"}}, "start": 1, "end": 5, "id": "a b"}, r"mutes\[0\]\.id"),
    ({"match": {"labels": {"s": "a"}}, "start": 1, "end": 5, "until": 3}, r"until: unknown key"),
    ("every day", r"mutes\[0\]: expected a mapping"),
])
def test_hostile_mutes_in_the_config_name_the_key(raw, why):
    with pytest.raises(ConfigError, match=why):
        parse_config({"rules": RULES, "mutes": [raw]})


def load_config_text(text):
    return parse_config(yaml.safe_load(text))


def test_yaml_timestamps_need_an_offset():
    ok = load_config_text("mutes: [{match: {metric: x}, start: 2024-05-01T22:00:00Z, "
                          "end: 2024-05-02T02:00:00+02:00}]")
    assert (ok.mutes[0].start, ok.mutes[0].end) == (1714600800.0, 1714600800.0 + 7200)
    with pytest.raises(ConfigError, match=r"mutes\[0\]\.start: give a UTC offset"):
        load_config_text("mutes: [{match: {metric: x}, start: 2024-05-01 22:00:00, end: 2e9}]")


def test_config_mutes_must_be_a_list_with_unique_ids():
    with pytest.raises(ConfigError, match="mutes: expected a list"):
        parse_config({"mutes": {"a": 1}})
    one = {"id": "x", "match": {"labels": {"s": "a"}}, "start": 1, "end": 5}
    with pytest.raises(ConfigError, match="'x' is used more than once"):
        parse_config({"mutes": [one, one]})


def test_the_table_bounds_its_size():
    table = Mutes()
    for i in range(MAX_MUTES):
        table.add(parse_mute(mute(mid=f"m{i}")))
    with pytest.raises(MuteError, match=f"at most {MAX_MUTES}"):
        table.add(parse_mute(mute(mid="one-more")))
