"""A streaming median for steady metrics, robust to single spikes.

Stochastic-approximation quantile tracking (Robbins & Monro 1951): the estimate moves
by a bounded step ``rate * spread`` towards each new value, so one spike moves it by
one step at most. The spread is a running mean absolute deviation with clipped input.
Early on both learn with running-mean rates (``max(rate, 1/(n+1))``).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, per_rule
from streamdet.core.forecast.base import Forecaster, StepContext


class StreamingMedian(Forecaster):
    members = ("median",)
    prefix = "median"
    COLUMNS: ClassVar[ColumnSpec] = {
        "m": ("f8", (), 0.0),
        "spread": ("f8", (), 0.0),
        "n": ("i4", (), 0),
    }
    warmup = 5

    def __init__(self, capacity: int = 0, *, rate: float | Sequence[float] = 0.05) -> None:
        super().__init__(capacity)
        self.rate = np.atleast_1d(np.asarray(rate, dtype=np.float64))

    def predict(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        r = ctx.r
        return self.m[r][None, :], (self.n[r] >= self.warmup)[None, :]

    def update(self, ctx: StepContext, y: np.ndarray) -> None:
        r = ctx.r
        m, spread, n = self.m[r], self.spread[r], self.n[r]
        d = y - m
        ad = np.abs(d)
        eff = np.where(spread > 0, spread, ad)
        g = np.maximum(per_rule(self.rate, ctx.rule), 1.0 / (n + 1.0))
        first = n == 0
        self.m[r] = np.where(first, y, m + g * eff * np.sign(d))
        self.spread[r] = np.where(first, 0.0, spread + g * (np.minimum(ad, 5.0 * eff) - spread))
        self.n[r] = np.minimum(n + 1, 2**31 - 2)

    def shift(self, rows: np.ndarray, delta: np.ndarray) -> None:
        self.m[rows] += delta
