"""PNG plots of peer groups that had an outlier: every member, the group's median, the outlier
emphasised (``replay --plot``, the demo).

Look: members as thin pale slate lines, the median as a dashed dark teal line, each outlier
member in a thick plum line whose outside spans are shaded lilac with a bracket along the top.
"""

from __future__ import annotations

import itertools
import re
from collections.abc import Iterable
from datetime import UTC, datetime
from pathlib import Path

from streamdet.core.engine import Engine
from streamdet.events import OUTLIER_CLOSED, OUTLIER_OPENED, OutlierEvent
from streamdet.plots import safe_name

MEMBER = "#a9b4c2"
MEDIAN = "#1d6f66"
OUTLIER = ("#6a1b6e", "#b5179e", "#3a0ca3")  # one per outlier member of a group, in turn
OUTSIDE = "#ead7f0"


def outlier_spans(events: Iterable, end: float) -> dict[str, dict[str, list[tuple[float, float]]]]:
    """Per group key, per member series: the spans (first outside step's start, end of the last
    outside step) of its outliers; one still open at the end runs to ``end``."""
    spans: dict[str, dict[str, list[tuple[float, float]]]] = {}
    open_at: dict[tuple[str, str], float] = {}
    for e in events:
        if not isinstance(e, OutlierEvent):
            continue
        if e.type == OUTLIER_OPENED:
            open_at[(e.group, e.series)] = e.started
        elif e.type == OUTLIER_CLOSED and (e.group, e.series) in open_at:
            spans.setdefault(e.group, {}).setdefault(e.series, []).append(
                (open_at.pop((e.group, e.series)), e.started + (e.duration or 0.0)))
    for (group, key), start in open_at.items():
        spans.setdefault(group, {}).setdefault(key, []).append((start, end))
    return spans


def plot_groups(engine: Engine, events: list, out_dir: str | Path,
                since: float | None = None) -> list[Path]:
    """One PNG per peer group that had an outlier (``group-<group key>.png``): every member's
    observed values, the group's median per step (over the members with a value at that step)
    and each outlier member emphasised with its outside spans; returns the paths written."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt
    import numpy as np

    if engine.log is None:
        raise ValueError("the engine was not recording steps (record_steps=True)")
    peers = engine.peer_groups
    cols = engine.log.columns()
    end = float(cols["start"].max()) if cols["start"].size else 0.0
    spans = outlier_spans(events, end)
    if peers is None or not spans:
        return []
    tab = engine.table
    by_key = {info[2]: g for g, info in enumerate(peers.group_info)}
    sel_time = cols["start"] >= since if since is not None else np.ones(cols["start"].shape[0], bool)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    when = lambda x: datetime.fromtimestamp(x, tz=UTC)  # noqa: E731
    for group in sorted(spans):
        g = by_key.get(group)
        if g is None:
            continue
        n = tab.n
        members = np.flatnonzero((peers.state.gid[:n] == g) & (peers.state.derived[:n] == 0))
        sel = sel_time & np.isin(cols["row"], members)
        rows, start, y = cols["row"][sel], cols["start"][sel], cols["observed"][sel]
        if not rows.shape[0]:
            continue
        fig, ax = plt.subplots(figsize=(11, 4.2), dpi=100)
        fig.patch.set_facecolor("white")
        for row in np.unique(rows).tolist():
            m = rows == row
            ax.plot([when(x) for x in start[m]], y[m], color=MEMBER, lw=0.6, alpha=0.8,
                    label="members", zorder=1)
        steps, inv = np.unique(start, return_inverse=True)
        order = np.argsort(inv, kind="stable")
        bounds = np.flatnonzero(np.r_[True, np.diff(inv[order]) != 0, True])
        vals = y[order]
        median = [float(np.median(vals[a:b])) for a, b in itertools.pairwise(bounds)]
        ax.plot([when(x) for x in steps], median, color=MEDIAN, lw=1.4, ls="--", label="group median",
                zorder=3)
        top = float(np.nanmax(y)) if np.isfinite(y).any() else 1.0
        for i, (key, member_spans) in enumerate(sorted(spans[group].items())):
            row = tab.index.get(key)
            if row is None:
                continue
            colour = OUTLIER[i % len(OUTLIER)]
            m = rows == row
            name = _member_name(key, group, tab.meta[row])
            ax.plot([when(x) for x in start[m]], y[m], color=colour, lw=2.2, label=name, zorder=4)
            for a, b in member_spans:
                ax.axvspan(when(a), when(b), color=OUTSIDE, alpha=0.7, lw=0, zorder=0,
                           label="outside its group")
                ax.annotate("", xy=(when(a), top * 1.04), xytext=(when(b), top * 1.04),
                            arrowprops={"arrowstyle": "|-|", "color": colour, "lw": 1.2,
                                        "shrinkA": 0, "shrinkB": 0})
        ax.set_ylim(top=top * 1.1)
        ax.set_title(f"{group}: {members.shape[0]} members", fontsize=10, loc="left")
        if int(members[0]) in tab.units:
            ax.set_ylabel(tab.units[int(members[0])], fontsize=9)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(mdates.AutoDateLocator()))
        ax.grid(True, axis="y", color="#eef0f3", lw=0.6)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        handles, labels = ax.get_legend_handles_labels()
        uniq = dict(zip(labels, handles, strict=True))
        ax.legend(uniq.values(), uniq.keys(), loc="lower right", fontsize=8, frameon=False, ncol=2)
        fig.tight_layout()
        path = out / f"group-{safe_name(group)}.png"
        fig.savefig(path)
        plt.close(fig)
        written.append(path)
    return written


def _member_name(key: str, group: str, meta) -> str:
    """A short legend name for a member: its labels that are not group labels."""
    labels = dict(meta[1]) if meta else {}
    glabels = set(re.findall(r'(\w+)="', group.partition("{")[2]))
    rest = [f"{k}={v}" for k, v in sorted(labels.items()) if k not in glabels]
    return ", ".join(rest) or key
