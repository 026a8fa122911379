"""Score the detector against labelled incident windows, and sweep rule settings in one engine.

Labelled history in, figures out: windows detected and missed, false openings per series-day,
re-opens, detection delay. Openings are temporal breaches and peer-group outliers (a label naming
a member series is detected by that member's outlier as by its breach). The matching functions
are pure (windows and event marks in, counts out) so other comparisons, such as against existing
alerts, can reuse them. A sweep runs every combination of settings through ONE engine by
duplicating each point under a hidden label.

>>> w = [Window(100.0, 200.0)]
>>> m = [Mark(opened=True, time=150.0), Mark(opened=True, time=900.0)]
>>> s = score_series(w, m, slack=0.0, first=0.0, last=86400.0, step=60.0)
>>> s.detected, s.false, s.delays
(1, 1, [50.0])
"""

from __future__ import annotations

import itertools
import math
import multiprocessing
import os
import sys
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import yaml

from streamdet.codecs.common import RecordError, parse_time
from streamdet.config import Config, ConfigError, parse_config, read_config_file
from streamdet.core.engine import Engine
from streamdet.core.points import DecodeError, PointBatch, series_key
from streamdet.events import CLOSED, OPENED, OUTLIER_CLOSED, OUTLIER_OPENED
from streamdet.replay import CHUNK, read_inputs

SWEEP_LABEL = "__sweep"  # hidden label that keeps the copies of one series apart in a sweep
REOPEN_GAP = 3600.0  # an opening this soon after a close of the same series is a re-open
DAY = 86400.0
MIN_SERIES_PER_JOB = 1000  # engine series per worker process before another one pays off


class LabelsError(ValueError):
    """A labels file that cannot be used; the message names the file and the key."""


class SweepError(ValueError):
    """A ``--sweep`` argument that cannot be used; the message names the setting."""


# ---------------------------------------------------------------- pure matching


@dataclass(frozen=True, slots=True)
class Window:
    """A labelled incident: epoch seconds, both ends included."""

    start: float
    end: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Mark:
    """One opened or closed breach (or peer outlier, ``kind="outlier"``) reduced to what
    matching needs: its decision time."""

    opened: bool
    time: float
    kind: str = "breach"


@dataclass(slots=True, kw_only=True)
class SeriesScore:
    """Counts for one series (or a sum of series)."""

    windows: int = 0
    detected: int = 0
    false: int = 0
    reopens: int = 0
    series_days: float = 0.0
    delays: list[float] = field(default_factory=list)

    @property
    def missed(self) -> int:
        return self.windows - self.detected

    def add(self, other: SeriesScore) -> None:
        self.windows += other.windows
        self.detected += other.detected
        self.false += other.false
        self.reopens += other.reopens
        self.series_days += other.series_days
        self.delays.extend(other.delays)

    def to_dict(self) -> dict[str, Any]:
        days = self.series_days
        med, p90 = delay_quantiles(self.delays)
        return {
            "windows": self.windows,
            "detected": self.detected,
            "missed": self.missed,
            "false": self.false,
            "false_per_day": self.false / days if days > 0 else None,
            "reopens": self.reopens,
            "reopens_per_day": self.reopens / days if days > 0 else None,
            "delay_median_s": med,
            "delay_p90_s": p90,
            "series_days": days,
        }


def delay_quantiles(delays: Sequence[float]) -> tuple[float | None, float | None]:
    """Median and 90th percentile (linear interpolation) of the delays; None when empty."""
    if not delays:
        return None, None
    a = np.asarray(delays, dtype=float)
    return float(np.median(a)), float(np.percentile(a, 90))


def series_days(first: float, last: float, step: float) -> float:
    """Length of a series in days: last point minus first point, at least one step."""
    return max(last - first, step) / DAY


