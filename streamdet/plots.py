"""PNG plots of replayed series: observed line, the learnt band, and breach spans.

Look: observed in dark navy, the band as a pale teal ribbon around a dashed expected line,
breaches as amber spans behind the data.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path

from streamdet.core.engine import Engine
from streamdet.events import CLOSED, OPENED, BreachEvent

OBSERVED = "#14213d"
EXPECTED = "#2a9d8f"
BAND = "#bde0dd"
BREACH = "#f4a261"


def safe_name(key: str) -> str:
    """A file name for a series key."""
    return re.sub(r"[^A-Za-z0-9_.=-]+", "_", key).strip("_")[:150] or "series"


def breach_spans(events: Iterable[BreachEvent], end: float) -> dict[str, list[tuple[float, float]]]:
    spans: dict[str, list[tuple[float, float]]] = {}
    open_at: dict[str, float] = {}
    for e in events:
        if e.type == OPENED:
            open_at[e.series] = e.started
        elif e.type == CLOSED and e.series in open_at:
            spans.setdefault(e.series, []).append((open_at.pop(e.series), e.started + (e.duration or 0)))
    for key, start in open_at.items():
        spans.setdefault(key, []).append((start, end))
    return spans


def plot_series(engine: Engine, events: list[BreachEvent], out_dir: str | Path,
                keys: Iterable[str] | None = None, since: float | None = None) -> list[Path]:
    """One PNG per series that breached (or per key in ``keys``), from ``since`` (epoch s) on;
    returns the paths written."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    if engine.log is None:
        raise ValueError("the engine was not recording steps (record_steps=True)")
    cols = engine.log.columns()
    end = float(cols["start"].max()) if cols["start"].size else 0.0
    spans = breach_spans(events, end)
    wanted = list(keys) if keys is not None else sorted(spans)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    for key in wanted:
        row = engine.table.index.get(key)
        if row is None:
            continue
        sel = cols["row"] == row
        if since is not None:
            sel &= cols["start"] >= since
        t = [datetime.fromtimestamp(x, tz=UTC) for x in cols["start"][sel]]
        fig, ax = plt.subplots(figsize=(11, 3.6), dpi=100)
        fig.patch.set_facecolor("white")
        for a, b in spans.get(key, []):
            ax.axvspan(datetime.fromtimestamp(a, tz=UTC), datetime.fromtimestamp(b, tz=UTC),
                       color=BREACH, alpha=0.35, lw=0, label="breach")
        ax.fill_between(t, cols["lower"][sel], cols["upper"][sel], color=BAND, lw=0, label="band")
        ax.plot(t, cols["expected"][sel], color=EXPECTED, lw=1, ls="--", label="expected")
        ax.plot(t, cols["observed"][sel], color=OBSERVED, lw=1.1, label="observed")
        ax.set_title(key, fontsize=10, loc="left")
        if row in engine.table.units:
            ax.set_ylabel(engine.table.units[row], fontsize=9)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(mdates.AutoDateLocator()))
        ax.grid(True, color="#e9ecef", lw=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        handles, labels = ax.get_legend_handles_labels()
        uniq = dict(zip(labels, handles, strict=True))
        ax.legend(uniq.values(), uniq.keys(), loc="upper right", fontsize=8, frameon=False, ncol=4)
        fig.tight_layout()
        path = out / f"{safe_name(key)}.png"
        fig.savefig(path)
        plt.close(fig)
        written.append(path)
    return written

