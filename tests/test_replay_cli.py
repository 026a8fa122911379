"""`streamdet replay` end to end on a CSV a new user could write by hand."""

from pathlib import Path

import numpy as np
import orjson

from streamdet.cli import main


def write_hand_csv(path: Path) -> None:
    # A fictional checkout service: orders per minute for two days, then an outage-like dip.
    rng = np.random.default_rng(4)
    lines = ["time,value,shop"]
    for i in range(2 * 1440 + 120):
        ts = np.datetime64("2026-03-02T00:00") + np.timedelta64(i, "m")
        v = 40 + 10 * np.sin(2 * np.pi * i / 1440) + rng.normal(0, 1)
        if i >= 2 * 1440 + 60:
            v -= 25
        lines.append(f"{str(ts).replace('T', ' ')},{v:.3f},north")
    lines.append("2026-03-04 03:00,not-a-number,north")
    path.write_text("\n".join(lines) + "\n")


def test_replay_writes_events_summary_and_plots(tmp_path, capsys):
    data = tmp_path / "orders.csv"
    write_hand_csv(data)
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text("rules:\n  - name: orders\n    step: 1m\n")
    out = tmp_path / "events.jsonl"
    plots = tmp_path / "plots"
    rc = main(["replay", str(data), "--config", str(cfg), "--events", str(out), "--plot", str(plots)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "records read      3,001  (bad: 1)" in text
    assert "not-a-number" in text and "line 3002" in text
    assert "breaches per series:" in text and 'orders{shop="north"}' in text
    events = [orjson.loads(line) for line in out.read_bytes().splitlines()]
    assert events and events[0]["type"] == "streamdet.breach.opened"
    assert events[0]["data"]["direction"] == "below"
    assert events[0]["time"] >= "2026-03-04T01:00:00Z"
    pngs = list(plots.glob("*.png"))
    assert len(pngs) == 1 and pngs[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # No progress bar when the output is not a terminal.
    assert "\r[" not in capsys.readouterr().err


def test_replay_bad_config_exits_2(tmp_path, capsys):
    data = tmp_path / "x.csv"
    data.write_text("time,value\n2026-01-01,1\n")
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("rules:\n  - width: zero\n")
    assert main(["replay", str(data), "--config", str(cfg)]) == 2
    assert "rules[0].width" in capsys.readouterr().err


def test_replay_unknown_extension_exits_2(tmp_path, capsys):
    data = tmp_path / "x.bin"
    data.write_text("whatever")
    assert main(["replay", str(data)]) == 2
    assert "cannot tell the format" in capsys.readouterr().err


def test_replay_jsonl_and_line_protocol_inputs(tmp_path, capsys):
    j = tmp_path / "a.jsonl"
    j.write_text("\n".join(f'{{"metric": "q", "time": {1.7e9 + 60 * i}, "value": {i % 7}}}'
                           for i in range(300)))
    lp = tmp_path / "b.lp"
    lp.write_text("\n".join(f"disk,host=h1 used={i % 5} {int((1.7e9 + 60 * i) * 1e9)}" for i in range(300)))
    assert main(["replay", str(j), str(lp)]) == 0
    assert "series            2" in capsys.readouterr().out


# ---------------------------------------------------------------- exit codes and early checks (issue 7, item 8)

def _minutes_csv(path: Path, n: int = 300, every: int = 1) -> None:
    rows = [f"{1.7e9 + 60 * every * i:.0f},{10 + (i % 7)},a" for i in range(n)]
    path.write_text("time,value,host\n" + "\n".join(rows) + "\n")


def test_replay_empty_input_exits_3(tmp_path, capsys):
    # Before: exit 0 with an all-zero summary.
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    assert main(["replay", str(empty)]) == 3
    assert f"{empty}: no records (empty file?)" in capsys.readouterr().err


def test_replay_every_record_bad_exits_4(tmp_path, capsys):
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"metric": "q", "time": 60, "value": "x"}\nnot json\n')
    assert main(["replay", str(bad)]) == 4
    err = capsys.readouterr().err
    assert f"{bad}: none of its 2 record(s) is usable; first: {bad} line 1: value 'x' is not numeric" in err


def test_replay_csv_without_value_column_exits_4(tmp_path, capsys):
    good = tmp_path / "good.csv"
    _minutes_csv(good)
    novalue = tmp_path / "novalue.csv"
    novalue.write_text("time,reading\n2026-01-01 00:00,1\n")
    assert main(["replay", str(good), str(novalue)]) == 4
    err = capsys.readouterr().err
    assert f"{novalue}: none of its 1 record(s) is usable; first: {novalue} line 1: header lacks column(s) value" in err


def test_replay_checks_output_paths_before_reading_anything(tmp_path, capsys):
    # Before: a missing --events directory failed with a traceback after the whole replay.
    data = tmp_path / "d.csv"
    _minutes_csv(data)
    missing = tmp_path / "nowhere" / "events.jsonl"
    assert main(["replay", str(data), "--events", str(missing)]) == 2
    out = capsys.readouterr()
    assert f"--events {missing}: directory {str(missing.parent)!r} does not exist" in out.err
    assert "records read" not in out.out
    a_file = tmp_path / "plots.png"
    a_file.write_text("")
    assert main(["replay", str(data), "--plot", str(a_file)]) == 2
    assert f"--plot {a_file}: exists and is not a directory" in capsys.readouterr().err
    assert main(["replay", str(data), "--plot", str(a_file / "sub")]) == 2
    assert "which is not a directory" in capsys.readouterr().err


def test_replay_needs_format_for_txt(tmp_path, capsys):
    # Before: a .txt CSV was read as line protocol, every line a bad record, exit 0.
    data = tmp_path / "history.txt"
    _minutes_csv(data)
    assert main(["replay", str(data)]) == 2
    assert "pass --format csv, json, influx, telegraf_json, otlp_json or otlp_proto" in capsys.readouterr().err
    assert main(["replay", str(data), "--format", "csv"]) == 0


def test_replay_warns_when_spacing_differs_from_step(tmp_path, capsys):
    # Five-minute data under the default 60 s step: four steps in five are empty.
    data = tmp_path / "load.csv"
    _minutes_csv(data, every=5)
    assert main(["replay", str(data)]) == 0
    err = capsys.readouterr().err
    assert ("warning: 1 series of rule 'default' (load{host=\"a\"}) have a point every 5m but the rule's "
            "step is 1m: about 80% of steps are empty") in err
    assert "set `step: auto` or `step: 5m` in the rule" in err
    # Data that fits the step: no warning.
    _minutes_csv(data, every=1)
    assert main(["replay", str(data)]) == 0
    assert "warning" not in capsys.readouterr().err
