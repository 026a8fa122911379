"""Bucketing points into steps per series: aggregation, lateness, counters to rates.

Event time is kept per series. A series' *clock* is the largest time among its own points; the
engine's (partition's) clock is the largest time among all points. A step of a series closes
when its series' clock passes the step's end plus ``lateness``, or when the partition's clock
passes it plus ``grace`` (so a series that went quiet is still judged). A point is *late* only
when its own series' step had already closed when it arrived; other series never make it late,
unless they run more than ``grace`` ahead of it. Each series keeps at most two open steps
(lateness is shorter than a step). Clocks are judged in arrival order with running maxima, so
the outcome does not depend on how points are batched: the daemon and replay see the same steps.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState

AGGREGATION_CODES = {"mean": 0, "sum": 1, "min": 2, "max": 3, "last": 4, "count": 5}


@dataclass(slots=True)
class ClosedSteps:
    """Closed steps sorted by (row, k): their row, index ``k`` (start = k * step) and value."""

    rows: np.ndarray
    k: np.ndarray
    value: np.ndarray

    @classmethod
    def empty(cls) -> ClosedSteps:
        return cls(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0))

    def __len__(self) -> int:
        return self.rows.shape[0]


def running_clock(clock: float, t: np.ndarray) -> np.ndarray:
    """Clock each point saw on arrival: max of ``clock`` and all earlier points' times."""
    if t.shape[0] == 0:
        return t.copy()
    before = np.empty_like(t)
    before[0] = clock
    np.maximum.accumulate(t[:-1], out=before[1:])
    return np.maximum(before, clock)


