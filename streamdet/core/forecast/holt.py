"""Holt's linear exponential smoothing with a damped trend, vectorized over series.

Recursions as in Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*
(section 8.2): ``l = a*y + (1-a)(l + phi*b)``, ``b = beta*(l - l_prev) + (1-beta)*phi*b``,
forecast ``l + phi*b``. Early on the level learns as a running mean
(``a = max(alpha, 1/(n+1))``); after a gap of ``h`` steps the damped trend is summed over ``h``.

>>> import numpy as np
>>> from streamdet.core.forecast.base import StepContext
>>> f = DampedHolt(1, alpha=0.5, beta=0.1, phi=0.9)
>>> for ctx, y in zip(StepContext.sequence(4), [10.0, 12.0, 14.0, 16.0]):
...     f.update(ctx, np.array([y]))
>>> round(float(f.level[0]), 3)
14.378
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, per_rule
from streamdet.core.forecast.base import Forecaster, StepContext, damped_sum, horizon


class DampedHolt(Forecaster):
    members = ("holt",)
    prefix = "holt"
    COLUMNS: ClassVar[ColumnSpec] = {
        "level": ("f8", (), 0.0),
        "trend": ("f8", (), 0.0),
        "n": ("i4", (), 0),
        "last": ("f8", (), 0.0),
    }
    warmup = 3

    def __init__(self, capacity: int = 0, *, alpha: float | Sequence[float] = 0.1,
                 beta: float | Sequence[float] = 0.01, phi: float | Sequence[float] = 0.9) -> None:
        super().__init__(capacity)
        self.alpha = np.atleast_1d(np.asarray(alpha, dtype=np.float64))
        self.beta = np.atleast_1d(np.asarray(beta, dtype=np.float64))
        self.phi = np.atleast_1d(np.asarray(phi, dtype=np.float64))

    def _trend_forecast(self, ctx: StepContext) -> np.ndarray:
        """Level plus damped trend over the horizon since the last update."""
        r = ctx.r
        h = horizon(self.last[r], self.n[r], ctx)
        return self.level[r] + damped_sum(per_rule(self.phi, ctx.rule), h) * self.trend[r]

    def predict(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        return self._trend_forecast(ctx)[None, :], (self.n[ctx.r] >= self.warmup)[None, :]

    def _smooth(self, ctx: StepContext, target: np.ndarray) -> np.ndarray:
        """One level/trend step towards ``target``; returns the forecast it replaced
        (``target`` itself for a series' first step)."""
        r = ctx.r
        n = self.n[r]
        level, trend = self.level[r], self.trend[r]
        phi = per_rule(self.phi, ctx.rule)
        beta = per_rule(self.beta, ctx.rule)
        h = horizon(self.last[r], n, ctx)
        first = n == 0
        base = np.where(first, target, level + damped_sum(phi, h) * trend)
        alpha = np.maximum(per_rule(self.alpha, ctx.rule), 1.0 / (n + 1.0))
        new_level = alpha * target + (1.0 - alpha) * base
        new_trend = beta * (new_level - level) / h + (1.0 - beta) * (phi**h) * trend
        self.level[r] = np.where(first, target, new_level)
        self.trend[r] = np.where(first, 0.0, new_trend)
        self.n[r] = np.minimum(n + 1, 2**31 - 2)
        self.last[r] = ctx.start
        return base

    def update(self, ctx: StepContext, y: np.ndarray) -> None:
        self._smooth(ctx, y)

    def shift(self, rows: np.ndarray, delta: np.ndarray) -> None:
        self.level[rows] += delta
