"""`streamdet evaluate`: window matching, labels files, the one-engine sweep, worker processes, CLI.

Matching is checked on small hand-made event lists. The engine runs use open data shipped with
installed libraries: river.datasets.WaterFlow (hourly pipeline flow, documented low segments)
and statsmodels.datasets.nile (annual Nile volume, the 1898/1899 shift).
"""

from datetime import UTC, datetime
from pathlib import Path

import orjson
import pytest

from streamdet.cli import main
from streamdet.evaluate import (
    Combination,
    LabelsError,
    Mark,
    SweepError,
    Window,
    combination_config,
    load_labels,
    parse_labels,
    parse_sweep,
    prepare,
    resolve_labels,
    run_all,
    run_engine,
    score_series,
    sweep_config,
)
from streamdet.replay import read_inputs

H = 3600.0


def opened(t: float) -> Mark:
    return Mark(opened=True, time=t)


def closed(t: float) -> Mark:
    return Mark(opened=False, time=t)


# ---------------------------------------------------------------- matching


def test_window_detected_inside_and_within_slack_before_but_not_after_end():
    w = [Window(10 * H, 12 * H)]
    common = dict(first=0.0, last=86400.0, step=300.0)
    inside = score_series(w, [opened(11 * H)], slack=900, **common)
    assert (inside.detected, inside.missed, inside.false, inside.delays) == (1, 0, 0, [H])
    early = score_series(w, [opened(10 * H - 600)], slack=900, **common)
    assert (early.detected, early.false, early.delays) == (1, 0, [-600.0])
    too_early = score_series(w, [opened(10 * H - 1200)], slack=900, **common)
    assert (too_early.detected, too_early.false) == (0, 1)
    at_end = score_series(w, [opened(12 * H)], slack=0, **common)
    assert at_end.detected == 1
    after = score_series(w, [opened(12 * H + 1)], slack=900, **common)  # slack is only before
    assert (after.detected, after.missed, after.false) == (0, 1, 1)


def test_delay_is_from_first_matching_open_and_extra_opens_inside_are_not_false():
    w = [Window(0.0, 10 * H), Window(20 * H, 21 * H)]
    marks = [opened(5 * H), closed(6 * H), opened(2 * H), opened(15 * H), opened(30 * H)]
    s = score_series(w, marks, slack=0, first=0.0, last=2 * 86400.0, step=300.0)
    assert s.windows == 2 and s.detected == 1 and s.missed == 1
    assert s.delays == [2 * H]  # the earliest opening in the window, whatever the list order
    assert s.false == 2  # 15 h and 30 h
    d = s.to_dict()
    assert d["false_per_day"] == pytest.approx(1.0) and d["series_days"] == pytest.approx(2.0)
    assert d["delay_median_s"] == 2 * H and d["delay_p90_s"] == 2 * H


def test_reopens_count_openings_within_an_hour_of_a_close():
    marks = [opened(0.0), closed(H), opened(H + 1800), closed(3 * H), opened(3 * H + H + 1),
             closed(6 * H), opened(6 * H + H)]
    s = score_series([], marks, slack=0, first=0.0, last=86400.0, step=60.0)
    assert s.reopens == 2  # 30 min and exactly 1 h after a close; 1 h 1 s is not
    assert s.false == 4
    assert s.to_dict()["reopens_per_day"] == pytest.approx(2.0)


def test_series_days_are_at_least_one_step_and_empty_delays_give_none():
    s = score_series([Window(0, 1)], [], slack=0, first=5.0, last=5.0, step=86400.0)
    assert s.series_days == 1.0 and s.missed == 1
    d = s.to_dict()
    assert d["delay_median_s"] is None and d["delay_p90_s"] is None


# ---------------------------------------------------------------- labels


def test_labels_parse_iso_and_epoch_and_keep_empty_lists():
    got = parse_labels({"a": [["2024-01-01T00:00:00Z", 1704070800]], "quiet": []})
    assert got == {"a": [Window(1704067200.0, 1704070800.0)], "quiet": []}


