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
    for direction, expect in (("rise", 0), ("drop", 1), ("either", 1)):
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


# ------------------------------------------------------------ snapshot format (version 2)

import json  # noqa: E402
import struct  # noqa: E402
from pathlib import Path  # noqa: E402

from streamdet.core import framing  # noqa: E402
from streamdet.core.engine import StateChangeError  # noqa: E402
from streamdet.core.points import PointBatch  # noqa: E402
from streamdet.core.snapshot import SNAPSHOT_MAGIC, encode_snapshot  # noqa: E402

V1_FIXTURE = Path(__file__).parent / "data" / "snapshot_v1.bin"


def _labelled(keys_labels, t, y):
    keys = [k for k, _m in keys_labels]
    return PointBatch(keys, np.asarray(t, float), np.asarray(y, float), dict(keys_labels))


def _mixed_series():
    """Keys and labels a snapshot must carry exactly: non-ASCII, a character outside the BMP,
    quotes, backslashes and newlines escaped in keys, a series without labels."""
    metas = [("latency_ms", (("city", "Zürich"), ("shop", 'north "A"'))),
             ("queue_depth", (("note", "back\\slash\nnewline"),)),
             ("orders", ()),
             ("temp_c", (("probe", "🌡 kitchen"),))]
    from streamdet.core.points import series_key
    return [(series_key(m, labels), (m, labels)) for m, labels in metas]


def test_split_snapshot_is_detached_from_the_engine_and_equals_snapshot():
    keys, t, y = stream(300)
    eng = Engine(parse_config(CFG))
    b = batch(keys, t, y)
    eng.ingest(b.take(np.arange(450)))
    whole = eng.snapshot()
    parts = eng.snapshot_parts()
    assert encode_snapshot(parts) == whole
    eng.ingest(b.take(np.arange(450, 900)))  # the engine moves on; the parts must not
    assert encode_snapshot(parts) == whole
    again = Engine.restore(parse_config(CFG), whole)
    rest = b.take(np.arange(450, 900))
    fresh = Engine.restore(parse_config(CFG), encode_snapshot(parts))
    assert [e.id for e in again.ingest(rest)] == [e.id for e in fresh.ingest(rest)]


def test_keys_labels_and_freed_rows_survive_a_snapshot():
    series = _mixed_series()
    eng = Engine(parse_config({"rules": [{"name": "r", "warmup": "5 steps"}],
                               "series": {"idle_ttl": "1h"}}))
    eng.ingest(_labelled(series, [0.0] * 4, [1, 2, 3, 4]))
    # Only the first two keep reporting: the others are evicted and their rows freed.
    for s in range(1, 80):
        eng.ingest(_labelled(series[:2], [60.0 * s] * 2, [1.0 + s % 3, 2.0]))
    assert eng.table.free and eng.stats()["series_active"] == 2
    back = Engine.restore(eng.config, eng.snapshot())
    assert back.table.keys == eng.table.keys and back.table.meta == eng.table.meta
    assert back.table.index == eng.table.index and back.table.free == eng.table.free
    assert back.counters == eng.counters and back.clock == eng.clock
    for part, again in zip(eng.parts, back.parts, strict=True):
        for name, arr in part.state(eng.table.n).items():
            np.testing.assert_array_equal(again.state(eng.table.n)[name], arr, err_msg=name)


def test_version_1_snapshots_are_still_read():
    # tests/data/snapshot_v1.bin was written by the version-1 build (commit 8348285): rule
    # "checkout", 60 s steps, three series, 40 steps, one breach open on latency_ms{shop="north"}.
    blob = V1_FIXTURE.read_bytes()
    assert struct.unpack_from(">I", blob, len(SNAPSHOT_MAGIC))[0] == 1
    cfg = parse_config({"rules": [{"name": "checkout", "step": "60s", "warmup": "10 steps"}]})
    eng = Engine.restore(cfg, blob)
    assert sorted(eng.table.index) == ['latency_ms{shop="north"}', 'latency_ms{shop="south"}', "orders"]
    assert eng.table.meta[eng.table.index['latency_ms{shop="north"}']] == ("latency_ms", (("shop", "north"),))
    assert eng.stats()["breaches_open"] == 1 and eng.clock == 1.7e9 + 60.0 * 39
    assert eng.restore_report.changes == () and eng.restore_report.series_kept == 3
    # Written again it is a version-2 snapshot that restores to the same state.
    again = Engine.restore(cfg, eng.snapshot())
    assert again.table.keys == eng.table.keys and again.counters == eng.counters
    np.testing.assert_array_equal(again.judge.band.n[:3], eng.judge.band.n[:3])


def _repack(blob: bytes, edit) -> bytes:
    """The same body under an edited header (checksum still valid): a hostile snapshot."""
    version, header, body = framing.unpack_view(blob, SNAPSHOT_MAGIC, (2,), "snapshot")
    edit(header)
    head = json.dumps(header).encode()
    return SNAPSHOT_MAGIC + struct.pack(">II", version, len(head)) + head + bytes(body)


