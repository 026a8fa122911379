"""PNG plots of replayed series and an ``index.html`` listing them with their breaches.

Look: the band as a soft blue ribbon, the expected value as a dashed blue line, the observed value
in near-black, breaches as light orange spans (never narrower than 0.4 % of the time axis, so a
one-step breach stays visible over weeks of 5-minute data) with a dark orange triangle above each
opening, the warm-up hatched in grey and labelled "learning". Times are shown in the rule's time
zone, named on the axis; the unit (when the input format gave one) labels the value axis; the
legend sits below the plot, outside the data. Same palette as :mod:`streamdet.band_svg`.
"""

from __future__ import annotations

import html
import math
import re
import zoneinfo
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np

from streamdet.band_svg import BAND_FILL, BREACH_FILL, BREACH_MARK, EXPECTED_LINE, OBSERVED_LINE
from streamdet.core.engine import Engine
from streamdet.events import CLOSED, OPENED, BreachEvent

LEARNING_FILL = "#8d939b"
MIN_SPAN_FRACTION = 0.004  # of the time axis: the narrowest a breach is drawn


@dataclass(frozen=True, slots=True)
class Breach:
    """One breach of one series as the plots show it."""

    start: float
    end: float  # the end of the data when still open
    direction: str
    still_open: bool


def safe_name(key: str) -> str:
    """A file name for a series key."""
    return re.sub(r"[^A-Za-z0-9_.=-]+", "_", key).strip("_")[:150] or "series"


def breaches_by_series(events: Iterable[BreachEvent], end: float) -> dict[str, list[Breach]]:
    """Opened/closed event pairs as periods per series (still open: up to ``end``)."""
    out: dict[str, list[Breach]] = {}
    open_at: dict[str, BreachEvent] = {}
    for e in events:
        if e.type == OPENED:
            open_at[e.series] = e
        elif e.type == CLOSED and e.series in open_at:
            o = open_at.pop(e.series)
            out.setdefault(e.series, []).append(
                Breach(o.started, e.started + (e.duration or 0.0), o.direction, False))
    for key, o in open_at.items():
        out.setdefault(key, []).append(Breach(o.started, max(end, o.step_end), o.direction, True))
    return out


def breach_spans(events: Iterable[BreachEvent], end: float) -> dict[str, list[tuple[float, float]]]:
    """(start, end) of every breach per series (kept for callers of the older API)."""
    return {k: [(b.start, b.end) for b in v] for k, v in breaches_by_series(events, end).items()}


def _when(t: float, tz) -> str:
    return datetime.fromtimestamp(t, tz).strftime("%Y-%m-%d %H:%M")


def _lasted(seconds: float) -> str:
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if seconds >= size:
            return f"{seconds / size:.1f} {unit}".replace(".0 ", " ")
    return f"{seconds:.0f} s"