def series_running_clock(before: np.ndarray, rows: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Clock each point's own series showed on arrival: ``before`` (the series' clock before the
    batch, per point) or the largest time of the same series' earlier points in the batch.

    >>> series_running_clock(np.array([5.0, 0.0, 5.0, 0.0]), np.array([1, 2, 1, 2]),
    ...                      np.array([9.0, 3.0, 7.0, 1.0]))
    array([5., 0., 9., 3.])
    """
    n = t.shape[0]
    if n == 0:
        return before.copy()
    order = np.argsort(rows, kind="stable")  # by series, arrival order kept within one
    r = rows[order]
    new = np.ones(n, dtype=bool)
    new[1:] = r[1:] != r[:-1]
    # A segmented running maximum: times become ranks (ties share one), offset by the group
    # number so no group's ranks can exceed a later group's.
    uniq, rank = np.unique(t[order], return_inverse=True)
    key = (np.cumsum(new) - 1) * uniq.shape[0] + rank
    run = np.maximum.accumulate(key)
    excl = np.empty(n, np.int64)
    excl[0] = -1
    excl[1:] = run[:-1]
    prior = np.where(new, -np.inf, uniq[np.where(new, 0, excl) % uniq.shape[0]])
    out = np.empty(n)
    out[order] = np.maximum(before[order], prior)
    return out


def _finalise(acc: np.ndarray, cnt: np.ndarray, code: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = acc / cnt
    return np.where(code == 0, mean, np.where(code == 5, cnt.astype(np.float64), acc))


class Steps(ColumnState):
    prefix = "steps"
    COLUMNS: ClassVar[ColumnSpec] = {
        "k": ("i8", (2,), -1),  # open step indices, earlier first; -1 = none
        "acc": ("f8", (2,), 0.0),  # sum (mean/sum/count), min, max or last value
        "cnt": ("i4", (2,), 0),
        "last_t": ("f8", (2,), -np.inf),
        "prev_v": ("f8", (), np.nan),  # counters: previous raw sample
        "prev_t": ("f8", (), np.nan),
    }

    # ------------------------------------------------------------ counters

    def counter_rates(self, rows: np.ndarray, t: np.ndarray, v: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Per-second rates from monotonically increasing counters, handling resets.

        Returns ``(rows, t, rate, dropped)`` for the samples that yield a rate; ``dropped``
        counts samples whose time is not after the previous sample's (duplicates, disorder).
        A decrease is a reset: the increase is the new value (the counter restarted at 0).
        """
        order = np.lexsort((t, rows))
        rows, t, v = rows[order], t[order], v[order]
        same = np.zeros(rows.shape[0], dtype=bool)
        same[1:] = rows[1:] == rows[:-1]
        prev_t = np.where(same, np.roll(t, 1), self.prev_t[rows])
        prev_v = np.where(same, np.roll(v, 1), self.prev_v[rows])
        dt = t - prev_t
        has_prev = ~np.isnan(prev_t)
        valid = has_prev & (dt > 0)
        dropped = has_prev & ~(dt > 0)
        inc = np.where(v >= prev_v, v - prev_v, v)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = inc / dt
        last = np.ones(rows.shape[0], dtype=bool)
        last[:-1] = rows[1:] != rows[:-1]
        self.prev_t[rows[last]] = np.fmax(t[last], self.prev_t[rows[last]])
        self.prev_v[rows[last]] = v[last]
        return rows[valid], t[valid], rate[valid], dropped

    # ------------------------------------------------------------ stepping

    def merge(self, rows, k, t, v, seq, agg_of_row, step_of_row, limit_of_row,
              unique: bool | None = None) -> ClosedSteps:
        """Merge accepted points into open steps; return the steps that close now.

        ``limit_of_row(rows)`` is each row's close limit: a step ending at or before it is
        closed. ``unique`` says whether each row appears at most once (None: find out).
        """
        if rows.shape[0] == 0:
            return ClosedSteps.empty()
        if unique is None:
            unique = bool(np.bincount(rows).max() == 1)
        if unique and self._merge_single(rows, k, t, v, agg_of_row(rows)):
            return ClosedSteps.empty()  # closing is left to due(), which sees the same limits
        present = np.unique(rows)
        parts_r, parts_k, parts_acc, parts_cnt, parts_t, parts_seq = [rows], [k], [v], [
            np.ones(rows.shape[0], np.int64)], [t], [seq]
        for j in (0, 1):
            kj = self.k[present, j]
            has = kj >= 0
            pr = present[has]
            parts_r.append(pr)
            parts_k.append(kj[has])
            parts_acc.append(self.acc[pr, j])
            parts_cnt.append(self.cnt[pr, j].astype(np.int64))
            parts_t.append(self.last_t[pr, j])
            parts_seq.append(np.full(pr.shape[0], -1, np.int64))
        self.k[present] = -1
        r = np.concatenate(parts_r)
        kk = np.concatenate(parts_k)
        acc = np.concatenate(parts_acc)
        cnt = np.concatenate(parts_cnt)
        tt = np.concatenate(parts_t)
        sq = np.concatenate(parts_seq)
        order = np.lexsort((sq, tt, kk, r))
        r, kk, acc, cnt, tt = r[order], kk[order], acc[order], cnt[order], tt[order]
        new = np.ones(r.shape[0], dtype=bool)
        new[1:] = (r[1:] != r[:-1]) | (kk[1:] != kk[:-1])
        starts = np.flatnonzero(new)
        ends = np.append(starts[1:], r.shape[0]) - 1
        gr, gk = r[starts], kk[starts]
        code = agg_of_row(gr)
        g_cnt = np.add.reduceat(cnt, starts)
        g_acc = np.add.reduceat(acc, starts)
        if (code == 2).any():
            g_acc = np.where(code == 2, np.minimum.reduceat(acc, starts), g_acc)
        if (code == 3).any():
            g_acc = np.where(code == 3, np.maximum.reduceat(acc, starts), g_acc)
        g_acc = np.where(code == 4, acc[ends], g_acc)
        g_t = tt[ends]
        step = step_of_row(gr)
        closed = (gk + 1) * step <= limit_of_row(gr)
        # Write the open ones back: first open step of a row to slot 0, second to slot 1.
        o = ~closed
        orow = gr[o]
        first = np.ones(orow.shape[0], dtype=bool)
        first[1:] = orow[1:] != orow[:-1]
        slot = np.where(first, 0, 1)
        self.k[orow, slot] = gk[o]
        self.acc[orow, slot] = g_acc[o]
        self.cnt[orow, slot] = g_cnt[o]
        self.last_t[orow, slot] = g_t[o]
        c = closed
        return ClosedSteps(gr[c], gk[c], _finalise(g_acc[c], g_cnt[c], code[c]))

    def _merge_single(self, rows, k, t, v, code) -> bool:
        """Fast path for one point per series (the daemon's usual batch): no sorting.

        Returns False, changing nothing, when a point would need a third open step or sits
        before the open ones; the general path handles those.
        """
        k0, k1 = self.k[rows, 0], self.k[rows, 1]
        in0 = k == k0
        in1 = (k == k1) & (k1 >= 0)
        new = ~in0 & ~in1
        new0 = new & (k0 < 0)
        new1 = new & (k0 >= 0) & (k > k0) & (k1 < 0)
        if (new & ~new0 & ~new1).any():
            return False
        slot = np.where(in0 | new0, 0, 1)
        fresh = new0 | new1
        acc = self.acc[rows, slot]
        last_t = self.last_t[rows, slot]
        merged = np.where(code == 2, np.minimum(acc, v),
                          np.where(code == 3, np.maximum(acc, v),
                                   np.where(code == 4, np.where(t >= last_t, v, acc), acc + v)))
        self.acc[rows, slot] = np.where(fresh, v, merged)
        self.cnt[rows, slot] = np.where(fresh, 1, self.cnt[rows, slot] + 1)
        self.last_t[rows, slot] = np.where(fresh, t, np.maximum(last_t, t))
        self.k[rows, slot] = k
        return True

    def due(self, limit: np.ndarray, n: int, agg, step: np.ndarray) -> ClosedSteps:
        """Close open steps of rows ``0..n-1`` that end at or before the row's ``limit``.

        ``agg(rows)`` gives the aggregation code of rows; ``step`` and ``limit`` are per row.
        """
        k0 = self.k[:n, 0]
        due0 = (k0 >= 0) & ((k0 + 1) * step <= limit)
        if not due0.any():
            return ClosedSteps.empty()
        rows = np.flatnonzero(due0)
        k1 = self.k[rows, 1]
        due1 = (k1 >= 0) & ((k1 + 1) * step[rows] <= limit[rows])
        out_r = [rows, rows[due1]]
        out_k = [k0[rows], k1[due1]]
        code = agg(rows)
        out_v = [
            _finalise(self.acc[rows, 0], self.cnt[rows, 0], code),
            _finalise(self.acc[rows[due1], 1], self.cnt[rows[due1], 1], code[due1]),
        ]
        # Slot 1 moves to slot 0 where only slot 0 closed; both clear where both closed.
        keep = rows[~due1]
        self.k[keep, 0] = self.k[keep, 1]
        self.acc[keep, 0] = self.acc[keep, 1]
        self.cnt[keep, 0] = self.cnt[keep, 1]
        self.last_t[keep, 0] = self.last_t[keep, 1]
        self.k[rows, 1] = -1
        self.k[rows[due1], 0] = -1
        r = np.concatenate(out_r)
        kk = np.concatenate(out_k)
        val = np.concatenate(out_v)
        order = np.lexsort((kk, r))
        return ClosedSteps(r[order], kk[order], val[order])