@pytest.mark.parametrize(
    ("raw", "expected"),
    [
        ([["2024-01-01", "2024-01-02"]], "expected a JSON object"),
        ({"cpu": "2024-01-01"}, "key 'cpu': expected a list"),
        ({"cpu": [["2024-01-01"]]}, "key 'cpu', window 0: expected [start, end]"),
        ({"cpu": [[1, 2], [1, 2, 3]]}, "key 'cpu', window 1: expected [start, end]"),
        ({"cpu": [["2024-01-02", "2024-01-01"]]}, "key 'cpu', window 0: end '2024-01-01' is before start"),
        ({"cpu": [["yesterday", "2024-01-01"]]}, "key 'cpu', window 0 start: time 'yesterday' is not ISO 8601"),
        ({"cpu": [[True, 5]]}, "key 'cpu', window 0 start: expected an ISO 8601 string or epoch seconds"),
        ({"cpu": [[1, None]]}, "key 'cpu', window 0 end: expected"),
        ({"cpu": [[1, float("nan")]]}, "key 'cpu', window 0 end: time is not a finite number"),
    ],
)
def test_hostile_labels_name_the_file_and_key(raw, expected):
    with pytest.raises(LabelsError) as exc:
        parse_labels(raw, "labels.json")
    assert str(exc.value).startswith("labels.json: ")
    assert expected in str(exc.value)


def test_labels_file_that_is_not_json_or_missing(tmp_path):
    bad = tmp_path / "l.json"
    bad.write_text("{not json")
    with pytest.raises(LabelsError, match=r"l\.json: not valid JSON"):
        load_labels(bad)
    with pytest.raises(LabelsError, match="cannot read"):
        load_labels(tmp_path / "missing.json")


def test_label_names_resolve_to_series_keys_or_input_files():
    by_file = {"data/cpu.csv": ['cpu{host="a"}', 'cpu{host="b"}'], "data/mem.csv": ["mem"]}
    w1, w2, w3 = Window(0, 1), Window(5, 6), Window(9, 9)
    windows, unmatched = resolve_labels(
        {"cpu": [w1], 'cpu{host="b"}': [w2], "mem.csv": [w3], "disk": [w1]}, by_file)
    assert windows == {'cpu{host="a"}': [w1], 'cpu{host="b"}': [w1, w2], "mem": [w3]}
    assert unmatched == ["disk"]


# ---------------------------------------------------------------- sweep settings


def test_sweep_arguments_expand_to_every_combination():
    combos = parse_sweep(["width=2,3", "confirm.steps=3,5", "relearn_after=8 steps"])
    assert len(combos) == 4
    assert combos[1].settings == (("width", 2), ("confirm.steps", 5), ("relearn_after", "8 steps"))
    for bad, msg in [("width", "expected KEY=V1,V2"), ("width=", "expected KEY=V1,V2"),
                     ("a..b=1", "not a dotted key path")]:
        with pytest.raises(SweepError, match=msg):
            parse_sweep([bad])
    with pytest.raises(SweepError, match="given more than once"):
        parse_sweep(["width=2", "width=3"])


def test_sweep_config_copies_each_rule_per_combination_selecting_the_hidden_label():
    raw = {"rules": [{"name": "a", "match": {"metric": "cpu"}}, {"step": "5m"}]}
    combos = parse_sweep(["width=2,4", "confirm.steps=3"])
    cfg = sweep_config(raw, combos)
    assert [r.name for r in cfg.rules] == ["a#0", "rule1#0", "a#1", "rule1#1"]
    assert [r.width for r in cfg.rules] == [2.0, 2.0, 4.0, 4.0]
    assert {r.confirm_steps for r in cfg.rules} == {3}
    assert cfg.rule_for("cpu", {"__sweep": "1"}) == 2
    assert cfg.rule_for("mem", {"__sweep": "1"}) == 3
    assert cfg.rule_for("cpu", {}) is None
    assert cfg.series.max_series == 2 * 200_000
    with pytest.raises(SweepError, match=r"confirm\.steps=40: rules\[0\]\.confirm\.steps: must be <= 32"):
        sweep_config(raw, parse_sweep(["confirm.steps=3,40"]))
    with pytest.raises(SweepError, match="'match' is not a section"):
        combination_config({"rules": [{"match": "cpu"}]}, Combination(0, (("match.metric", "x"),)))


