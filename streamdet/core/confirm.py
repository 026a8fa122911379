"""The opened/closed state machine every judge shares: open on evidence, clear, re-arm.

A breach opens on one side when that side's combined evidence (the surprise, ``-log10`` of the
combined p-value of the last ``confirm.steps`` steps, see :mod:`streamdet.core.evidence`)
reaches what the rule needs at a
step that is itself unusual on that side. It closes after ``clear.steps`` judged steps in a
row that were *ordinary* on that side (not even mildly unusual: inside a band one standard
deviation narrower than the breach band, which gives hysteresis). After a close the series is
*re-arming* for ``rearm``: it re-opens during that time only on evidence clearly stronger
than the closed breach's peak (``REARM_MARGIN``: a hundred times rarer), so a noisy series does
not flap.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState, row_numbers, take

REARM_MARGIN = 2.0  # surprise (-log10 p) over the closed breach's peak: a hundred times rarer


@dataclass(slots=True)
class Transitions:
    opened: np.ndarray  # bool per row of the wave
    closed: np.ndarray
    side: np.ndarray  # +1 above, -1 below: the open breach's side after this step (0: none)
    closed_after_relearn: np.ndarray  # closed, and the band had re-levelled while it was open


class BreachState(ColumnState):
    """Per-series breach status, shared by every judge (temporal bands now, peer groups later)."""

    prefix = "confirm"
    COLUMNS: ClassVar[ColumnSpec] = {
        "status": ("i1", (), 0),  # 0 closed, +1 open above, -1 open below
        "clear_run": ("i4", (), 0),
        "since": ("f8", (), 0.0),  # start of the first unusual step of the breach
        "decided": ("f8", (), 0.0),  # start of the step that opened it
        "last_out": ("f8", (), 0.0),  # end of the latest unusual step of the breach
        "worst": ("f4", (), 0.0),  # score furthest from 0 while open
        "peak": ("f4", (), 0.0),  # largest surprise while open (kept after the close)
        "rearm_until": ("f8", (), -np.inf),  # after a close: re-opens need stronger evidence till then
        "relearned": ("i1", (), 0),  # the open breach saw a re-level
    }

    def step(self, r: slice | np.ndarray, judged: np.ndarray, surprise: np.ndarray, need: np.ndarray,
             unusual: np.ndarray, score: np.ndarray, start: np.ndarray, step: np.ndarray | float,
             clear_steps: np.ndarray | int, rearm: np.ndarray | float) -> Transitions:
        """One judged step per row.

        ``surprise`` and ``need`` are ``(rows, 2)`` (side 0 above, 1 below; ``need`` is inf for
        a side the rule does not watch); ``unusual`` is ``(rows, 2)``: the step is not ordinary on
        that side. Only rows with an open breach or enough evidence to open one can change, so
        the work is done on those alone.
        """
        n = judged.shape[0]
        opened = np.zeros(n, dtype=bool)
        closed = np.zeros(n, dtype=bool)
        after_relearn = np.zeros(n, dtype=bool)
        side = self.status[r].astype(np.int64)
        was_open = side != 0
        # a breach opens at an unusual step: diffuse evidence (a string of barely unusual steps,
        # as autocorrelated residuals give) waits until a step is unusual in its own right
        may_open = (unusual & (surprise >= need)).any(axis=1)
        act = np.flatnonzero(judged & (was_open | may_open))
        if act.shape[0]:
            rows = row_numbers(r)[act]
            o, c, a, s = self._step(rows, surprise[act], need[act], unusual[act], score[act], start[act],
                                    take(step, act), take(clear_steps, act), take(rearm, act))
            opened[act], closed[act], after_relearn[act], side[act] = o, c, a, s
        return Transitions(opened, closed, side, after_relearn)

    def _step(self, rows, surprise, need, unusual, score, start, step, clear_steps, rearm):
        state = self.status[rows]
        was_open = state != 0
        peak = self.peak[rows].astype(np.float64)
        rearming = start < self.rearm_until[rows]
        need = np.where(rearming[:, None], np.maximum(need, peak[:, None] + REARM_MARGIN), need)
        margin = np.where(unusual, surprise - need, -np.inf)
        can_open = ~was_open & (margin >= 0).any(axis=1)
        open_side = np.where(margin[:, 0] >= margin[:, 1], 1, -1)
        # the open breach's side: its unusual flag and statistic
        cur = np.where(state >= 0, 0, 1)
        idx = np.arange(state.shape[0])
        cur_unusual = unusual[idx, cur]
        clear_run = self.clear_run[rows]
        clear_run = np.where(was_open, np.where(cur_unusual, 0, clear_run + 1), clear_run)
        closed = was_open & (clear_run >= clear_steps)
        stays = was_open & ~closed
        worst = self.worst[rows].astype(np.float64)
        worst = np.where(stays & cur_unusual & (np.abs(score) > np.abs(worst)), score, worst)
        peak = np.where(stays, np.maximum(peak, surprise[idx, cur]), peak)
        last_out = np.where(stays & cur_unusual, start + step, self.last_out[rows])
        worst = np.where(can_open, score, worst)
        peak = np.where(can_open, surprise[idx, np.where(open_side > 0, 0, 1)], peak)
        state = np.where(can_open, open_side, state)
        clear_run = np.where(can_open, 0, clear_run)
        last_out = np.where(can_open, start + step, last_out)
        self.decided[rows] = np.where(can_open, start, self.decided[rows])
        relearned = self.relearned[rows]
        closed_after_relearn = closed & (relearned != 0)
        state = np.where(closed, 0, state)
        clear_run = np.where(closed, 0, clear_run)
        self.rearm_until[rows] = np.where(closed, start + step + rearm, self.rearm_until[rows])
        self.status[rows] = state.astype(np.int8)
        self.clear_run[rows] = clear_run
        self.worst[rows] = worst.astype(np.float32)
        self.peak[rows] = peak.astype(np.float32)
        self.last_out[rows] = last_out
        self.relearned[rows] = np.where(closed | can_open, 0, relearned)
        return can_open, closed, closed_after_relearn, state
