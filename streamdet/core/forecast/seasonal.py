"""Additive Holt-Winters over hour-of-week buckets, with an hour-of-day profile as fallback.

Recursions as in Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*
(section 8.3, additive, damped): ``l = a(y - s) + (1-a)(l + phi*b)``,
``b = beta(l - l_prev) + (1-beta)phi*b``, ``s = g(y - l_prev - phi*b) + (1-g)s``.
Profiles are tried in order (hour of week, then hour of day); the first whose bucket has
been seen, and whose cycle the series has lived through once, serves. Each profile's rate
``g`` gives it an effective memory of ``memory_weeks`` (about six weeks by default), and
learns as a running mean until that many visits have been seen.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from streamdet.core.columns import ColumnSpec, per_rule
from streamdet.core.forecast.base import (
    HOUR_OF_DAY,
    HOUR_OF_WEEK,
    WEEK,
    Profile,
    StepContext,
    visits,
)
from streamdet.core.forecast.holt import DampedHolt


class HoltWinters(DampedHolt):
    members = ("seasonal",)
    prefix = "seasonal"
    warmup = 3

    def __init__(
        self,
        capacity: int = 0,
        *,
        profiles: Sequence[Profile] = (HOUR_OF_WEEK, HOUR_OF_DAY),
        alpha: float | Sequence[float] = 0.05,
        beta: float | Sequence[float] = 0.005,
        phi: float | Sequence[float] = 0.9,
        memory_weeks: float | Sequence[float] = 6.0,
        gamma: float | None = None,
    ) -> None:
        self.profiles = tuple(profiles)
        self.BY_BUCKET = frozenset(f"s{p.period}" for p in self.profiles)
        if any(p.cycle is None for p in self.profiles) and gamma is None:
            raise ValueError("a profile without a cycle needs a fixed gamma")
        super().__init__(capacity, alpha=alpha, beta=beta, phi=phi)
        self.memory_weeks = np.atleast_1d(np.asarray(memory_weeks, dtype=np.float64))
        self.gamma = gamma

    def columns(self) -> ColumnSpec:
        spec: ColumnSpec = dict(DampedHolt.COLUMNS)
        for p in self.profiles:
            spec[f"s{p.period}"] = ("f4", (p.period,), np.nan)
        return spec

    def _rate(self, ctx: StepContext, p: Profile) -> np.ndarray | float:
        if self.gamma is not None:
            return self.gamma
        per_visit = np.maximum((p.cycle / p.period) / ctx.step, 1.0)  # visits per bucket per cycle
        memory_visits = per_rule(self.memory_weeks, ctx.rule) * (WEEK / p.cycle) * per_visit
        gamma = -np.expm1(-1.0 / memory_visits)
        return np.maximum(gamma, 1.0 / (visits(ctx, p) + 1.0))

    def _served(self, ctx: StepContext, *, consume: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Seasonal term per row from the first usable profile, and whether one was usable.

        ``predict`` leaves it in ``ctx.memo`` for the ``update`` that follows on the same step,
        which takes it out again (state changes after that).
        """
        if consume and "seasonal" in ctx.memo:
            return ctx.memo.pop("seasonal")
        if "seasonal" in ctx.memo:
            return ctx.memo["seasonal"]
        r = ctx.rows
        out = np.zeros(r.shape[0])
        found = np.zeros(r.shape[0], dtype=bool)
        for p in self.profiles:
            s = getattr(self, f"s{p.period}")[ctx.at(p.period)]
            ok = ~np.isnan(s) & ~found
            if p.cycle is not None:
                ok &= (ctx.age >= p.cycle) & (ctx.step <= p.bucket_seconds)
            out = np.where(ok, s, out)
            found |= ok
        if not consume:
            ctx.memo["seasonal"] = (out, found)
        return out, found

    def seasonal_term(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        """This step's seasonal term per row and whether a profile served it."""
        return self._served(ctx)

    def predict(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        season, found = self._served(ctx)
        ready = found & (self.n[ctx.r] >= self.warmup)
        return (self._trend_forecast(ctx) + season)[None, :], ready[None, :]

    def update(self, ctx: StepContext, y: np.ndarray) -> None:
        season, found = self._served(ctx, consume=True)
        base = self._smooth(ctx, y - season)  # deseasonalised one-step forecast
        shape_y = y if ctx.shape_y is None else ctx.shape_y
        resid = shape_y - base
        for p in self.profiles:
            arr = getattr(self, f"s{p.period}")
            at = ctx.at(p.period)
            old = arr[at].astype(np.float64)
            start = np.where(np.isnan(old), np.where(found, season, resid), old)
            g = self._rate(ctx, p)
            arr[at] = g * resid + (1.0 - g) * start