def score_series(windows: Sequence[Window], marks: Iterable[Mark], *, slack: float, first: float,
                 last: float, step: float, reopen_gap: float = REOPEN_GAP) -> SeriesScore:
    """Match one series' openings to its labelled windows.

    A window ``[s, e]`` is detected when an opening's decision time lies in ``[s - slack, e]``;
    its delay is the first such opening's time minus ``s`` (negative within the slack). An
    opening inside no ``[s - slack, e]`` is false. An opening at most ``reopen_gap`` seconds
    after a close of the same series and kind (breach or outlier) is a re-open.

    >>> score_series([Window(0, 10)], [Mark(opened=True, time=-5.0)], slack=5.0, first=0.0,
    ...              last=DAY, step=60.0).delays
    [-5.0]
    """
    ordered = sorted(marks, key=lambda m: (m.time, not m.opened))
    opens = np.array([m.time for m in ordered if m.opened], dtype=float)
    score = SeriesScore(windows=len(windows), series_days=series_days(first, last, step))
    covered = np.zeros(opens.shape[0], dtype=bool)
    for w in windows:
        inside = (opens >= w.start - slack) & (opens <= w.end)
        covered |= inside
        if inside.any():
            score.detected += 1
            score.delays.append(float(opens[inside].min() - w.start))
    score.false = int(np.count_nonzero(~covered))
    last_close: dict[str, float] = {}
    for m in ordered:
        if not m.opened:
            last_close[m.kind] = m.time
        elif m.kind in last_close and m.time - last_close[m.kind] <= reopen_gap:
            score.reopens += 1
    return score


def total(scores: Iterable[SeriesScore]) -> SeriesScore:
    out = SeriesScore()
    for s in scores:
        out.add(s)
    return out


# ---------------------------------------------------------------- labels


def _label_time(raw: object, where: str) -> float:
    if isinstance(raw, bool) or not isinstance(raw, int | float | str):
        raise LabelsError(f"{where}: expected an ISO 8601 string or epoch seconds, got {raw!r}")
    try:
        return parse_time(raw)
    except RecordError as exc:
        raise LabelsError(f"{where}: {exc}") from None


def parse_labels(raw: object, source: str = "labels") -> dict[str, list[Window]]:
    """Validate a decoded labels document ``{"name": [[start, end], ...]}``.

    >>> parse_labels({"cpu": [["2024-01-01T00:00:00Z", 1704070800]]})["cpu"]
    [Window(start=1704067200.0, end=1704070800.0)]
    """
    if not isinstance(raw, Mapping):
        raise LabelsError(f"{source}: expected a JSON object mapping names to lists of "
                          f"[start, end] windows, got {type(raw).__name__}")
    out: dict[str, list[Window]] = {}
    for name, windows in raw.items():
        where = f"{source}: key {name!r}"
        if not isinstance(windows, list):
            raise LabelsError(f"{where}: expected a list of [start, end] windows, "
                              f"got {type(windows).__name__}")
        parsed = []
        for i, w in enumerate(windows):
            here = f"{where}, window {i}"
            if not isinstance(w, list) or len(w) != 2:
                raise LabelsError(f"{here}: expected [start, end], got {w!r}")
            start = _label_time(w[0], f"{here} start")
            end = _label_time(w[1], f"{here} end")
            if end < start:
                raise LabelsError(f"{here}: end {w[1]!r} is before start {w[0]!r}")
            parsed.append(Window(start, end))
        out[str(name)] = parsed
    return out


def load_labels(path: str | Path) -> dict[str, list[Window]]:
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise LabelsError(f"{path}: cannot read ({exc.strerror})") from None
    try:
        raw = orjson.loads(data)
    except orjson.JSONDecodeError as exc:
        raise LabelsError(f"{path}: not valid JSON ({exc})") from None
    return parse_labels(raw, str(path))


