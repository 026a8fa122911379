"""The normal band around the blended forecast: ``centre ± max(width * scale, min_width)``.

The residual scale is a robust running estimate of the residual standard deviation
(mean absolute residual times sqrt(pi/2), exact for normal residuals), tracked per series
and refined per hour-of-week bucket as a ratio to the series' scale, since busy hours are
noisier. The ratio never goes below ``scale_floor``; residuals fed in are capped, so one
spike cannot fatten the band.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState, per_rule
from streamdet.core.forecast.base import HOUR_OF_WEEK, WEEK, StepContext, visits

SQRT_HALF_PI = float(np.sqrt(np.pi / 2.0))
RATIO_PRIOR = 120.0  # pseudo-visits at ratio 1: shrinks noisy bucket estimates towards 1
MIN_RATIO_MEMORY = 360.0  # visits; coarse steps give too few visits to trust a bucket alone
RESID_CAP = 5.0  # residuals beyond this many scales are capped before learning


class Band(ColumnState):
    prefix = "band"
    COLUMNS: ClassVar[ColumnSpec] = {
        "scale": ("f4", (), 0.0),
        "ratio": ("f2", (168,), 1.0),
        "n": ("i4", (), 0),
    }

    def __init__(self, capacity: int = 0, *, width: float | Sequence[float] = 3.0,
                 min_width: float | Sequence[float] = 0.0,
                 scale_floor: float | Sequence[float] = 0.5,
                 memory_weeks: float | Sequence[float] = 6.0) -> None:
        super().__init__(capacity)
        as_arr = lambda x: np.atleast_1d(np.asarray(x, dtype=np.float64))  # noqa: E731
        self.width = as_arr(width)
        self.min_width = as_arr(min_width)
        self.scale_floor = as_arr(scale_floor)
        self.memory_weeks = as_arr(memory_weeks)

    def _ratio(self, ctx: StepContext) -> np.ndarray:
        ratio = self.ratio[ctx.at(168)].astype(np.float64)
        return np.where(ctx.step <= 3600.0, ratio, 1.0)

    def scale_of(self, ctx: StepContext) -> np.ndarray:
        """Residual scale for this step's hour-of-week bucket."""
        floor = per_rule(self.scale_floor, ctx.rule)
        return self.scale[ctx.r].astype(np.float64) * np.maximum(self._ratio(ctx), floor)

    def half_width(self, ctx: StepContext, centre: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        scale = self.scale_of(ctx)
        half = np.maximum(per_rule(self.width, ctx.rule) * scale, per_rule(self.min_width, ctx.rule))
        half = np.maximum(half, 1e-9 * np.abs(centre) + 1e-12)
        return half, scale

    def update(self, ctx: StepContext, resid: np.ndarray) -> None:
        r = ctx.r
        scale = self.scale[r].astype(np.float64)
        n = self.n[r]
        cap = np.where(n >= 10, RESID_CAP * scale, np.inf)
        a = np.minimum(np.abs(resid), cap) * SQRT_HALF_PI
        steps_per_day = 86400.0 / ctx.step
        rate = np.maximum(1.0 / np.maximum(100.0, steps_per_day), 1.0 / (n + 1.0))
        new_scale = scale + rate * (a - scale)
        # Hour-of-week ratio to the series' scale, learnt with a prior of ratio 1.
        at = ctx.at(168)
        ratio = self.ratio[at].astype(np.float64)
        per_bucket = np.maximum(3600.0 / ctx.step, 1.0)
        memory = per_rule(self.memory_weeks, ctx.rule) * (WEEK / HOUR_OF_WEEK.cycle) * per_bucket
        g = np.maximum(1.0 / np.maximum(memory, MIN_RATIO_MEMORY),
                       1.0 / (visits(ctx, HOUR_OF_WEEK) + RATIO_PRIOR))
        with np.errstate(invalid="ignore", divide="ignore"):
            target = np.where(scale > 0, np.minimum(a / scale, 20.0), 1.0)
        learn = (n >= 10) & (ctx.step <= 3600.0)
        self.ratio[at] = np.where(learn, ratio + g * (target - ratio), ratio).astype(np.float16)
        self.scale[r] = new_scale.astype(np.float32)
        self.n[r] = np.minimum(n + 1, 2**31 - 2)
