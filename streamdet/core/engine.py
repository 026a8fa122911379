"""The engine: points in, breach events out. Pure: no clock, no I/O.

``Engine.ingest(batch)`` resolves series, buckets points into steps, and for every step that
closes runs the forecasters, the blend, the band and the confirm logic over all series whose
step closed at once (a *wave*), returning the breach events those steps decided.
``snapshot()`` / ``restore()`` move the whole state as bytes.

>>> import numpy as np
>>> from streamdet.config import parse_config
>>> from streamdet.core.points import PointBatch
>>> eng = Engine(parse_config({"rules": [{"name": "all", "step": "60s", "warmup": "10 steps"}]}))
>>> t = np.arange(0, 3600, 60.0)
>>> y = np.where(t >= 3000, 50.0, 10.0 + np.sin(t))
>>> events = eng.ingest(PointBatch(["q"] * len(t), t, y, {"q": ("q", ())}))
>>> [(e.type, e.direction) for e in events]
[('streamdet.breach.opened', 'above')]
"""

from __future__ import annotations

import math
import zoneinfo
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np

from streamdet.config import Config, Rule
from streamdet.core import breach_events, peer_groups
from streamdet.core.columns import ColumnState, per_rule, row_numbers
from streamdet.core.confirm import BreachState
from streamdet.core.evidence import EvidenceWindow, combined_surprise, critical_statistic
from streamdet.core.forecast import StepContext
from streamdet.core.forecast.base import as_index
from streamdet.core.judge import TemporalJudge
from streamdet.core.mutes import Mute, MuteError, Mutes, mute_from_json
from streamdet.core.points import MAX_TIME, MIN_TIME, PointBatch, shorten
from streamdet.core.recent import RecentBand, RecentSteps
from streamdet.core.relevel import RunTracker
from streamdet.core.series import SeriesTable
from streamdet.core.snapshot import (  # noqa: F401 (SNAPSHOT_VERSION, SnapshotError: re-exported)
    SNAPSHOT_VERSION,
    RestoreReport,
    RuleChange,
    SnapshotError,
    SnapshotParts,
    StateChangeError,
    copy_columns,
    decode_snapshot,
    encode_snapshot,
)
from streamdet.core.steps import (
    AGGREGATION_CODES,
    ClosedSteps,
    Steps,
    running_clock,
    series_running_clock,
)
from streamdet.events import BreachEvent, rfc3339

AUTO_STEP_POINTS = 6
DROPPED_NOTES = 20  # dropped points described per ingest call (the rest are only counted)
DROP_REASONS = {"late_series": "late after their series moved on",
                "late_grace": "late after the partition's grace", "bad_time": "with an impossible time"}
NICE_STEPS = (1, 2, 5, 10, 15, 20, 30, 60, 120, 300, 600, 900, 1200, 1800, 3600, 7200, 10800,
              21600, 43200, 86400, 604800)


def infer_step(times: list[float]) -> float | None:
    """Spacing of a series from its first points: the median gap, snapped to a round step
    when within 2 %. None while fewer than two distinct times are known.

    >>> infer_step([0, 59.5, 120, 180.2, 240])
    60.0
    """
    t = np.unique(np.asarray(times, dtype=np.float64))
    if t.shape[0] < 2:
        return None
    gap = float(np.median(np.diff(t)))
    for nice in NICE_STEPS:
        if abs(gap - nice) <= 0.02 * nice:
            return float(nice)
    return round(gap, 3)


@dataclass(slots=True)
class StepLog:
    """Every judged step of every series (kept only when asked for, e.g. for plots)."""

    parts: list[tuple[np.ndarray, ...]] = field(default_factory=list)

    def add(self, *cols: np.ndarray) -> None:
        self.parts.append(tuple(c.copy() for c in cols))

    def columns(self) -> dict[str, np.ndarray]:
        names = ("row", "start", "observed", "expected", "lower", "upper", "judged", "p")
        if not self.parts:
            return {n: np.empty(0) for n in names}
        return {n: np.concatenate([p[i] for p in self.parts]) for i, n in enumerate(names)}


@dataclass(frozen=True, slots=True)
class DroppedPoint:
    """A point the engine dropped, and why: ``late_series`` (its series had moved past the
    step's end plus lateness), ``late_grace`` (the partition's event time had passed the step's
    end plus grace) or ``bad_time`` (not a time a calendar can show).

    ``behind`` is how far the point's time is behind the clock that closed its step, and
    ``allowed`` the lateness or grace that clock had to exceed.
    """

    key: str
    time: float
    reason: str
    behind: float = math.nan
    allowed: float = math.nan

    def __str__(self) -> str:
        key = shorten(self.key, 200)
        if self.reason == "bad_time":
            return f"{key}: time {self.time!r} is not a finite number within the years 1 to 9999"
        whose = ("its series' newest point" if self.reason == "late_series"
                 else "the partition's newest point")
        allowance = "lateness" if self.reason == "late_series" else "grace"
        return (f"{key}: late point at {rfc3339(self.time)} dropped, its step had closed: "
                f"{self.behind:.0f} s behind {whose} ({allowance} {self.allowed:g} s after the step's end)")