def resolve_labels(labels: Mapping[str, list[Window]], series_by_file: Mapping[str, Sequence[str]]
                   ) -> tuple[dict[str, list[Window]], list[str]]:
    """Windows per series key; a name is a series key or a file name (with or without extension)
    meaning every series read from that file. Returns the windows and the unmatched names."""
    keys = {k for ks in series_by_file.values() for k in ks}
    by_name: dict[str, set[str]] = {}
    for path, ks in series_by_file.items():
        p = Path(path)
        for name in (p.name, p.stem, str(path)):
            by_name.setdefault(name, set()).update(ks)
    out: dict[str, list[Window]] = {}
    unmatched = []
    for name, windows in labels.items():
        targets = {name} if name in keys else by_name.get(name, set())
        if not targets:
            unmatched.append(name)
        for k in sorted(targets):
            out.setdefault(k, []).extend(windows)
    return {k: sorted(set(v), key=lambda w: (w.start, w.end)) for k, v in out.items()}, unmatched


# ---------------------------------------------------------------- sweep


@dataclass(frozen=True, slots=True)
class Combination:
    """One point of a sweep: dotted rule settings and their values."""

    index: int
    settings: tuple[tuple[str, Any], ...]

    def describe(self) -> str:
        return " ".join(f"{k}={v}" for k, v in self.settings) or "(config as given)"


def parse_sweep(items: Sequence[str]) -> list[Combination]:
    """``["width=2,3", "confirm.steps=3,5"]`` -> every combination, first key varying slowest.

    >>> [c.describe() for c in parse_sweep(["width=2,3", "confirm.steps=5"])]
    ['width=2 confirm.steps=5', 'width=3 confirm.steps=5']
    """
    axes: list[tuple[str, list[Any]]] = []
    for item in items:
        key, sep, values = item.partition("=")
        key = key.strip()
        if not sep or not key or not values.strip():
            raise SweepError(f"--sweep {item!r}: expected KEY=V1,V2,... such as width=2,3,4")
        if any(not part for part in key.split(".")):
            raise SweepError(f"--sweep {item!r}: {key!r} is not a dotted key path")
        if key in (k for k, _ in axes):
            raise SweepError(f"--sweep {item!r}: {key} is given more than once")
        parsed = []
        for text in values.split(","):
            try:
                parsed.append(yaml.safe_load(text.strip()))
            except yaml.YAMLError:
                raise SweepError(f"--sweep {item!r}: cannot read value {text!r}") from None
        axes.append((key, parsed))
    if not axes:
        return [Combination(0, ())]
    names = [k for k, _ in axes]
    return [Combination(i, tuple(zip(names, vals, strict=True)))
            for i, vals in enumerate(itertools.product(*(v for _, v in axes)))]


def _set_path(rule: dict[str, Any], path: str, value: Any, where: str) -> None:
    parts = path.split(".")
    node = rule
    for part in parts[:-1]:
        child = node.get(part)
        if child is None:
            child = node[part] = {}
        elif not isinstance(child, dict):
            raise SweepError(f"{where}: {part!r} is not a section of the rule")
        else:
            child = node[part] = dict(child)
        node = child
    node[parts[-1]] = value


def _raw_rules(raw: Mapping[str, Any]) -> list[dict[str, Any]]:
    rules = raw.get("rules")
    if rules is None:
        return [{"name": "default"}]
    return [dict(r, name=r.get("name", f"rule{i}")) for i, r in enumerate(rules)]


def combination_config(raw: Mapping[str, Any], combo: Combination) -> Config:
    """The config with the combination applied to every rule (for one-by-one runs and checks)."""
    rules = []
    for rule in _raw_rules(raw):
        r = dict(rule)
        for key, value in combo.settings:
            _set_path(r, key, value, f"--sweep {key}")
        rules.append(r)
    try:
        return parse_config({**raw, "rules": rules})
    except ConfigError as exc:
        raise SweepError(f"--sweep {combo.describe()}: " + "; ".join(exc.problems)) from None


