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
