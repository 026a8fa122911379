"""`streamdet tail` over an events file: the demo's one-line form, colours only on a terminal,
bad lines reported and skipped."""

from __future__ import annotations

import io
import re
import threading
import time

import numpy as np

from streamdet.alerting.tail import CLOSED_COLOUR, COLOURS, RESET, file_records, format_line, tail
from streamdet.cli import build_parser, main
from streamdet.replay import write_events
from tests.helpers import run


class Tty(io.StringIO):
    def isatty(self) -> bool:
        return True


def events_file(tmp_path):
    rng = np.random.default_rng(5)
    t = np.arange(600) * 60.0 + 1.7e9
    y = 10 + rng.normal(0, 1, 600) + np.where((t >= t[300]) & (t < t[320]), 15.0, 0.0)
    _, events = run({"rules": [{"name": "r", "warmup": "60 steps"}]}, "svc_latency", t, y)
    path = tmp_path / "events.jsonl"
    with open(path, "wb") as fh:
        write_events(events, fh)
    return path, events


def test_tail_prints_the_demo_line_form(tmp_path, capsys):
    path, _events = events_file(tmp_path)
    assert main(["tail", str(path)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 2
    assert re.match(r"\S+Z  (info|warning|critical) +OPENED  svc_latency +above observed [\d.]+  "
                    r"expected [\d.]+  band \[[\d.]+, [\d.]+\]$", lines[0]), lines[0]
    assert "CLOSED  svc_latency" in lines[1] and "worst score +" in lines[1]
    assert "\x1b[" not in "".join(lines)  # captured stdout is not a terminal


def test_colour_only_on_a_terminal_and_never_with_no_color(tmp_path):
    path, _ = events_file(tmp_path)
    out = Tty()
    args = build_parser().parse_args(["tail", str(path)])
    assert args.func(args, out=out, err=io.StringIO()) == 0
    first, second = out.getvalue().splitlines()
    assert any(first.startswith(c) for c in COLOURS.values()) and first.endswith(RESET)
    assert second.startswith(CLOSED_COLOUR)
    out = Tty()
    args = build_parser().parse_args(["tail", "--no-color", str(path)])
    args.func(args, out=out, err=io.StringIO())
    assert "\x1b[" not in out.getvalue()


def test_bad_lines_are_reported_with_their_position_and_skipped(tmp_path):
    path, _ = events_file(tmp_path)
    good = path.read_bytes().splitlines()
    hostile = [b"not json", b"{\"specversion\": \"1.0\"}", b"[1, 2]", b"\xff\xfe", b"{\"data\": 5}",
               b"{\"specversion\":\"1.0\",\"id\":\"x\",\"source\":\"s\",\"type\":\"t\",\"data\":[]}",
               b"{" * 10_000]
    path.write_bytes(b"\n".join([good[0], *hostile, good[1]]) + b"\n")
    out, err = io.StringIO(), io.StringIO()
    with open(path, "rb") as fh:
        shown, bad = tail(file_records(fh, "ev.jsonl", False, None), out, err, color=False)
    assert (shown, bad) == (2, len(hostile))
    reports = err.getvalue().splitlines()
    assert [r.split(":")[1].strip() for r in reports] == [f"ev.jsonl line {i}" for i in range(2, 9)]


def test_follow_picks_up_appended_events(tmp_path):
    path, _ = events_file(tmp_path)
    lines = path.read_bytes().splitlines(keepends=True)
    path.write_bytes(lines[0])
    out = io.StringIO()

    def append_later():
        time.sleep(0.5)
        with open(path, "ab") as fh:
            fh.write(lines[1][:20])  # half a line first: not read until it is complete
            fh.flush()
            time.sleep(0.3)
            fh.write(lines[1][20:])

    threading.Thread(target=append_later).start()
    with open(path, "rb") as fh:
        shown, bad = tail(file_records(fh, "f", True, idle_exit=1.5, poll=0.05), out, io.StringIO(),
                          color=False)
    assert (shown, bad) == (2, 0)


def test_missing_file_is_a_clear_error(tmp_path, capsys):
    assert main(["tail", str(tmp_path / "nope.jsonl")]) == 2
    assert "cannot read" in capsys.readouterr().err


def test_format_line_tolerates_missing_fields():
    assert "OPENED" in format_line({"type": "streamdet.breach.opened", "data": {}})
    assert "CLOSED" in format_line({"type": "streamdet.breach.closed"})
