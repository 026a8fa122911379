"""The opened/closed state machine, and the tracker that re-levels after a lasting shift.

A breach opens when at least ``needed`` of the last ``confirm_steps`` judged steps were
outside the band in the configured direction, and closes after ``clear_steps`` consecutive
judged steps that were not. Separately, a run of steps outside on one side (interrupted only
by steps that cross back over the centre) that reaches ``relearn_steps`` asks the forecasters
to re-level by the run's recent offset, so a deliberate change stops alerting.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState

RUN_SMOOTHING = 0.3  # weight of the newest residual in the run's offset estimate


@dataclass(slots=True)
class Transitions:
    opened: np.ndarray  # bool per row of the wave
    closed: np.ndarray
    relearn: np.ndarray
    relearn_delta: np.ndarray
    closed_after_relearn: np.ndarray  # closed, and the band had re-levelled while it was open


class Confirm(ColumnState):
    prefix = "confirm"
    COLUMNS: ClassVar[ColumnSpec] = {
        "bits": ("u4", (), 0),  # outside-in-direction flags of the last 32 judged steps
        "status": ("i1", (), 0),  # 0 closed, +1 open above, -1 open below
        "clear_run": ("i4", (), 0),
        "since": ("f8", (), 0.0),  # start of the first outside step of the breach
        "decided": ("f8", (), 0.0),  # start of the step that opened it
        "last_out": ("f8", (), 0.0),  # end of the latest outside step
        "worst": ("f4", (), 0.0),  # score furthest from 0 while open
        "run": ("i4", (), 0),  # signed run length outside on one side
        "run_offset": ("f8", (), 0.0),
        "relearned": ("i1", (), 0),  # the open breach saw a re-level
    }

    def step(self, rows: np.ndarray, sel: slice | np.ndarray,
             judged: np.ndarray, side: np.ndarray, counted: np.ndarray,
             score: np.ndarray, resid: np.ndarray, start: np.ndarray, step: np.ndarray,
             window: np.ndarray, needed: np.ndarray, clear_steps: np.ndarray,
             relearn_steps: np.ndarray) -> Transitions:
        r = sel  # rows as a slice when contiguous
        bits = self.bits[r].astype(np.uint64)
        mask = (np.uint64(1) << window.astype(np.uint64)) - np.uint64(1)
        new_bits = ((bits << np.uint64(1)) | counted.astype(np.uint64)) & mask
        bits = np.where(judged, new_bits, bits)
        state = self.status[r]
        was_open = state != 0
        n_out = np.bitwise_count(bits)
        opened = judged & ~was_open & (n_out >= needed)
        clear_run = self.clear_run[r]
        clear_run = np.where(judged & was_open, np.where(counted, 0, clear_run + 1), clear_run)
        closed = judged & was_open & (clear_run >= clear_steps)
        stays = judged & was_open & ~closed
        worst = self.worst[r].astype(np.float64)
        worst = np.where(stays & counted & (np.abs(score) > np.abs(worst)), score, worst)
        last_out = np.where(counted & judged, start + step, self.last_out[r])
        if opened.any():
            oldest = np.floor(np.log2(np.maximum(bits, 1).astype(np.float64)))
            self.since[rows[opened]] = (start - oldest * step)[opened]
            self.decided[rows[opened]] = start[opened]
            worst = np.where(opened, score, worst)
            state = np.where(opened, np.sign(side).astype(np.int8), state)
            clear_run = np.where(opened, 0, clear_run)
        relearned = self.relearned[r]
        closed_after_relearn = closed & (relearned != 0)
        relearned = np.where(closed, 0, relearned)
        state = np.where(closed, 0, state)
        bits = np.where(closed, 0, bits)
        clear_run = np.where(closed, 0, clear_run)
        self.bits[r] = bits.astype(np.uint32)
        self.status[r] = state.astype(np.int8)
        self.clear_run[r] = clear_run
        self.worst[r] = worst.astype(np.float32)
        self.last_out[r] = last_out
        # Relearn tracking: a lasting run outside on one side.
        run = self.run[r]
        offset = self.run_offset[r]
        # A run starts at a step outside the band and goes on while steps stay on that side
        # of the centre (inside the band or not); crossing the centre ends it.
        run_side = np.sign(run)
        same = (run != 0) & (np.sign(resid) == run_side)
        fresh = (side != 0) & ~same
        crossed = (run != 0) & ~same & (side == 0)
        run = np.where(judged & same, run + run_side, run)
        offset = np.where(judged & same, (1 - RUN_SMOOTHING) * offset + RUN_SMOOTHING * resid, offset)
        run = np.where(judged & fresh, side, run)
        offset = np.where(judged & fresh, resid, offset)
        run = np.where(judged & crossed, 0, run)
        relearn = judged & (np.abs(run) >= relearn_steps)
        delta = np.where(relearn, offset, 0.0)
        run = np.where(relearn, 0, run)
        self.run[r] = run
        self.run_offset[r] = np.where(relearn, 0.0, offset)
        self.relearned[r] = np.where(relearn & (state != 0), 1, relearned)
        return Transitions(opened, closed, relearn, delta, closed_after_relearn)
