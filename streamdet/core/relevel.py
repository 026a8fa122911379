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

from streamdet.core.columns import ColumnSpec, ColumnState

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
        """``value``: the observed value minus its seasonal term (what a drift moves)."""
        run = self.run[r]
        offset = self.offset[r]
        s_mid, s_last = self.s_mid[r], self.s_last[r]
        n = np.asarray(relearn_steps, dtype=np.int64)
        third = np.maximum(n // 3, 1)
        run_side = np.sign(run)
        same = (run != 0) & (np.sign(resid) == run_side)
        fresh = (side != 0) & ~same
        crossed = (run != 0) & ~same & (side == 0)
        go = judged & same
        i = np.abs(run)  # index of this step in the run
        s_mid = np.where(go & (i >= n - 2 * third) & (i < n - third), s_mid + value, s_mid)
        s_last = np.where(go & (i >= n - third), s_last + value, s_last)
        run = np.where(go, run + run_side, run)
        offset = np.where(go, (1 - RUN_SMOOTHING) * offset + RUN_SMOOTHING * resid, offset)
        begin = judged & fresh
        run = np.where(begin, side, run)
        offset = np.where(begin, resid, offset)
        s_mid = np.where(begin, 0.0, s_mid)
        s_last = np.where(begin, 0.0, s_last)
        run = np.where(judged & crossed, 0, run)
        due = judged & (np.abs(run) >= relearn_steps)
        drifting = np.zeros_like(due)
        if due.any():
            m = third.astype(np.float64)
            last = s_last / m
            growth = np.sign(run) * (last - s_mid / m)
            se = scale * np.sqrt(2.0 / m)
            drifting = due & (growth > DRIFT_SE * se)
        relearn = due & ~drifting
        delta = np.where(relearn, offset, 0.0)
        run = np.where(due, 0, run)
        self.run[r] = run
        self.offset[r] = np.where(due, 0.0, offset)
        self.s_mid[r] = np.where(due, 0.0, s_mid)
        self.s_last[r] = np.where(due, 0.0, s_last)
        if relearn.any():
            memory = np.maximum(RETURN_MEMORY * relearn_steps * step, 86400.0)
            self.undo[r] = np.where(relearn, -delta, self.undo[r])
            self.undo_until[r] = np.where(relearn, start + memory, self.undo_until[r])
        return Relevel(relearn, delta, drifting)