def sweep_config(raw: Mapping[str, Any], combos: Sequence[Combination]) -> Config:
    """One config holding a copy of every rule per combination, ``<rule>#<i>``, each selecting
    the series copies labelled ``__sweep="<i>"``; the series cap grows with the copies."""
    rules = []
    for combo in combos:
        combination_config(raw, combo)  # each combination must be valid on its own
        for rule in _raw_rules(raw):
            r = dict(rule)
            for key, value in combo.settings:
                _set_path(r, key, value, f"--sweep {key}")
            match = dict(r.get("match") or {})
            match["labels"] = {**(match.get("labels") or {}), SWEEP_LABEL: str(combo.index)}
            r["match"] = match
            r["name"] = f"{r['name']}#{combo.index}"
            rules.append(r)
    try:
        cfg = parse_config({**raw, "rules": rules})
    except ConfigError as exc:
        raise SweepError("sweep: " + "; ".join(exc.problems)) from None
    return replace(cfg, series=replace(cfg.series, max_series=cfg.series.max_series * len(combos)))


# ---------------------------------------------------------------- running


@dataclass(slots=True)
class Prepared:
    """Points sorted by time, and per original series its span and sweep copies."""

    points: PointBatch
    spans: dict[str, tuple[float, float, float]]  # key -> (first, last, step)
    copies: dict[str, tuple[str, ...]]  # original key -> key of each combination's copy
    meta: dict[str, tuple[str, Any]]  # copy key -> (metric, labels) for the engine
    origin: dict[str, tuple[str, int]]  # copy key -> (original key, combination index)


def spans(points: PointBatch) -> dict[str, tuple[float, float, float]]:
    """(first time, last time, median spacing) per series; spacing 1 s for a single point."""
    if not len(points):
        return {}
    index: dict[str, int] = {}
    codes = np.fromiter((index.setdefault(k, len(index)) for k in points.keys), np.int64,
                        count=len(points))
    order = np.lexsort((points.time, codes))
    t, c = points.time[order], codes[order]
    bounds = np.flatnonzero(np.diff(c)) + 1
    starts = np.concatenate([[0], bounds])
    ends = np.concatenate([bounds, [len(c)]])
    names = list(index)
    out = {}
    for lo, hi in zip(starts.tolist(), ends.tolist(), strict=True):
        gaps = np.diff(t[lo:hi])
        gaps = gaps[gaps > 0]
        step = float(np.median(gaps)) if gaps.shape[0] else 1.0
        out[names[int(c[lo])]] = (float(t[lo]), float(t[hi - 1]), step)
    return out


def prepare(points: PointBatch, combos: Sequence[Combination]) -> Prepared:
    order = np.argsort(points.time, kind="stable")
    pts = points.take(order) if len(points) else points
    copies: dict[str, tuple[str, ...]] = {}
    meta: dict[str, tuple[str, Any]] = {}
    origin: dict[str, tuple[str, int]] = {}
    sweep = len(combos) > 1 or bool(combos and combos[0].settings)
    for key, (metric, labels) in pts.series.items():
        if not sweep:
            copies[key] = (key,)
            meta[key] = (metric, labels)
            origin[key] = (key, 0)
            continue
        ks = []
        for c in combos:
            lab = tuple(sorted((*((k, v) for k, v in labels if k != SWEEP_LABEL),
                                (SWEEP_LABEL, str(c.index)))))
            k = series_key(metric, lab)
            ks.append(k)
            meta[k] = (metric, lab)
            origin[k] = (key, c.index)
        copies[key] = tuple(ks)
    return Prepared(pts, spans(pts), copies, meta, origin)


Found = tuple[bool, str, int, float, str]  # (opened, original key, combination, time, kind)
_KINDS = {OPENED: (True, "breach"), CLOSED: (False, "breach"), OUTLIER_OPENED: (True, "outlier"),
          OUTLIER_CLOSED: (False, "outlier")}