# ---------------------------------------------------------------- engine runs on open data


def _write_open_data(tmp: Path) -> list[Path]:
    import statsmodels.api as sm
    from river import datasets

    rows = list(datasets.WaterFlow())
    flow = tmp / "waterflow.csv"
    flow.write_text("time,value\n" + "".join(f"{x['Time'].isoformat()},{v}\n" for x, v in rows))
    d = sm.datasets.nile.load_pandas().data
    nile = tmp / "nile.csv"
    nile.write_text("time,value\n" + "".join(
        f"{datetime(int(y), 1, 1, tzinfo=UTC).isoformat()},{v}\n" for y, v in zip(d["year"], d["volume"], strict=True)))
    return [flow, nile]


CONFIG = {"rules": [{"name": "all", "step": "auto", "relearn_after": "8 steps"}]}


def _read(paths):
    return read_inputs(paths, combination_config(CONFIG, Combination(0, ())))[0]


def test_one_engine_sweep_gives_what_each_combination_gives_alone(tmp_path):
    paths = _write_open_data(tmp_path)
    points = _read(paths)
    combos = parse_sweep(["width=1.5,3", "confirm.steps=3,5"])
    swept = run_engine(prepare(points, combos), sweep_config(CONFIG, combos))
    plain = prepare(points, parse_sweep([]))
    for c in combos:
        alone = run_engine(plain, combination_config(CONFIG, c))
        mine = sorted((o, k, t, kind) for o, k, i, t, kind in swept if i == c.index)
        assert mine == sorted((o, k, t, kind) for o, k, _i, t, kind in alone), c.describe()
    by_combo = [sum(1 for f in swept if f[2] == c.index and f[0]) for c in combos]
    assert len(set(by_combo)) > 1, by_combo  # the settings make a difference on this data
    assert {k for _o, k, _i, _t, _kind in swept} <= {"waterflow", "nile"}  # mapped back to the originals


def test_worker_processes_give_the_same_openings_as_one_process(tmp_path):
    paths = _write_open_data(tmp_path)
    combos = parse_sweep(["width=1.5,3"])
    prep = prepare(_read(paths), combos)
    cfg = sweep_config(CONFIG, combos)
    one = run_all(prep, cfg, jobs=1)
    two = run_all(prep, cfg, jobs=2, min_series_per_job=1)
    assert one and sorted(one) == sorted(two)


# ---------------------------------------------------------------- CLI