class Engine:
    """Online detection for every series the configured rules select."""

    def __init__(self, config: Config, *, record_steps: bool = False) -> None:
        self.config = config
        rules = config.rules
        self.table = SeriesTable(config)
        cap = self.table.capacity
        self.steps = Steps(cap)
        self.judge = TemporalJudge(config, cap)
        self.members = self.judge.members
        self.evidence = EvidenceWindow(cap)
        self.breaches = BreachState(cap)
        self.runs = RunTracker(cap)
        self.parts: list[ColumnState] = [self.table, self.steps, *self.judge.parts, self.evidence,
                                         self.breaches, self.runs]
        # --- series bands: the last engine.recent_steps steps per series (None: not kept)
        self.recent = RecentSteps(cap, config.recent_steps) if config.recent_steps else None
        if self.recent is not None:
            self.parts.append(self.recent)
        # --- end series bands
        self.rule_agg = np.array([AGGREGATION_CODES[r.aggregation] for r in rules], np.int64)
        self.rule_counter = np.array([r.kind == "counter" for r in rules], dtype=bool)
        self.rule_window = np.array([r.confirm_steps for r in rules], np.int64)
        self.rule_clear = np.array([r.clear_steps for r in rules], np.int64)
        # The surprise that opens a breach, per rule and side (inf: side not watched); the open
        # rarity is split evenly over the watched sides (Bonferroni). Fisher's statistic for
        # independent steps at that rarity is a cheap necessary condition (dependence only
        # makes evidence weaker), so the exact combination is computed for few rows.
        self.rule_sides = np.array([2 if r.direction == "either" else 1 for r in rules], np.int64)
        watched = np.array([[r.direction in (d, "either") for d in ("rise", "drop")] for r in rules])
        alpha = np.array([r.open_rarity for r in rules]) / self.rule_sides
        self.rule_need = np.where(watched, -np.log10(alpha)[:, None], np.inf)
        self.rule_crit = np.where(watched, np.array([[critical_statistic(a, r.confirm_steps)]
                                                     for a, r in zip(alpha, rules, strict=True)]),
                                  np.inf)
        self.rule_unusual = np.array([r.unusual_rarity for r in rules])
        self.any_auto = any(r.step is None for r in rules)
        self.any_lateness = any(r.lateness > 0 for r in rules)
        # Never beyond idle_ttl: a quiet series' last step is judged before it is forgotten.
        self.rule_grace = np.array([min(r.grace, config.series.idle_ttl) for r in rules])
        self.one_grace = bool((self.rule_grace == self.rule_grace[0]).all())
        self.any_counter = bool(self.rule_counter.any())
        # Rules whose hours follow a local time zone (index -> zone); empty: all UTC.
        self.zones = {i: zoneinfo.ZoneInfo(r.timezone) for i, r in enumerate(rules) if r.timezone != "UTC"}
        self.clock = -math.inf
        self.counters: Counter[str] = Counter()
        # Points the last ingest dropped: a few described, all counted by reason (for logs).
        self.dropped: list[DroppedPoint] = []
        self.dropped_counts: Counter[str] = Counter()
        self.pending: dict[int, list[tuple[float, float]]] = {}
        self.next_eviction = -math.inf
        self.log = StepLog() if record_steps else None
        self.announce = breach_events.Announcer(self)
        # peer groups: a second judge over the same closed steps (None: no rule has peers)
        self.peer_groups = peer_groups.PeerJudge(self) if any(r.peers for r in rules) else None
        if self.peer_groups is not None:
            self.parts.extend(self.peer_groups.parts)
        self.restore_report: RestoreReport | None = None  # set by restore()
        self.restore_events: list[BreachEvent] = []  # closed events restore() decided
        # --- mutes (silences and maintenance windows): the table; per mute, made when a wave
        # first falls in its window, the rows already matched and which of them it selects;
        # and the ids expired by data time since the daemon last looked
        self.mutes = Mutes(config.mutes)
        self._mute_cols: dict[str, tuple[Mute, np.ndarray, np.ndarray]] = {}
        self.mutes_expired: list[str] = []
        # --- end mutes

    # ------------------------------------------------------------ series lifecycle

    def _on_new(self, rows: np.ndarray) -> None:
        cap = self.table.capacity
        for part in self.parts:
            part.grow(cap)
            if part is not self.table:
                part.reset(rows)
        for _m, known, _hit in self._mute_cols.values():  # --- mutes: a reused row is another series
            known[rows[rows < known.shape[0]]] = False
        t = self.table
        keep_rule = t.rule[rows].copy()
        t.reset(rows)
        t.rule[rows] = keep_rule
        for rule_i in np.unique(keep_rule).tolist():
            rule = self.config.rules[rule_i]
            if rule.step is not None:
                self._set_step(rows[keep_rule == rule_i], rule, rule.step)
        self.counters["series_created"] += rows.shape[0]

    def _set_step(self, rows: np.ndarray, rule: Rule, step: float) -> None:
        t = self.table
        t.step[rows] = step
        t.lateness[rows] = min(rule.lateness, 0.99 * step)
        t.warmup[rows] = rule.warmup.in_steps(step, minimum=20 if rule.warmup.steps is None else 1)
        # A re-level must leave room for a breach to open and close first.
        t.relearn[rows] = rule.relearn_after.in_steps(step, minimum=rule.confirm_steps + rule.clear_steps)
        t.rearm[rows] = rule.rearm.in_steps(step, minimum=1) * step

    def _evict(self) -> list[BreachEvent]:
        ttl = self.config.series.idle_ttl
        if self.clock < self.next_eviction:
            return []
        self.next_eviction = self.clock + ttl / 8
        n = self.table.n
        live = self.table.live()
        idle = np.flatnonzero(live & (self.table.last_seen[:n] < self.clock - ttl))
        if idle.shape[0] == 0:
            return []
        events = []
        for row in idle.tolist():
            if self.breaches.status[row] != 0:
                events.append(self.announce.closed_idle(row))
            if self.peer_groups is not None and (ev := self.peer_groups.closed_idle(row)):
                events.append(ev)
            self.pending.pop(row, None)
        self.table.release(idle)
        self.steps.k[idle] = -1  # a freed row keeps no open step
        self.counters["series_evicted"] += idle.shape[0]
        return events

    # ------------------------------------------------------------ ingest

    def ingest(self, batch: PointBatch) -> list[BreachEvent]:
        """Take a batch of points (in arrival order); return the events its closed steps decided.

        Points dropped as late or with an impossible time are counted by reason in
        ``counters`` and, for this call, in ``dropped_counts``; the first few are described in
        ``dropped``.
        """
        n_in = len(batch)
        self.counters["points_in"] += n_in
        self.dropped = []
        self.dropped_counts = Counter()
        if n_in == 0:
            return []
        if not (batch.time.min() >= MIN_TIME and batch.time.max() <= MAX_TIME):  # NaN fails too
            batch = self._drop_bad_times(batch)
            if len(batch) == 0:
                return []
        rows, no_rule, over_cap = self.table.resolve(batch, self._on_new)
        self.counters["points_no_rule"] += no_rule
        self.counters["points_series_limit"] += over_cap
        ok = rows >= 0
        rows, t, v = rows[ok], batch.time[ok], batch.value[ok]
        if rows.shape[0] == 0:
            return []
        tab = self.table
        # Event time per series (its newest point, kept in last_seen) and per partition (the
        # engine's clock), each as it stood when the point arrived: running maxima in arrival
        # order, so batching cannot change which points are late.
        unique_rows = np.bincount(rows).max() == 1
        series_seen = tab.last_seen[rows]
        if unique_rows:
            tab.last_seen[rows] = np.maximum(series_seen, t)
        else:
            series_seen = series_running_clock(series_seen, rows, t)
            np.maximum.at(tab.last_seen, rows, t)
        seen_clock = running_clock(self.clock, t)
        self.clock = max(self.clock, float(t.max()))
        step = tab.step[rows]
        released = None
        if self.any_auto:
            unknown = np.isnan(step)
            if unknown.any():
                released = self._buffer_auto(rows[unknown], t[unknown], v[unknown])
                known = ~unknown
                rows, t, v, step, seen_clock, series_seen = (
                    rows[known], t[known], v[known], step[known], seen_clock[known], series_seen[known])
        k = np.floor(t / step).astype(np.int64)
        end = (k + 1) * step
        lateness = tab.lateness[rows] if self.any_lateness else 0.0
        grace = self._grace_of(rows)
        # Late: the point's own step had closed for its series when it arrived.
        late = end <= np.maximum(series_seen - lateness if self.any_lateness else series_seen,
                                 seen_clock - grace)
        n_late = int(np.count_nonzero(late))
        if n_late:
            self._note_late(late, rows, t, end, series_seen, seen_clock, lateness, grace)
            keep = ~late
            rows, t, v, k = rows[keep], t[keep], v[keep], k[keep]
        seq = np.arange(rows.shape[0], dtype=np.int64)
        reorder = released is not None
        if released is not None:
            rr, rt, rv = released
            rows = np.concatenate([rr, rows])
            t = np.concatenate([rt, t])
            v = np.concatenate([rv, v])
            seq = np.concatenate([np.arange(rr.shape[0]) - rr.shape[0], seq])
        if self.any_counter or tab.any_counter:
            # --- formats: a series is a counter by its rule or by its format (OTLP cumulative sums)
            counter = self.rule_counter[tab.rule[rows]]
            if tab.any_counter:
                counter = counter | (tab.counter[rows] != 0)
            # --- end formats
            if counter.any():
                rows, t, v, seq = self._counters_to_rates(rows, t, v, seq, counter)
                reorder = True
        self.counters["points_accepted"] += rows.shape[0]
        if reorder:
            k = np.floor(t / tab.step[rows]).astype(np.int64)
        # Dropping late points keeps rows unique; added held or rate points may not.
        closed = self.steps.merge(rows, k, t, v, seq, self._agg_of, tab.step.__getitem__,
                                  self._close_limit, unique=None if reorder else unique_rows)
        return self._judge_all(closed) + self._evict()

    def _close_limit(self, rows: np.ndarray | slice) -> np.ndarray:
        """Per row: its steps ending at or before this are closed. The series' own clock minus
        lateness, or the partition's clock minus grace, whichever is later."""
        tab = self.table
        own = tab.last_seen[rows] - tab.lateness[rows] if self.any_lateness else tab.last_seen[rows]
        return np.maximum(own, self.clock - self._grace_of(rows))

    def _grace_of(self, rows: np.ndarray | slice) -> np.ndarray | float:
        """Grace per row; one number when all rules share it (no gather)."""
        if self.one_grace:
            return float(self.rule_grace[0])
        return per_rule(self.rule_grace, self.table.rule[rows])

    def _drop_bad_times(self, batch: PointBatch) -> PointBatch:
        """Drop (count, describe) points whose time is NaN, infinite or beyond the calendar."""
        t = batch.time
        bad = ~((t >= MIN_TIME) & (t <= MAX_TIME))
        idx = np.flatnonzero(bad)
        self.counters["points_bad_time"] += idx.shape[0]
        self.dropped_counts["bad_time"] += idx.shape[0]
        for i in idx[:DROPPED_NOTES].tolist():
            self.dropped.append(DroppedPoint(batch.keys[i], float(t[i]), "bad_time"))
        return batch.take(np.flatnonzero(~bad))

    def _note_late(self, late, rows, t, end, series_seen, seen_clock, lateness, grace) -> None:
        """Count late points by reason and describe the first few (series key, how far behind)."""
        idx = np.flatnonzero(late)
        lat = lateness[idx] if isinstance(lateness, np.ndarray) else np.full(idx.shape[0], lateness)
        gr = grace[idx] if isinstance(grace, np.ndarray) else np.full(idx.shape[0], grace)
        by_series = end[idx] <= series_seen[idx] - lat
        n_series = int(np.count_nonzero(by_series))
        self.counters["points_late"] += idx.shape[0]
        self.counters["points_late_series"] += n_series
        self.counters["points_late_grace"] += idx.shape[0] - n_series
        for reason, n in (("late_series", n_series), ("late_grace", idx.shape[0] - n_series)):
            if n:
                self.dropped_counts[reason] += n
        room = DROPPED_NOTES - len(self.dropped)
        for j in range(min(room, idx.shape[0])):
            i = int(idx[j])
            own = bool(by_series[j])
            clock = series_seen[i] if own else seen_clock[i]
            self.dropped.append(DroppedPoint(
                self.table.keys[int(rows[i])] or "?", float(t[i]),
                "late_series" if own else "late_grace", float(clock - t[i]),
                float(lat[j] if own else gr[j])))

    def advance(self, clock: float) -> list[BreachEvent]:
        """Move the partition's event time forward without points (an idle input): closes the
        steps it puts past their end plus grace."""
        if not clock > self.clock:  # never back, and never to NaN
            return []
        self.clock = float(clock)
        return self._judge_all(ClosedSteps.empty()) + self._evict()

    def finish(self) -> list[BreachEvent]:
        """Close every open step (end of a replay). The engine can take more points after."""
        saved = self.clock
        self.clock = math.inf
        try:
            return self._judge_all(ClosedSteps.empty())
        finally:
            self.clock = saved

    def _local_time(self, rule: np.ndarray, start: np.ndarray) -> np.ndarray:
        """Step starts shifted by their rule's UTC offset at that instant (DST included).

        The zone database is asked once per distinct (rule, start) pair of the wave.
        """
        local = start.copy()
        for i, zone in self.zones.items():
            mask = rule == i
            if not mask.any():
                continue
            uniq, inv = np.unique(start[mask], return_inverse=True)
            offsets = np.array([datetime.fromtimestamp(t, zone).utcoffset().total_seconds()
                                for t in uniq.tolist()])
            local[mask] = start[mask] + offsets[inv]
        return local

    def _agg_of(self, rows: np.ndarray) -> np.ndarray:
        return self.rule_agg[self.table.rule[rows]]

    def _counters_to_rates(self, rows, t, v, seq, counter):
        gauge = ~counter
        cr, ct, cv, dropped = self.steps.counter_rates(rows[counter], t[counter], v[counter])
        self.counters["counter_samples_dropped"] += int(dropped.sum())
        self.counters["counter_samples_first"] += int(counter.sum() - cr.shape[0] - dropped.sum())
        return (np.concatenate([rows[gauge], cr]), np.concatenate([t[gauge], ct]),
                np.concatenate([v[gauge], cv]),
                np.concatenate([seq[gauge], np.arange(cr.shape[0]) + 2**40]))

    def _buffer_auto(self, rows, t, v):
        """Hold points of series whose step is still being inferred; release them once known."""
        self.counters["points_held_for_step"] += rows.shape[0]
        ready: list[int] = []
        for row, ti, vi in zip(rows.tolist(), t.tolist(), v.tolist(), strict=True):
            buf = self.pending.setdefault(row, [])
            buf.append((ti, vi))
            if len(buf) == AUTO_STEP_POINTS:
                ready.append(row)
        out_r, out_t, out_v = [], [], []
        for row in ready:
            buf = self.pending[row]
            step = infer_step([p[0] for p in buf])
            if step is None:
                continue
            rule = self.config.rules[int(self.table.rule[row])]
            self._set_step(np.array([row]), rule, step)
            del self.pending[row]
            for ti, vi in sorted(buf, key=lambda p: p[0]):
                out_r.append(row)
                out_t.append(ti)
                out_v.append(vi)
        if not out_r:
            return None
        return (np.asarray(out_r, np.int64), np.asarray(out_t), np.asarray(out_v))

    # ------------------------------------------------------------ judging closed steps

    def _judge_all(self, closed: ClosedSteps) -> list[BreachEvent]:
        events = self._judge_waves(closed)
        if self.peer_groups is not None:  # group steps complete at this clock
            events.extend(self.peer_groups.judge(self.clock))
        if self.mutes:  # --- mutes
            self._expire_mutes()
        return events

    def _judge_waves(self, closed: ClosedSteps) -> list[BreachEvent]:
        tab = self.table
        n = tab.n
        # NaN steps (still being inferred) have no open step, so compare false and never close.
        due = self.steps.due(self._close_limit(slice(0, n)), n, self._agg_of, tab.step[:n])
        if len(due):
            rows = np.concatenate([closed.rows, due.rows])
            k = np.concatenate([closed.k, due.k])
            val = np.concatenate([closed.value, due.value])
            order = np.lexsort((k, rows))
            closed = ClosedSteps(rows[order], k[order], val[order])
        if not len(closed):
            return []
        mute = self._mute_steps(closed) if self.mutes else None  # --- mutes: (muted, no learn)
        if self.peer_groups is not None:
            self.peer_groups.collect(closed if mute is None else ClosedSteps(
                closed.rows[~mute[0]], closed.k[~mute[0]], closed.value[~mute[0]]))
        self.counters["steps_closed"] += len(closed)
        rows = closed.rows
        new_row = np.ones(rows.shape[0], dtype=bool)
        new_row[1:] = rows[1:] != rows[:-1]
        group_start = np.maximum.accumulate(np.where(new_row, np.arange(rows.shape[0]), 0))
        rank = np.arange(rows.shape[0]) - group_start
        events: list[BreachEvent] = []
        if rank.max() == 0:
            if mute is not None:
                return self._judge_muted(rows, closed.k, closed.value, *mute)
            events.extend(self._judge(rows, closed.k, closed.value))
            return events
        order = np.argsort(rank, kind="stable")
        bounds = np.searchsorted(rank[order], np.arange(rank.max() + 2))
        for w in range(rank.max() + 1):
            sel = order[bounds[w]:bounds[w + 1]]
            if mute is not None:
                events.extend(self._judge_muted(rows[sel], closed.k[sel], closed.value[sel],
                                                mute[0][sel], mute[1][sel]))
                continue
            events.extend(self._judge(rows[sel], closed.k[sel], closed.value[sel]))
        return events

    # ------------------------------------------------------------ mutes (core/mutes.py)

    def _mute_steps(self, closed: ClosedSteps) -> tuple[np.ndarray, np.ndarray] | None:
        """Per closed step: muted (no breach opens) and muted without learning; None when no
        mute covers any of these steps. A mute's matcher runs once per row (cached per mute,
        so adding or removing one mute does not match the other mutes again)."""
        tab = self.table
        start = closed.k * tab.step[closed.rows]
        lo, hi = float(start.min()), float(start.max())
        cols = self._mute_cols
        for gone in [i for i, c in cols.items() if c[0] is not self.mutes.entries.get(i)]:
            del cols[gone]  # removed or replaced
        rows = closed.rows
        muted = no_learn = None
        for mid, m in self.mutes.entries.items():
            if not (m.start <= hi and m.end > lo):
                continue
            col = cols.get(mid)
            cap = tab.capacity
            if col is None or col[1].shape[0] < cap:
                known, hit = np.zeros(cap, dtype=bool), np.zeros(cap, dtype=bool)
                if col is not None:  # the table grew
                    known[:col[1].shape[0]], hit[:col[2].shape[0]] = col[1], col[2]
                col = cols[mid] = (m, known, hit)
            _m, known, hit = col
            new = np.unique(rows[~known[rows]])
            for row in new.tolist():
                meta = tab.meta[row]
                hit[row] = meta is not None and m.selects(meta[0], dict(meta[1]))
            known[new] = True
            on = hit[rows] & (start >= m.start) & (start < m.end)
            if not on.any():
                continue
            muted = on if muted is None else muted | on
            if not m.learn:
                no_learn = on if no_learn is None else no_learn | on
        if muted is None:
            return None
        self.counters["steps_muted"] += int(muted.sum())
        return muted, np.zeros_like(muted) if no_learn is None else no_learn

    def _judge_muted(self, rows, k, y, muted, no_learn) -> list[BreachEvent]:
        """One wave with some steps muted. Muted steps open no breach. Without learning they
        are skipped, unless the series' breach is open: then they are judged (so it can close)
        but teach nothing."""
        held = no_learn & (self.breaches.status[rows] != 0)
        events = self._judge(rows[held], k[held], y[held], no_open=True, learn=False) if held.any() else []
        keep = ~no_learn
        if keep.any():
            events += self._judge(rows[keep], k[keep], y[keep], no_open=muted[keep])
        return events

    def _expire_mutes(self) -> None:
        """Drop mutes no open step can fall in any more: the partition's clock minus grace is
        past their end plus the longest step (every step starting before the end has closed)."""
        horizon = self.clock - float(self.rule_grace.max())
        if not math.isfinite(horizon):  # finish() closes steps with an infinite clock
            return
        if not any(m.end <= horizon for m in self.mutes.entries.values()):
            return
        n = self.table.n
        steps = self.table.step[:n]
        longest = float(np.nanmax(steps)) if n and not np.isnan(steps).all() else 0.0
        gone = self.mutes.expire(horizon - longest)
        if gone:
            self.mutes_expired.extend(gone)
            self.counters["mutes_expired"] += len(gone)

    def _judge(self, rows: np.ndarray, k: np.ndarray, y: np.ndarray, *,
               no_open: np.ndarray | bool | None = None, learn: bool = True) -> list[BreachEvent]:
        """One wave: at most one closed step per row, all judged together.

        points -> closed steps -> temporal judge (band, tail probabilities) -> evidence window
        -> shared open/clear/re-arm state -> events; then every part learns from the step.
        Mutes: rows in ``no_open`` cannot open a breach; ``learn=False`` teaches nothing
        (models, residual scale, tails, re-level tracking).
        """
        tab = self.table
        sel = as_index(rows)
        rule = tab.rule[sel]
        step = tab.step[sel]
        start = k * step
        first = tab.first[sel]
        first = np.where(np.isnan(first), start, first)
        tab.first[sel] = first
        local = self._local_time(rule, start) if self.zones else None
        ctx = StepContext.build(rows, rule, start, step, start - first, local)
        a = self.judge.assess(ctx, y)
        judged = (self.judge.band.n[sel] >= tab.warmup[sel]) & a.any_ready
        back = self.runs.returning(sel, start, y - a.centre, a.centre - a.lower, a.upper - a.centre)
        back &= judged & (self.breaches.status[sel] == 0)
        if not learn:  # --- mutes: no return to a previous level either (that moves the models)
            back[:] = False
        if back.any():  # back at the level before a re-level: no evidence, move back below
            a.p_up = np.where(back, 1.0, a.p_up)
            a.p_lo = np.where(back, 1.0, a.p_lo)
        window = self.rule_window[rule]
        stat = self.evidence.add(sel, judged, a.p_up, a.p_lo, window)
        threshold = self.rule_unusual[rule]
        unusual = np.stack([a.p_up < threshold, a.p_lo < threshold], axis=1)
        surprise = self._surprise(sel, judged, stat, rule, unusual, window)
        need = self.rule_need[rule]
        if no_open is not None:  # --- mutes: a muted step opens nothing (closing is unchanged)
            need = np.where(np.asarray(no_open)[..., None], np.inf, need)
        trans = self.breaches.step(sel, judged, surprise, need, unusual, a.score,
                                   start, step, self.rule_clear[rule], tab.rearm[sel])
        side = np.where(y > a.upper, 1, np.where(y < a.lower, -1, 0)) * (judged & ~back)
        in_run = self.runs.run[sel] != 0
        rl = self.runs.step(sel, judged if learn else judged & False, side, y - a.centre, y - a.season,
                            a.scale, tab.relearn[sel], start, step)
        if self.log is not None:
            p_two = np.minimum(1.0, 2.0 * np.minimum(a.p_up, a.p_lo))
            self.log.add(rows, start, y, np.where(a.any_ready, a.centre, np.nan),
                         np.where(judged, a.lower, np.nan), np.where(judged, a.upper, np.nan), judged,
                         np.where(judged, p_two, np.nan))
        if self.recent is not None:  # series bands: one slot per row of the wave
            self.recent.write(rows, sel, np.rint((start - first) / step),
                              np.stack([y, np.where(a.any_ready, a.centre, np.nan),
                                        np.where(judged, a.lower, np.nan),
                                        np.where(judged, a.upper, np.nan)], axis=1),
                              self.breaches.status[sel])
        events = self._events(rows, start, step, y, a, surprise, window, threshold, trans)
        if learn:
            self.judge.learn(ctx, y, a, judged, trans.side != 0, in_run)
        self._relevel(rows, back, rl)
        return events

    def _events(self, rows, start, step, y, a, surprise, window, threshold, trans) -> list[BreachEvent]:
        """Events for the rows that opened or closed in this wave; their evidence starts afresh."""
        changed = trans.opened | trans.closed
        if not changed.any():
            return []
        events: list[BreachEvent] = []
        wave = breach_events.Wave(rows, start, step, y, a, surprise, window)
        for i in np.flatnonzero(changed).tolist():
            row = int(rows[i])
            if trans.opened[i]:
                self._set_since(row, i, wave, float(threshold[i]))
                events.append(self.announce.opened(row, i, wave))
            else:
                reason = ("the band re-levelled after a lasting shift"
                          if trans.closed_after_relearn[i] else "back inside the band")
                events.append(self.announce.closed(row, i, wave, reason))
        self.evidence.clear(rows[changed])
        self.counters["events_opened"] += int(trans.opened.sum())
        self.counters["events_closed"] += int(trans.closed.sum())
        return events

    def _relevel(self, rows: np.ndarray, back: np.ndarray, rl) -> None:
        """Move the forecasters of rows that came back to a previous level or shifted for good."""
        if rl.drifting.any():
            self.counters["drifts_kept_open"] += int(rl.drifting.sum())
        if back.any():
            rb = rows[back]
            self.judge.shift(rb, self.runs.undo[rb])
            self.runs.went_back(rb)
            self.counters["returns_to_previous_level"] += rb.shape[0]
        if rl.relearn.any():
            rr = rows[rl.relearn]
            self.judge.shift(rr, rl.delta[rl.relearn])
            b = self.breaches
            b.relearned[rr] = np.where(b.status[rr] != 0, 1, b.relearned[rr])
            self.counters["relearns"] += rr.shape[0]

    def _surprise(self, sel, judged, stat, rule, unusual, window) -> np.ndarray:
        """Combined surprise per side (Brown's method for the series' learnt correlation, not
        below Tippett's bound for one extreme step), for rows with an open breach or past the
        independent-steps threshold; 0 elsewhere."""
        out = np.zeros(stat.shape)
        cand = judged & ((self.breaches.status[sel] != 0)
                         | (unusual & (stat >= self.rule_crit[rule])).any(axis=1))
        if cand.any():
            i = np.flatnonzero(cand)
            rows = row_numbers(sel)[i]
            out[i] = combined_surprise(stat[i], window[i, None], self.judge.tails.rho(rows)[:, None],
                                       self.evidence.largest(rows))
        return out

    def _set_since(self, row: int, i: int, wave: breach_events.Wave, threshold: float) -> None:
        """Start of the breach: the oldest step in the evidence window that was unusual on the
        breach's side (the opening step itself when none was)."""
        side = int(self.breaches.status[row])
        k = int(wave.window[i])
        ring = self.evidence.ring[row].astype(np.float64)
        pos = int(self.evidence.pos[row])
        cut = -math.log(threshold)
        start = float(wave.start[i])
        step = float(wave.step_at(i))
        since = start
        for age in range(k):
            if side * ring[(pos - 1 - age) % k] >= cut:
                since = start - age * step
        self.breaches.since[row] = since

    # ------------------------------------------------------------ introspection

    def stats(self) -> dict[str, int]:
        """Gauges about the current state (series, learning series, open breaches, bytes)."""
        n = self.table.n
        live = self.table.live()
        learning = live & (self.judge.band.n[:n] < self.table.warmup[:n])
        return {
            "series_active": int(live.sum()),
            "series_learning": int(learning.sum()) + len(self.pending),
            "breaches_open": int((live & (self.breaches.status[:n] != 0)).sum()),
            "outliers_open": 0 if self.peer_groups is None else self.peer_groups.stats()["outliers_open"],
            "mutes_active": self.mutes.active_at(self.clock) if self.mutes else 0,
            "state_bytes": self.state_bytes_per_series() * int(live.sum()),
        }

    def state_bytes_per_series(self) -> int:
        """Bytes of array state one series occupies (all parts, excluding key strings)."""
        return sum(p.bytes_per_row() for p in self.parts)

    def is_learning(self, key: str) -> bool:
        row = self.table.index.get(key)
        if row is None:
            return True
        return bool(self.judge.band.n[row] < self.table.warmup[row]) or row in self.pending

    def recent_band(self, key: str) -> RecentBand | None:
        """The recent steps of series ``key`` (None: unknown series or no ring kept). Safe to
        call from another thread while this one ingests: the copy is consistent or retried."""
        rec, tab = self.recent, self.table
        if rec is None:
            return None
        row = tab.index.get(key)
        if row is None:
            return None
        got = rec.read(row, lambda: (tab.keys[row] if row < len(tab.keys) else None,
                                     float(tab.first[row]), float(tab.step[row]),
                                     int(self.breaches.status[row]), float(self.breaches.since[row])))
        if got is None:
            raise TimeoutError(f"series {shorten(key, 200)}: its band was busy for every read attempt")
        number, values, status, (owner, first, step, open_side, since) = got
        if owner != key:
            return None  # evicted meanwhile
        start = first + number.astype(np.float64) * step if number.shape[0] else np.empty(0)
        v = values.astype(np.float64)
        band = RecentBand(key, start, v[:, 0], v[:, 1], v[:, 2], v[:, 3], status, step,
                          tab.units.get(row))
        band.breaches = band.status_runs()
        if open_side and band.breaches and band.breaches[-1][2] == open_side and math.isfinite(since):
            s0, _e, side = band.breaches[-1]
            band.breaches[-1] = (min(s0, since), math.inf, side)  # still open: no end yet
        return band

    # ------------------------------------------------------------ snapshots
    # Format and report types live in core/snapshot.py; this is the engine side.

    def snapshot(self) -> bytes:
        """All state as bytes (see :mod:`streamdet.core.snapshot`): checksummed, no pickle."""
        return encode_snapshot(self.snapshot_parts())

    def snapshot_parts(self) -> SnapshotParts:
        """A detached copy of the state, quick to take (one copy of the arrays, shallow copies
        of the key lists); :func:`encode_snapshot` turns it into bytes in any thread."""
        tab = self.table
        n = tab.n
        arrays: dict[str, np.ndarray] = {}
        for part in self.parts:
            arrays.update(part.state_views(n))
        columns, layout = copy_columns(arrays)
        header = {
            "rows": n,
            "rules": [r.name for r in self.config.rules],
            "rule_kinds": [r.kind for r in self.config.rules],
            "lag_resolution": self.config.lag_resolution,
            "free": list(tab.free),
            "clock": None if math.isinf(self.clock) else self.clock,
            "next_eviction": None if math.isinf(self.next_eviction) else self.next_eviction,
            "counters": dict(self.counters),
            "pending": {str(k): list(v) for k, v in self.pending.items()},
            "units": {str(k): v for k, v in self.table.units.items()},  # formats: declared units
            "mutes": [m.to_json() for m in self.mutes.api_entries()],  # the config's are re-read
        }
        return SnapshotParts(header, columns, layout, list(tab.keys), list(tab.meta), list(tab.free))

    @classmethod
    def restore(cls, config: Config, data: bytes, *, record_steps: bool = False,
                on_rule_change: str = "drop") -> Engine:
        """Inverse of :meth:`snapshot`; raises SnapshotError on anything damaged or incompatible.

        Rules are matched by name. Series of a rule no longer in the config are dropped; series
        of a rule whose fixed ``step`` or ``kind`` changed learn again from scratch (an open
        breach is closed: ``restore_events``). Every other series takes the rule's current
        warm-up, lateness, re-arm and re-level settings. What happened, by rule, is in
        ``engine.restore_report``; with ``on_rule_change="error"`` any dropped or reset series
        raise :class:`StateChangeError` instead.
        """
        snap = decode_snapshot(data)
        header = snap.header
        if header["lag_resolution"] != config.lag_resolution:
            raise SnapshotError("snapshot was taken with a different engine.lag_resolution")
        eng = cls(config, record_steps=record_steps)
        n = int(header["rows"])
        try:
            for part in eng.parts:
                part.load(snap.arrays, n)
        except ValueError as exc:
            raise SnapshotError(str(exc)) from None
        tab = eng.table
        tab.keys = snap.keys
        tab.meta = snap.meta
        tab.free = [int(r) for r in header["free"]]
        tab.index = dict(zip(tab.keys, range(n), strict=True))
        tab.index.pop(None, None)  # freed rows
        eng.clock = -math.inf if header["clock"] is None else float(header["clock"])
        eng.next_eviction = (-math.inf if header["next_eviction"] is None
                             else float(header["next_eviction"]))
        eng.counters = Counter(header["counters"])
        eng.pending = {int(k): [tuple(p) for p in v] for k, v in header["pending"].items()}
        tab.units = {int(k): str(v) for k, v in header.get("units", {}).items()}  # formats
        try:  # --- mutes: those added over the API (the config's come from the config)
            eng.mutes.replace_api([mute_from_json(m) for m in header.get("mutes", [])])
        except (MuteError, TypeError, AttributeError) as exc:
            raise SnapshotError(f"snapshot holds a bad mute ({exc})") from None
        eng._reconcile_rules(header, on_rule_change)
        return eng

    def _reconcile_rules(self, header: dict, on_rule_change: str) -> None:
        """Map the snapshot's rules onto the config's by name; drop, reset or re-configure rows."""
        tab = self.table
        n = tab.n
        old_names: list[str] = header["rules"]
        old_kinds: list[str] | None = header.get("rule_kinds")  # absent in version 1
        new_index = {r.name: i for i, r in enumerate(self.config.rules)}
        live = np.flatnonzero(tab.rule[:n] >= 0)
        old_rule = tab.rule[live]
        if old_rule.shape[0] and int(old_rule.max()) >= len(old_names):
            raise SnapshotError("snapshot rows name a rule the snapshot does not list")
        open_breach = self.breaches.status[live] != 0
        changes: list[RuleChange] = []
        gone_rows: list[np.ndarray] = []
        for i, name in enumerate(old_names):
            mask = old_rule == i
            count = int(mask.sum())
            if name not in new_index and count:
                changes.append(RuleChange(name, count, "not in the config", "dropped",
                                          int((mask & open_breach).sum())))
                gone_rows.append(live[mask])
        remap = np.array([new_index.get(name, -1) for name in old_names] + [-1], np.int64)
        tab.rule[live] = remap[old_rule]
        reset: list[tuple[Rule, np.ndarray]] = []
        held_dropped = 0
        for ri, rule in enumerate(self.config.rules):
            rows = live[tab.rule[live] == ri]
            if rule.step is None or not rows.shape[0]:
                continue
            step = tab.step[rows]
            inferring = np.isnan(step)
            for row in rows[inferring].tolist():  # held for step inference: the rule is fixed now
                held_dropped += len(self.pending.pop(row, ()))
            tab.step[rows[inferring]] = rule.step
            what = []
            moved = ~inferring & (step != rule.step)
            if moved.any():
                olds = ", ".join(_duration(s) for s in np.unique(step[moved]).tolist())
                what.append(f"step {olds} -> {_duration(rule.step)}")
            old_kind = old_kinds[old_names.index(rule.name)] if old_kinds else rule.kind
            if old_kind != rule.kind:
                moved[:] = True
                what.append(f"kind {old_kind} -> {rule.kind}")
            if moved.any():
                changes.append(RuleChange(rule.name, int(moved.sum()), ", ".join(what), "learning again",
                                          int((self.breaches.status[rows[moved]] != 0).sum())))
                reset.append((rule, rows[moved]))
        if changes and on_rule_change == "error":
            raise StateChangeError(
                "the snapshot's learned state does not fit the config: " + "; ".join(map(str, changes))
                + ". Restore the old rule names and steps, or accept the loss with "
                "`state.on_rule_change: drop` (or `streamdet run --accept-state-changes`)")
        events = []
        for rule, rows in reset:
            events.extend(self.announce.closed_idle(row, "the rule's step or kind changed; the "
                                                   "series learns again")
                          for row in rows[self.breaches.status[rows] != 0].tolist())
            self._relearn(rows)
            self._set_step(rows, rule, rule.step)
        if gone_rows:
            gone = np.concatenate(gone_rows)
            for row in gone.tolist():
                self.pending.pop(row, None)
            tab.release(gone)
            self.counters["series_dropped_rule_removed"] += gone.shape[0]
        relearning = sum(r.shape[0] for _rule, r in reset)
        if relearning:
            self.counters["series_relearning_rule_changed"] += relearning
        # Every series takes its rule's current settings (warm-up, lateness, re-arm, re-level).
        self._apply_rule_settings()
        self.restore_events = events
        self.restore_report = RestoreReport(int(self.table.live().sum()) - relearning, tuple(changes),
                                            held_dropped)

    def _relearn(self, rows: np.ndarray) -> None:
        """Forget everything learned for ``rows`` (kept: key, labels, rule, last point time)."""
        t = self.table
        keep_rule, keep_seen = t.rule[rows].copy(), t.last_seen[rows].copy()
        for part in self.parts:
            part.reset(rows)
        t.rule[rows], t.last_seen[rows] = keep_rule, keep_seen
        for row in rows.tolist():
            self.pending.pop(row, None)

    def _apply_rule_settings(self) -> None:
        t = self.table
        n = t.n
        rule, step = t.rule[:n], t.step[:n]
        ok = (rule >= 0) & ~np.isnan(step)
        for ri in np.unique(rule[ok]).tolist():
            of_rule = ok & (rule == ri)
            for st in np.unique(step[of_rule]).tolist():
                self._set_step(np.flatnonzero(of_rule & (step == st)), self.config.rules[ri], st)


def _duration(seconds: float) -> str:
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60)):
        if seconds >= size and seconds % size == 0:
            return f"{seconds / size:g}{unit}"
    return f"{seconds:g}s"
