"""Replay plots and `streamdet show`: windows, the index page, breaches that stay visible.

Fictional scenario: a help desk's tickets per 5 minutes over eight days, with one 10-minute spike.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from datetime import UTC, datetime

import numpy as np
import pytest

from streamdet.cli import _plot_time, main
from streamdet.plots import MIN_SPAN_FRACTION, breaches_by_series

KEY = 'tickets{desk="east"}'
T0 = 1.7e9 - 1.7e9 % 86400


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    d = tmp_path_factory.mktemp("desk")
    rng = np.random.default_rng(8)
    n = 8 * 288
    t = T0 + np.arange(n) * 300.0
    y = 200 + 80 * np.sin(2 * np.pi * (t % 86400) / 86400) + rng.normal(0, 6, n)
    y[n - 100:n - 98] += 150  # two steps far outside: a short breach
    lines = ["time,value,desk"] + [f"{datetime.fromtimestamp(a, UTC):%Y-%m-%d %H:%M},{b:.3f},east"
                                   for a, b in zip(t, y, strict=True)]
    data = d / "tickets.csv"
    data.write_text("\n".join(lines) + "\n")
    cfg = d / "cfg.yaml"
    cfg.write_text("rules:\n  - name: tickets\n    step: 5m\n    timezone: Europe/Lisbon\n    warmup: 1d\n")
    return d, data, cfg


def test_replay_plots_a_window_and_writes_an_index(history, capsys):
    d, data, cfg = history
    out = d / "plots"
    assert main(["replay", str(data), "-c", str(cfg), "--plot", str(out), "--since", "2d",
                 "--until", "2030-01-01T00:00Z"]) == 0
    assert "index.html in" in capsys.readouterr().out
    pngs = list(out.glob("*.png"))
    assert len(pngs) == 1 and pngs[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    page = (out / "index.html").read_text()
    assert "tickets{desk=&quot;east&quot;}" in page and pngs[0].name in page
    assert "above from" in page and "lasted" in page


@pytest.mark.parametrize("args, message", [
    (["--since", "yesterday-ish"], "--since: 'yesterday-ish' is neither a time"),
    (["--until", "2d"], "--until applies to plots only"),
])
def test_bad_plot_windows_are_refused_before_any_work(history, capsys, args, message):
    _d, data, cfg = history
    assert main(["replay", str(data), "-c", str(cfg), *args]) == 2
    assert message in capsys.readouterr().err


def test_plot_time_reads_iso_times_and_durations():
    # ISO 8601 with an offset (datetime.fromisoformat, Python >= 3.11 accepts "Z")
    assert _plot_time("2024-05-01T12:00Z", 0.0) == datetime(2024, 5, 1, 12, tzinfo=UTC).timestamp()
    assert _plot_time("2024-05-01T14:00+02:00", 0.0) == datetime(2024, 5, 1, 12, tzinfo=UTC).timestamp()
    assert _plot_time("2d", 1e6) == 1e6 - 2 * 86400
    assert _plot_time(None, 5.0) is None


def test_show_writes_the_same_band_as_svg_and_png(history, capsys, tmp_path):
    _d, data, cfg = history
    svg = tmp_path / "desk.svg"
    assert main(["show", KEY, "--from", str(data), "-c", str(cfg), "--out", str(svg), "--hours", "24"]) == 0
    assert "288 step(s)" in capsys.readouterr().out
    root = ET.fromstring(svg.read_text())  # the standard library's XML parser
    assert KEY in "".join(root.itertext())
    assert svg.read_text().count('fill="#b4540a"') >= 2  # an opening marker (and its legend entry)
    png = tmp_path / "desk.png"
    assert main(["show", KEY, "--from", str(data), "-c", str(cfg), "--out", str(png)]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and not list(tmp_path.glob(".*"))


@pytest.mark.parametrize("args, message", [
    (["tickets"], "did you mean one of ['tickets{desk=\"east\"}']"),
    ([KEY, "--out", "x.pdf"], "must end in .svg or .png"),
    ([KEY, "--hours", "nan"], "--hours: must be a positive number"),
])
def test_show_refuses_bad_requests(history, capsys, args, message):
    _d, data, cfg = history
    series, *rest = args
    assert main(["show", series, "--from", str(data), "-c", str(cfg), *rest]) == 2
    assert message in capsys.readouterr().err


def test_a_one_step_breach_is_drawn_at_least_the_minimum_width():
    """Over two weeks a 5-minute breach is 0.025 % of the axis; it is drawn 0.4 % wide."""
    import matplotlib

    matplotlib.use("Agg")
    from streamdet.config import parse_config
    from streamdet.core.engine import Engine
    from streamdet.core.points import PointBatch
    from streamdet.plots import plot_series

    eng = Engine(parse_config({"rules": [{"step": "5m", "warmup": "1d"}]}), record_steps=True)
    rng = np.random.default_rng(2)
    n = 14 * 288
    t = T0 + np.arange(n) * 300.0
    y = 50 + rng.normal(0, 1, n)
    y[n - 300] = 120
    events = eng.ingest(PointBatch(["q"] * n, t, y, {"q": ("q", ())})) + eng.finish()
    spans = breaches_by_series(events, float(t[-1]))["q"]
    assert len(spans) == 1 and spans[0].end - spans[0].start < MIN_SPAN_FRACTION * (t[-1] - t[0])
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        assert len(plot_series(eng, events, tmp)) == 1