def test_cli_prints_table_and_writes_json(tmp_path, capsys):
    paths = _write_open_data(tmp_path)
    labels = tmp_path / "labels.json"
    # WaterFlow's documented low segments (hour indices 93-112, 211-226, 869-886, as in
    # tests/test_detection.py) and the Nile shift 1898-1902; "pump" names nothing.
    labels.write_text(orjson.dumps({
        "waterflow": [["2022-03-24T07:00:00Z", "2022-03-25T03:00:00Z"],
                      ["2022-03-29T06:00:00Z", "2022-03-29T22:00:00Z"],
                      ["2022-04-27T10:00:00Z", "2022-04-28T04:00:00Z"]],
        "nile.csv": [["1898-01-01", "1903-01-01"]],
        "pump": [],
    }).decode())
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text("rules:\n  - name: all\n    step: auto\n")
    out = tmp_path / "out.json"
    rc = main(["evaluate", *map(str, paths), "--labels", str(labels), "--config", str(cfg),
               "--json", str(out), "--jobs", "1"])
    assert rc == 0
    cap = capsys.readouterr()
    assert "pump" in cap.err and "match no series" in cap.err
    assert "overall" in cap.out and "waterflow" in cap.out
    doc = orjson.loads(out.read_bytes())
    keys = {"windows", "detected", "missed", "false", "false_per_day", "delay_median_s",
            "delay_p90_s", "reopens", "reopens_per_day", "series_days"}
    assert set(doc) == {"overall", "series"} and set(doc["overall"]) == keys
    assert set(doc["series"]) == {"waterflow", "nile"}
    assert doc["overall"]["windows"] == 4
    # The detector's own reference check finds all three WaterFlow low segments.
    assert doc["series"]["waterflow"]["detected"] == 3
    # A sweep: trade-off table, the pick under a target, and per-combination JSON.
    rc = main(["evaluate", *map(str, paths), "--labels", str(labels), "--config", str(cfg),
               "--sweep", "width=2,3", "confirm.steps=3,5", "--target-false-per-day", "1",
               "--json", str(out), "--jobs", "1"])
    assert rc == 0
    text = capsys.readouterr().out
    assert "width=2 confirm.steps=3" in text and "best at or under 1 false" in text
    doc = orjson.loads(out.read_bytes())
    assert len(doc["sweep"]) == 4 and doc["best"] in range(4)
    rc = main(["evaluate", *map(str, paths), "--labels", str(labels), "--config", str(cfg),
               "--sweep", "width=2,3", "--target-false-per-day", "0", "--jobs", "1", "--json", str(out)])
    assert rc == 0
    doc = orjson.loads(out.read_bytes())
    meets = [c["index"] for c in doc["sweep"] if c["overall"]["false"] == 0]
    assert ("no combination meets" in capsys.readouterr().out) == (not meets)
    assert doc["best"] in meets if meets else doc["best"] is None


def test_cli_bad_input_exits_2_with_a_reason(tmp_path, capsys):
    paths = [str(p) for p in _write_open_data(tmp_path)[:1]]
    good = tmp_path / "labels.json"
    good.write_text('{"waterflow": []}')
    hostile = tmp_path / "hostile.json"
    hostile.write_text('{"waterflow": [["2022-04-02", "2022-04-01"]]}')
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text("rules:\n  - name: all\n    step: auto\n")
    badcfg = tmp_path / "bad.yaml"
    badcfg.write_text("rules:\n  - name: all\n    width: -1\n")
    cases = [
        (["--labels", str(hostile), "--config", str(cfg)], "hostile.json: key 'waterflow', window 0: end"),
        (["--labels", str(tmp_path / "nope.json"), "--config", str(cfg)], "nope.json: cannot read"),
        (["--labels", str(good), "--config", str(badcfg)], "rules[0].width: must be > 0"),
        (["--labels", str(good), "--config", str(cfg), "--slack", "soon"], "--slack"),
        (["--labels", str(good), "--config", str(cfg), "--jobs", "0"], "--jobs: must be >= 1"),
        (["--labels", str(good), "--config", str(cfg), "--sweep", "width=0"], "rules[0].width: must be > 0"),
        (["--labels", str(good), "--config", str(cfg), "--sweep", "color=red"], "unknown key"),
    ]
    for extra, msg in cases:
        assert main(["evaluate", *paths, *extra]) == 2, extra
        assert msg in capsys.readouterr().err, (extra, msg)
    with pytest.raises(SystemExit) as exc:
        main(["evaluate", *paths, "--config", str(cfg)])  # --labels is required
    assert exc.value.code == 2
    assert main(["evaluate", str(tmp_path / "missing.csv"), "--labels", str(good), "--config", str(cfg)]) == 2
    assert "missing.csv" in capsys.readouterr().err