def test_hostile_version_2_snapshots_are_refused_with_a_reason():
    eng = Engine(parse_config(CFG))
    eng.ingest(batch(*stream(50)))
    blob = eng.snapshot()
    cfg = parse_config(CFG)
    future = blob[:len(SNAPSHOT_MAGIC)] + struct.pack(">I", 9) + blob[len(SNAPSHOT_MAGIC) + 4:]
    with pytest.raises(SnapshotError, match="version 9, this build reads 1 or 2"):
        Engine.restore(cfg, future)

    def past_end(h):
        h["layout"]["series.last_seen"][2] = 10**9

    def bad_index(h):
        h["layout"]["series.string_len"][1] = [1]

    def bad_rows(h):
        h["rows"] = 2

    def no_layout(h):
        del h["layout"]

    for edit, reason in ((past_end, "runs past the end"), (bad_index, "string table"),
                         (bad_rows, "shape|rows"), (no_layout, "malformed")):
        with pytest.raises(SnapshotError, match=reason):
            Engine.restore(cfg, _repack(blob, edit))
    flipped = bytearray(blob)
    flipped[-5] ^= 0xFF
    with pytest.raises(SnapshotError, match="checksum"):
        Engine.restore(cfg, bytes(flipped))


# ------------------------------------------------------------ restore report (rules changed)

def _two_rules(checkout_step="60s", checkout_name="checkout", kind="gauge", warmup="30 steps"):
    return parse_config({"rules": [
        {"name": checkout_name, "match": {"metric": "checkout_*"}, "step": checkout_step,
         "warmup": warmup, "relearn_after": "1d", "kind": kind},
        {"name": "other", "warmup": "30 steps"}]})


def _trained(cfg, shift_at=None):
    rng = np.random.default_rng(3)
    series = [("checkout_ms", ("checkout_ms", ())), ("checkout_errors", ("checkout_errors", ())),
              ("disk_used", ("disk_used", ()))]
    eng = Engine(cfg)
    events = []
    for s in range(120):
        y = np.array([50.0, 2.0, 70.0]) + rng.normal(0, 1, 3)
        if shift_at is not None and s >= shift_at:
            y[0] += 40.0
        events += eng.ingest(_labelled(series, [1.7e9 + 60.0 * s] * 3, y))
    return eng, events


def test_restore_report_names_a_renamed_rule_and_can_refuse_it():
    eng, _ = _trained(_two_rules())
    blob = eng.snapshot()
    renamed = _two_rules(checkout_name="checkout-v2")
    with pytest.raises(StateChangeError, match=r"rule 'checkout': not in the config: 2 series dropped"):
        Engine.restore(renamed, blob, on_rule_change="error")
    back = Engine.restore(renamed, blob)  # the library default: drop and report
    report = back.restore_report
    assert [(c.rule, c.series, c.action) for c in report.changes] == [("checkout", 2, "dropped")]
    assert report.series_kept == 1 and report.series_dropped == 2
    assert sorted(back.table.index) == ["disk_used"]
    assert back.counters["series_dropped_rule_removed"] == 2
    # Nothing changed: nothing reported, and "error" restores normally.
    same = Engine.restore(_two_rules(), blob, on_rule_change="error")
    assert same.restore_report.changes == () and same.restore_report.series_kept == 3


def test_a_changed_step_resets_learning_and_closes_open_breaches():
    eng, events = _trained(_two_rules(), shift_at=100)
    assert [e.series for e in events if e.type.endswith("opened")] == ["checkout_ms"]
    blob = eng.snapshot()
    cfg = _two_rules(checkout_step="5m")
    with pytest.raises(StateChangeError, match=r"rule 'checkout': step 1m -> 5m: 2 series learning again"):
        Engine.restore(cfg, blob, on_rule_change="error")
    back = Engine.restore(cfg, blob)
    (change,) = back.restore_report.changes
    assert (change.rule, change.series, change.open_breaches) == ("checkout", 2, 1)
    rows = [back.table.index[k] for k in ("checkout_ms", "checkout_errors")]
    assert back.table.step[rows].tolist() == [300.0, 300.0]
    assert back.judge.band.n[rows].tolist() == [0, 0] and back.stats()["breaches_open"] == 0
    (closed,) = back.restore_events
    assert closed.type == "streamdet.breach.closed" and closed.series == "checkout_ms"
    assert closed.opened_id == events[0].id and "step" in closed.reason
    other = back.table.index["disk_used"]  # untouched rule: learned state kept
    assert back.judge.band.n[other] == eng.judge.band.n[other] > 0
    assert back.restore_report.series_kept == 1


def test_a_changed_kind_resets_learning_and_other_settings_follow_the_config():
    eng, _ = _trained(_two_rules())
    blob = eng.snapshot()
    back = Engine.restore(_two_rules(kind="counter"), blob)
    assert [(c.rule, c.change) for c in back.restore_report.changes] == [("checkout", "kind gauge -> counter")]
    # A warm-up change alone keeps learned state and applies to restored series.
    longer = Engine.restore(_two_rules(warmup="200 steps"), blob, on_rule_change="error")
    row = longer.table.index["checkout_ms"]
    assert longer.restore_report.changes == () and longer.table.warmup[row] == 200
    assert longer.judge.band.n[row] == eng.judge.band.n[row] and longer.is_learning("checkout_ms")
