"""Shift or drift: when a series stays on one side of its band, re-level only if it stopped moving.

A run starts at a step outside the band and goes on while steps stay on that side of the
expected value (inside the band or not); crossing the expected value ends it. When a run reaches
``relearn_after`` steps, the mean deseasonalised value (the value minus the Holt-Winters
seasonal term) of its last third is compared with that of its middle third (the first third
holds the transition and is left out). Values, not residuals: a trend-following forecaster
chases a drift, so its residuals can stay flat while the series keeps moving.

* *shift*: the values stopped moving away (the last third is not further out than the middle
  third by more than three standard errors). The forecasters are moved by the run's recent
  offset, so the deliberate change stops alerting;
* *drift*: they keep moving. Nothing is re-levelled, the open breach stays open, and the run
  starts over, so the question is asked again ``relearn_after`` later.

After a re-level the previous level is remembered for ``RETURN_MEMORY`` times ``relearn_after``
(at least a day): a series that comes back to it (an outage that outlasted ``relearn_after``
and then recovered) is moved back without a breach, rather than alerting on the recovery.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState, row_numbers, take

RUN_SMOOTHING = 0.3  # weight of the newest residual in the run's offset estimate
DRIFT_SE = 3.0  # growth between the run's middle and last thirds, in standard errors
RETURN_SLACK = 0.25  # share of the shift by which a return may fall short of the old level
RETURN_MEMORY = 4.0  # how long (in relearn periods, at least a day) a previous level is remembered


@dataclass(slots=True)
class Relevel:
    relearn: np.ndarray  # bool per row: move the forecasters by ``delta``
    delta: np.ndarray
    drifting: np.ndarray  # bool per row: the run reached its length but is still moving away


class RunTracker(ColumnState):
    prefix = "relevel"
    COLUMNS: ClassVar[ColumnSpec] = {
        "run": ("i4", (), 0),  # signed run length outside on one side
        "offset": ("f8", (), 0.0),
        "s_mid": ("f8", (), 0.0),  # sum of the deseasonalised values in the run's middle third
        "s_last": ("f8", (), 0.0),  # ... and in its last third
        "undo": ("f8", (), 0.0),  # offset back to the level before the last re-level
        "undo_until": ("f8", (), -np.inf),
    }

    def returning(self, r: slice | np.ndarray, start: np.ndarray, resid: np.ndarray,
                  lo_half: np.ndarray, up_half: np.ndarray) -> np.ndarray:
        """Rows whose value is back near the level before their last re-level (within the band
        plus a quarter of the shift: the forecasters have crept since) and outside today's band
        on that side."""
        undo = self.undo[r]
        if not undo.any():
            return np.zeros(undo.shape[0], dtype=bool)
        off = resid - undo
        slack = RETURN_SLACK * np.abs(undo)
        back = ((start < self.undo_until[r]) & (undo != 0) & (off <= up_half + slack)
                & (off >= -lo_half - slack))
        return back & (np.where(undo > 0, resid > up_half, resid < -lo_half))

    def went_back(self, rows: np.ndarray) -> None:
        self.undo[rows] = 0.0
        self.undo_until[rows] = -np.inf
        self.run[rows] = 0

    def step(self, r: slice | np.ndarray, judged: np.ndarray, side: np.ndarray, resid: np.ndarray,
             value: np.ndarray, scale: np.ndarray, relearn_steps: np.ndarray, start: np.ndarray,
             step: np.ndarray | float) -> Relevel:
        """``value``: the observed value minus its seasonal term (what a drift moves). Only rows
        in a run or outside the band can change, so the work is done on those alone."""
        n = judged.shape[0]
        relearn = np.zeros(n, dtype=bool)
        drifting = np.zeros(n, dtype=bool)
        delta = np.zeros(n)
        act = np.flatnonzero(judged & ((self.run[r] != 0) | (side != 0)))
        if act.shape[0]:
            rows = row_numbers(r)[act]
            rl, dr, de = self._step(rows, side[act], resid[act], value[act], scale[act],
                                    take(relearn_steps, act), start[act], take(step, act))
            relearn[act], drifting[act], delta[act] = rl, dr, de
        return Relevel(relearn, delta, drifting)

    def _step(self, rows, side, resid, value, scale, relearn_steps, start, step):
        run = self.run[rows]
        offset = self.offset[rows]
        s_mid, s_last = self.s_mid[rows], self.s_last[rows]
        n = np.asarray(relearn_steps, dtype=np.int64)
        third = np.maximum(n // 3, 1)
        run_side = np.sign(run)
        same = (run != 0) & (np.sign(resid) == run_side)
        fresh = (side != 0) & ~same
        crossed = (run != 0) & ~same & (side == 0)
        i = np.abs(run)  # index of this step in the run
        s_mid = np.where(same & (i >= n - 2 * third) & (i < n - third), s_mid + value, s_mid)
        s_last = np.where(same & (i >= n - third), s_last + value, s_last)
        run = np.where(same, run + run_side, run)
        offset = np.where(same, (1 - RUN_SMOOTHING) * offset + RUN_SMOOTHING * resid, offset)
        run = np.where(fresh, side, run)
        offset = np.where(fresh, resid, offset)
        s_mid = np.where(fresh, 0.0, s_mid)
        s_last = np.where(fresh, 0.0, s_last)
        run = np.where(crossed, 0, run)
        due = np.abs(run) >= relearn_steps
        m = third.astype(np.float64)
        growth = np.sign(run) * (s_last - s_mid) / m
        drifting = due & (growth > DRIFT_SE * scale * np.sqrt(2.0 / m))
        relearn = due & ~drifting
        delta = np.where(relearn, offset, 0.0)
        self.run[rows] = np.where(due, 0, run)
        self.offset[rows] = np.where(due, 0.0, offset)
        self.s_mid[rows] = np.where(due, 0.0, s_mid)
        self.s_last[rows] = np.where(due, 0.0, s_last)
        memory = np.maximum(RETURN_MEMORY * relearn_steps * step, 86400.0)
        self.undo[rows] = np.where(relearn, -delta, self.undo[rows])
        self.undo_until[rows] = np.where(relearn, start + memory, self.undo_until[rows])
        return relearn, drifting, delta