def plot_series(engine: Engine, events: list[BreachEvent], out_dir: str | Path,
                keys: Iterable[str] | None = None, since: float | None = None,
                until: float | None = None, index: bool = True) -> list[Path]:
    """One PNG per series that breached (or per key in ``keys``), for steps starting in
    ``[since, until)`` (epoch s, either open), plus ``index.html`` listing every plotted series
    with its breaches (``index=False``: none). Returns the PNG paths written."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt
    from matplotlib.patches import Patch

    if engine.log is None:
        raise ValueError("the engine was not recording steps (record_steps=True)")
    cols = engine.log.columns()
    end = float(cols["start"].max()) if cols["start"].size else 0.0
    all_breaches = breaches_by_series(events, end)
    wanted = list(keys) if keys is not None else sorted(all_breaches)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    listed: list[tuple[str, Path, list[Breach], str | None, object]] = []
    for key in wanted:
        row = engine.table.index.get(key)
        if row is None:
            continue
        of_row = cols["row"] == row
        sel = of_row.copy()
        if since is not None:
            sel &= cols["start"] >= since
        if until is not None:
            sel &= cols["start"] < until
        if not sel.any():
            continue
        rule = engine.config.rules[int(engine.table.rule[row])]
        tz = zoneinfo.ZoneInfo(rule.timezone)
        step = float(engine.table.step[row]) if math.isfinite(engine.table.step[row]) else 60.0
        start = cols["start"][sel]
        t0, t1 = float(start[0]), float(start[-1]) + step
        t = [datetime.fromtimestamp(x, tz) for x in start]
        unit = engine.table.units.get(row)
        breaches = [b for b in all_breaches.get(key, []) if b.end > t0 and b.start < t1]
        fig, ax = plt.subplots(figsize=(12, 4.2), dpi=100)
        fig.patch.set_facecolor("white")
        # warm-up: from the series' first step to its first judged step
        judged = cols["judged"][of_row].astype(bool)
        first_start = float(cols["start"][of_row][0])
        learned_at = float(cols["start"][of_row][np.argmax(judged)]) if judged.any() else t1
        shows_learning = learned_at > t0 and first_start < t1
        if shows_learning:
            a, b = max(first_start, t0), min(learned_at, t1)
            ax.axvspan(datetime.fromtimestamp(a, tz), datetime.fromtimestamp(b, tz), facecolor="none",
                       edgecolor=LEARNING_FILL, hatch="///", lw=0, alpha=0.45, zorder=0)
            ax.text(datetime.fromtimestamp(a, tz), 0.97, " learning", transform=ax.get_xaxis_transform(),
                    va="top", ha="left", fontsize=8, color="#555")
        min_width = MIN_SPAN_FRACTION * (t1 - t0)
        for br in breaches:
            a = max(br.start, t0)
            b = max(min(br.end, t1), a + min_width)
            ax.axvspan(datetime.fromtimestamp(a, tz), datetime.fromtimestamp(b, tz), color=BREACH_FILL,
                       lw=0, zorder=0.5)
            if br.start >= t0:
                ax.plot([datetime.fromtimestamp(br.start, tz)], [1.0], marker="v", ms=9, color=BREACH_MARK,
                        transform=ax.get_xaxis_transform(), clip_on=False, zorder=5)
        ax.fill_between(t, cols["lower"][sel], cols["upper"][sel], color=BAND_FILL, lw=0, zorder=1)
        ax.plot(t, cols["expected"][sel], color=EXPECTED_LINE, lw=1, ls=(0, (5, 3)), zorder=2)
        ax.plot(t, cols["observed"][sel], color=OBSERVED_LINE, lw=0.9 if len(t) > 3000 else 1.2, zorder=3)
        ax.set_title(key, fontsize=10, loc="left", pad=12)
        ax.set_ylabel(unit if unit else "value", fontsize=9)
        ax.set_xlabel(f"time ({rule.timezone})", fontsize=9)
        locator = mdates.AutoDateLocator(tz=tz)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=tz))
        ax.set_xlim(datetime.fromtimestamp(t0, tz), datetime.fromtimestamp(t1, tz))
        ax.grid(True, color="#eceff3", lw=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        handles = [Patch(color=BAND_FILL, label="band"),
                   plt.Line2D([], [], color=EXPECTED_LINE, ls=(0, (5, 3)), label="expected"),
                   plt.Line2D([], [], color=OBSERVED_LINE, label="observed"),
                   Patch(color=BREACH_FILL, label="breach"),
                   plt.Line2D([], [], color=BREACH_MARK, marker="v", ls="", label="breach opened"),
                   Patch(facecolor="none", edgecolor=LEARNING_FILL, hatch="///", label="learning")]
        if not shows_learning:
            handles.pop()
        fig.legend(handles=handles, loc="lower center", ncol=6, fontsize=8, frameon=False)
        fig.tight_layout(rect=(0, 0.07, 1, 1))
        path = out / f"{safe_name(key)}.png"
        fig.savefig(path)
        plt.close(fig)
        written.append(path)
        listed.append((key, path, breaches, unit, tz))
    if index and listed:
        write_index(out / "index.html", listed)
    return written


def write_index(path: Path, listed) -> None:
    """``index.html``: every plotted series, its plot, and a line per breach."""
    rows = []
    for key, png, breaches, unit, tz in listed:
        items = "".join(
            f"<li>{html.escape(b.direction)} from {_when(b.start, tz)}"
            + (" (still open)" if b.still_open else f", lasted {_lasted(b.end - b.start)}") + "</li>"
            for b in breaches) or "<li>no breach in this window</li>"
        rows.append(f'<section><h2><a href="{html.escape(png.name)}">{html.escape(key)}</a>'
                    f'{" <small>(" + html.escape(unit) + ")</small>" if unit else ""}</h2>'
                    f'<ul>{items}</ul><a href="{html.escape(png.name)}">'
                    f'<img src="{html.escape(png.name)}" width="720" alt="band of {html.escape(key)}"></a>'
                    "</section>")
    path.write_text(
        "<!doctype html><html><head><meta charset='utf-8'><title>streamdet plots</title>"
        "<style>body{font-family:sans-serif;margin:2em;max-width:70em}h2{font-size:1em}"
        f"li{{color:{BREACH_MARK}}}</style></head><body>"
        f"<h1>streamdet: {len(listed)} series</h1>" + "".join(rows) + "</body></html>", encoding="utf-8")