def run_engine(prep: Prepared, config: Config, index: np.ndarray | None = None) -> list[Found]:
    """Feed the prepared points (optionally only ``index``) through one engine in time order,
    each point once per combination, as :func:`streamdet.replay.replay` does."""
    pts = prep.points
    idx = np.arange(len(pts)) if index is None else index
    n_copies = max(len(v) for v in prep.copies.values()) if prep.copies else 1
    chunk = max(1, CHUNK // n_copies)
    engine = Engine(config)
    events = []
    keys, copies = pts.keys, prep.copies
    for lo in range(0, idx.shape[0], chunk):
        part = idx[lo:lo + chunk]
        if n_copies == 1:
            ks = [copies[keys[i]][0] for i in part.tolist()]
            batch = PointBatch(ks, pts.time[part], pts.value[part], prep.meta)
        else:
            ks = [k for i in part.tolist() for k in copies[keys[i]]]
            batch = PointBatch(ks, np.repeat(pts.time[part], n_copies),
                               np.repeat(pts.value[part], n_copies), prep.meta)
        events.extend(engine.ingest(batch))
    events.extend(engine.finish())
    out = []
    for e in events:
        if e.type not in _KINDS:
            continue
        opened, kind = _KINDS[e.type]
        key, combo = prep.origin.get(e.series, (e.series, 0))
        out.append((opened, key, combo, float(e.time), kind))
    return out


def peer_units(prep: Prepared, config: Config) -> dict[str, str]:
    """Original series key -> its peer group (rule name without the sweep suffix and the
    ``group_by`` values), for series a rule with ``peers`` puts in a group: a group's members
    must share one engine to be judged together."""
    if not any(r.peers is not None for r in config.rules):
        return {}
    out = {}
    for key, copies in prep.copies.items():
        metric, labels = prep.meta[copies[0]]
        lab = dict(labels)
        i = config.rule_for(metric, lab)
        p = None if i is None else config.rules[i].peers
        if p is not None and all(g in lab for g in p.group_by):
            name = config.rules[i].name
            if SWEEP_LABEL in lab:  # a sweep copy: rule `<name>#<combination>`
                name = name.rpartition("#")[0]
            out[key] = series_key(name, tuple((g, lab[g]) for g in p.group_by))
    return out


def split_series(points: PointBatch, groups: int, together: Mapping[str, str] | None = None
                 ) -> list[np.ndarray]:
    """Point indices per group of whole series, groups balanced by point count (greedy,
    deterministic); empty groups dropped. Series with the same ``together`` value (a peer
    group) go to the same group."""
    together = together or {}
    counts: dict[str, int] = {}
    for k in points.keys:
        u = together.get(k, k)
        counts[u] = counts.get(u, 0) + 1
    load = [0] * groups
    group_of: dict[str, int] = {}
    for k in sorted(counts, key=lambda k: (-counts[k], k)):
        g = load.index(min(load))
        group_of[k] = g
        load[g] += counts[k]
    codes = np.fromiter((group_of[together.get(k, k)] for k in points.keys), np.int64, count=len(points))
    parts = [np.flatnonzero(codes == g) for g in range(groups)]
    return [p for p in parts if p.shape[0]]


_WORK: tuple[Prepared, Config, list[np.ndarray]] | None = None  # inherited by forked workers


def _work(i: int) -> list[Found]:
    assert _WORK is not None
    prep, config, parts = _WORK
    return run_engine(prep, config, parts[i])


def run_all(prep: Prepared, config: Config, jobs: int = 1, *,
            min_series_per_job: int = MIN_SERIES_PER_JOB) -> list[Found]:
    """Run the engine over all series, split into up to ``jobs`` worker processes (fork).

    Each worker builds its own engine over whole series (and whole peer groups), so the
    openings do not depend on ``jobs``. A worker gets at least ``min_series_per_job`` engine
    series (copies included): an engine pays per wave (one per step), so splitting few series
    only repeats that cost.
    """
    global _WORK
    groups = min(jobs, len(prep.spans), len(prep.meta) // max(1, min_series_per_job))
    if groups <= 1 or "fork" not in multiprocessing.get_all_start_methods():
        return run_engine(prep, config)
    parts = split_series(prep.points, groups, peer_units(prep, config))
    _WORK = (prep, config, parts)
    try:
        with multiprocessing.get_context("fork").Pool(len(parts)) as pool:
            results = pool.map(_work, range(len(parts)))
    finally:
        _WORK = None
    return [f for r in results for f in r]


# ---------------------------------------------------------------- evaluation


@dataclass(slots=True)
class Evaluation:
    """Scores per combination: ``series[i][key]`` and ``overall[i]``."""

    combos: list[Combination]
    series: list[dict[str, SeriesScore]]
    overall: list[SeriesScore]
    unmatched_labels: list[str]
    errors: list[DecodeError]

    def best(self, target_false_per_day: float) -> int | None:
        """Most detected among combinations at or under the target; ties: fewest false, then
        shortest median delay. None when no combination meets the target."""
        ok = []
        for c in self.combos:
            s = self.overall[c.index]
            d = s.to_dict()
            if d["false_per_day"] is not None and d["false_per_day"] <= target_false_per_day:
                med = d["delay_median_s"]
                ok.append((-s.detected, s.false, math.inf if med is None else med, c.index))
        return min(ok)[3] if ok else None

    def to_json(self, index: int = 0) -> dict[str, Any]:
        return {"overall": self.overall[index].to_dict(),
                "series": {k: v.to_dict() for k, v in sorted(self.series[index].items())}}


def score_all(found: Iterable[Found], prep: Prepared, windows: Mapping[str, list[Window]],
              combos: Sequence[Combination], slack: float) -> tuple[list[dict[str, SeriesScore]],
                                                                   list[SeriesScore]]:
    marks: dict[tuple[str, int], list[Mark]] = {}
    for opened, key, combo, t, kind in found:
        marks.setdefault((key, combo), []).append(Mark(opened=opened, time=t, kind=kind))
    series, overall = [], []
    for c in combos:
        per = {}
        for key, (first, last, step) in prep.spans.items():
            per[key] = score_series(windows.get(key, []), marks.get((key, c.index), []),
                                    slack=slack, first=first, last=last, step=step)
        series.append(per)
        overall.append(total(per.values()))
    return series, overall


def evaluate(paths: Sequence[str | Path], config_raw: Mapping[str, Any],
             labels: Mapping[str, list[Window]], *, slack: float = 900.0,
             sweep: Sequence[str] = (), jobs: int = 1, fmt: str | None = None,
             now: float | None = None, min_series_per_job: int = MIN_SERIES_PER_JOB) -> Evaluation:
    """Read the files, run every combination in one engine (per worker), score each."""
    combos = parse_sweep(sweep)
    base = combination_config(config_raw, Combination(0, ()))
    config = sweep_config(config_raw, combos) if combos[0].settings else base
    batches, errors, by_file = [], [], {}
    for p in paths:
        pts, errs, _records = read_inputs([p], base, fmt=fmt, now=now)
        batches.append(pts)
        errors.extend(errs)
        by_file[str(p)] = sorted(set(pts.keys))
    windows, unmatched = resolve_labels(labels, by_file)
    prep = prepare(PointBatch.concat(batches), combos)
    found = run_all(prep, config, jobs, min_series_per_job=min_series_per_job)
    series, overall = score_all(found, prep, windows, combos, slack)
    return Evaluation(combos, series, overall, unmatched, errors)


# ---------------------------------------------------------------- text output


def format_seconds(s: float | None) -> str:
    """Readable signed duration: ``-5m``, ``1h05m``, ``2d03h``; ``-`` for None.

    >>> format_seconds(-300), format_seconds(3900), format_seconds(183600), format_seconds(42)
    ('-5m', '1h05m', '2d03h', '42s')
    """
    if s is None:
        return "-"
    sign = "-" if s < 0 else ""
    a = abs(s)
    if a < 60:
        return f"{sign}{a:.0f}s"
    if a < 3600:
        return f"{sign}{a / 60:.0f}m"
    if a < DAY:
        h, m = divmod(round(a / 60), 60)
        return f"{sign}{h}h{m:02d}m"
    d, h = divmod(round(a / 3600), 24)
    return f"{sign}{d}d{h:02d}h"


def _rate(x: float | None) -> str:
    return "-" if x is None else f"{x:.3f}"


def score_table(rows: Sequence[tuple[str, SeriesScore]]) -> str:
    """One line per (name, score): windows, detected, missed, false, rates, delays."""
    head = ["", "windows", "detected", "missed", "false", "false/day", "reopens/day",
            "delay med", "delay p90"]
    body = []
    for name, s in rows:
        d = s.to_dict()
        body.append([name, str(s.windows), str(s.detected), str(s.missed), str(s.false),
                     _rate(d["false_per_day"]), _rate(d["reopens_per_day"]),
                     format_seconds(d["delay_median_s"]), format_seconds(d["delay_p90_s"])])
    return _table(head, body)


def sweep_table(ev: Evaluation) -> str:
    head = ["#", "settings", "detected", "false", "false/day", "reopens/day", "delay med"]
    body = []
    for c in ev.combos:
        s = ev.overall[c.index]
        d = s.to_dict()
        body.append([str(c.index), c.describe(), f"{s.detected}/{s.windows}", str(s.false),
                     _rate(d["false_per_day"]), _rate(d["reopens_per_day"]),
                     format_seconds(d["delay_median_s"])])
    return _table(head, body)


def _table(head: list[str], body: list[list[str]]) -> str:
    widths = [max(len(r[i]) for r in [head, *body]) for i in range(len(head))]
    lines = []
    for r in [head, *body]:
        cells = [r[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(r[1:], widths[1:], strict=True)]
        if len(head) > 1 and head[1] == "settings":
            cells[1] = r[1].ljust(widths[1])
        lines.append("  ".join(cells).rstrip())
    return "\n".join(lines)


def report(ev: Evaluation, *, target: float | None = None) -> tuple[str, int | None]:
    """The text report and the chosen combination (best under target, or 0 without a sweep)."""
    lines = []
    if len(ev.combos) == 1 and not ev.combos[0].settings:
        rows = sorted(ev.series[0].items())
        rows.append(("overall", ev.overall[0]))
        lines.append(score_table(rows))
        chosen: int | None = 0
        if target is not None:
            fpd = ev.overall[0].to_dict()["false_per_day"]
            ok = fpd is not None and fpd <= target
            lines.append(f"false alarms per series-day {_rate(fpd)} "
                         f"{'meets' if ok else 'does NOT meet'} the target {target:g}")
        return "\n".join(lines), chosen
    lines.append(sweep_table(ev))
    chosen = None
    if target is not None:
        chosen = ev.best(target)
        if chosen is None:
            lines.append(f"no combination meets --target-false-per-day {target:g}")
        else:
            lines.append(f"best at or under {target:g} false per series-day: #{chosen} "
                         f"{ev.combos[chosen].describe()}")
            lines.append(score_table([*sorted(ev.series[chosen].items()),
                                      ("overall", ev.overall[chosen])]))
    return "\n".join(lines), chosen


def json_document(ev: Evaluation, chosen: int | None) -> dict[str, Any]:
    """``{"overall", "series"}``; with a sweep also ``"sweep"`` (every combination's overall)
    and ``"best"``; top-level overall/series are then those of the best (or of #0)."""
    doc = ev.to_json(chosen if chosen is not None else 0)
    if len(ev.combos) > 1 or ev.combos[0].settings:
        doc["sweep"] = [{"index": c.index, "settings": dict(c.settings),
                         "overall": ev.overall[c.index].to_dict()} for c in ev.combos]
        doc["best"] = chosen
    return doc


def read_config_raw(path: str | None) -> dict[str, Any]:
    """The YAML document of a config file (validated in full), or {} for built-in defaults."""
    if not path:
        return {}
    raw = read_config_file(path)
    parse_config(raw)  # raises ConfigError naming every bad key (and refuses non-mappings)
    assert isinstance(raw, dict)
    return raw


def default_jobs() -> int:
    return os.cpu_count() or 1


def warn(msg: str) -> None:
    print(f"streamdet evaluate: {msg}", file=sys.stderr)
