"""Seasonal-naive forecasts: the value one day ago and one week ago, at a coarse resolution.

A ring of ``WEEK / resolution`` cells per series holds the mean of each cell (two hours by
default: 84 float32 cells, 336 bytes), so the lag forecasts cost little memory. A cell the
series skipped is marked missing rather than left stale.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec
from streamdet.core.forecast.base import DAY, WEEK, Forecaster, StepContext


class SeasonalNaive(Forecaster):
    members = ("lag_day", "lag_week")
    prefix = "lags"
    COLUMNS: ClassVar[ColumnSpec] = {}
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset({"ring"})

    def __init__(self, capacity: int = 0, *, resolution: float = 7200.0) -> None:
        if resolution <= 0 or DAY % resolution:
            raise ValueError(f"lag resolution must divide one day evenly, got {resolution:g} s")
        self.resolution = float(resolution)
        self.cells = round(WEEK / resolution)
        self.day_cells = round(DAY / resolution)
        super().__init__(capacity)

    def columns(self) -> ColumnSpec:
        return {
            "ring": ("f4", (self.cells,), np.nan),
            "cur": ("i8", (), -1),
            "csum": ("f8", (), 0.0),
            "ccount": ("i4", (), 0),
        }

    def _lag(self, r: np.ndarray, cell: np.ndarray, back: int) -> np.ndarray:
        x = cell - back
        cur = self.cur[r]
        ring_val = self.ring[r, x % self.cells].astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            cur_val = self.csum[r] / self.ccount[r]
        in_ring = (x < cur) & (x >= cur - self.cells)
        return np.where(x == cur, cur_val, np.where(in_ring, ring_val, np.nan))

    def predict(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        r = ctx.rows
        cell = np.floor(ctx.start / self.resolution).astype(np.int64)
        values = np.stack([self._lag(r, cell, self.day_cells), self._lag(r, cell, self.cells)])
        ready = ~np.isnan(values) & (np.asarray(ctx.step) <= self.resolution)
        return np.nan_to_num(values), ready

    def update(self, ctx: StepContext, y: np.ndarray) -> None:
        r = ctx.rows
        cell = np.floor(ctx.start / self.resolution).astype(np.int64)
        cur = self.cur[r]
        moved = cell > cur
        if moved.any():
            mr, mcur, mcell = r[moved], cur[moved], cell[moved]
            has = (mcur >= 0) & (self.ccount[mr] > 0)
            fr = mr[has]
            self.ring[fr, mcur[has] % self.cells] = self.csum[fr] / self.ccount[fr]
            gap = mcell - mcur - 1
            for row, c0, g in zip(mr[(gap > 0) & (mcur >= 0)].tolist(),
                                  mcur[(gap > 0) & (mcur >= 0)].tolist(),
                                  gap[(gap > 0) & (mcur >= 0)].tolist(), strict=True):
                idx = (c0 + 1 + np.arange(min(g, self.cells))) % self.cells
                self.ring[row, idx] = np.nan
            self.cur[mr] = mcell
            self.csum[mr] = 0.0
            self.ccount[mr] = 0
        self.csum[r] += y
        self.ccount[r] += 1

    def shift(self, rows: np.ndarray, delta: np.ndarray) -> None:
        self.ring[rows] += delta[:, None].astype(np.float32)
        self.csum[rows] += delta * self.ccount[rows]
