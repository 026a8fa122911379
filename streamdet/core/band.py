"""The residual scale around the blended forecast, refined by hour of day and hour of week.

The scale is a robust running estimate of the residual standard deviation (mean absolute
residual times sqrt(pi/2), exact for normal residuals), tracked per series and refined per
hour as a ratio to the series' scale, since busy hours are noisier. An hour-of-day ratio is
learnt from the first day and serves until the hour-of-week buckets have data; each is shrunk
towards the coarser estimate by a prior of one hour's worth of steps. The ratio never goes
below ``scale_floor``; residuals fed in are capped, so one spike cannot fatten the scale.
The band edges themselves come from the calibrated tails (:mod:`streamdet.core.tails`).
The lowest value seen is kept too: a series never seen below zero gets no band below zero.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState, per_rule
from streamdet.core.forecast.base import DAY, HOUR_OF_DAY, HOUR_OF_WEEK, WEEK, StepContext, visits

SQRT_HALF_PI = float(np.sqrt(np.pi / 2.0))
MIN_RATIO_MEMORY = 360.0  # visits; coarse steps give too few visits to trust a bucket alone
RESID_CAP = 5.0  # residuals beyond this many scales are capped before learning


class Band(ColumnState):
    prefix = "band"
    COLUMNS: ClassVar[ColumnSpec] = {
        "scale": ("f4", (), 0.0),
        "ratio": ("f2", (168,), 1.0),
        "ratio24": ("f4", (24,), 1.0),
        "n": ("i4", (), 0),
        "low": ("f4", (), np.inf),
    }
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset({"ratio", "ratio24"})

    def __init__(self, capacity: int = 0, *, scale_floor: float | Sequence[float] = 0.5,
                 memory_weeks: float | Sequence[float] = 6.0) -> None:
        super().__init__(capacity)
        as_arr = lambda x: np.atleast_1d(np.asarray(x, dtype=np.float64))  # noqa: E731
        self.scale_floor = as_arr(scale_floor)
        self.memory_weeks = as_arr(memory_weeks)

    def _ratio(self, ctx: StepContext) -> np.ndarray:
        """Hour-of-week ratio shrunk towards the hour-of-day one, itself shrunk towards 1."""
        key = ("band.ratio",)
        if key in ctx.memo:
            return ctx.memo[key]
        per_bucket = np.maximum(3600.0 / ctx.step, 1.0)
        prior = np.maximum(per_bucket, 3.0)  # one hour's worth of steps
        # weights count completed cycles only: the steps of the current visit (perhaps an
        # incident in the making) must not widen the band they are judged by
        v24 = np.floor(ctx.age / DAY) * per_bucket
        v168 = np.floor(ctx.age / WEEK) * per_bucket
        r24 = self.ratio24[ctx.at(24)].astype(np.float64)
        r168 = self.ratio[ctx.at(168)].astype(np.float64)
        day = (v24 * r24 + prior) / (v24 + prior)
        week = (v168 * r168 + prior * day) / (v168 + prior)
        out = np.where(ctx.step <= 3600.0, week, 1.0)
        ctx.memo[key] = out
        return out

    def scale_of(self, ctx: StepContext) -> np.ndarray:
        """Residual scale for this step's hour (a floor of ``scale_floor`` times the series' scale)."""
        floor = per_rule(self.scale_floor, ctx.rule)
        return self.scale[ctx.r].astype(np.float64) * np.maximum(self._ratio(ctx), floor)

    def note_values(self, r: slice | np.ndarray, y: np.ndarray) -> None:
        """Remember the lowest value seen (a series never seen below zero gets no band below zero)."""
        self.low[r] = np.minimum(self.low[r], y)

    def update(self, ctx: StepContext, resid: np.ndarray, mask: np.ndarray) -> None:
        """Learn from the residuals of the rows where ``mask`` holds (the others keep their state)."""
        r = ctx.r
        scale = self.scale[r].astype(np.float64)
        n = self.n[r]
        # (a scale still at zero -- a flat start -- takes the first residual whole)
        cap = np.where((n >= 10) & (scale > 0), RESID_CAP * scale, np.inf)
        a = np.minimum(np.abs(resid), cap) * SQRT_HALF_PI
        steps_per_day = 86400.0 / ctx.step
        rate = np.maximum(1.0 / np.maximum(100.0, steps_per_day), 1.0 / (n + 1.0))
        new_scale = scale + rate * (a - scale)
        # Hour-of-week and hour-of-day ratios to the series' scale, as running means.
        per_bucket = np.maximum(3600.0 / ctx.step, 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            target = np.where(scale > 0, np.minimum(a / scale, 20.0), 1.0)
        learn = mask & (n >= 10) & (ctx.step <= 3600.0)
        weeks = per_rule(self.memory_weeks, ctx.rule)
        for profile, column, period, dtype in ((HOUR_OF_WEEK, self.ratio, 168, np.float16),
                                               (HOUR_OF_DAY, self.ratio24, 24, np.float32)):
            at = ctx.at(period)
            ratio = column[at].astype(np.float64)
            memory = weeks * (WEEK / profile.cycle) * per_bucket
            # running mean behind a prior of one hour's worth of steps at the stored value, so
            # the steps of one visit (perhaps an incident in the making) move it only so far
            g = np.maximum(1.0 / np.maximum(memory, MIN_RATIO_MEMORY),
                           1.0 / (visits(ctx, profile) + per_bucket))
            column[at] = np.where(learn, ratio + g * (target - ratio), ratio).astype(dtype)
        self.scale[r] = np.where(mask, new_scale, scale).astype(np.float32)
        self.n[r] = np.where(mask, np.minimum(n + 1, 2**31 - 2), n)
