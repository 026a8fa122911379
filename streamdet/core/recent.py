"""The last few judged steps of every series, kept so the band of any series can be shown now.

A ring of ``engine.recent_steps`` slots per series (default 288: a day of 5-minute steps, 4.8 h of
1-minute steps). A slot holds the step's number counted from the series' first step (uint32), the
observed value, the expected value, the band's lower and upper edges (float32) and the breach
state after the step (int8: 1 above, -1 below, 0 none): 21 bytes per slot, about 6 KB per series
at the default. ``engine.recent_steps: 0`` keeps no ring at all (no memory, no work).

The ring is not part of snapshots: it would multiply the checkpoint size for a picture of the
last hours; after a restart or a rebalance it fills again from the next step.

Readers on another thread (the daemon's HTTP endpoints) copy a row with :meth:`RecentSteps.read`,
which retries while a write is in progress (a sequence counter bumped before and after every
mutation), so a reader never sees half a wave. The engine thread takes no lock.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState

DEFAULT_RECENT_STEPS = 288
MAX_RECENT_STEPS = 100_000
VALUE_NAMES = ("observed", "expected", "lower", "upper")


@dataclass(slots=True)
class RecentBand:
    """One series' recent steps in time order (oldest first), plus what the picture needs."""

    key: str
    start: np.ndarray  # float64 epoch seconds of each step's start
    observed: np.ndarray
    expected: np.ndarray  # NaN while no forecaster is ready
    lower: np.ndarray  # NaN while learning (not judged)
    upper: np.ndarray
    status: np.ndarray  # int8 breach state after each step (1 above, -1 below, 0 none)
    step: float
    unit: str | None = None
    breaches: list[tuple[float, float, int]] = field(default_factory=list)  # (start, end, side)

    def window(self, since: float) -> RecentBand:
        """The steps starting at or after ``since``."""
        keep = self.start >= since
        return RecentBand(self.key, self.start[keep], self.observed[keep], self.expected[keep],
                          self.lower[keep], self.upper[keep], self.status[keep], self.step, self.unit,
                          [b for b in self.breaches if b[1] > since])

    def status_runs(self) -> list[tuple[float, float, int]]:
        """Breach periods seen in the ring: (first step start, last step end, side)."""
        s = self.status.astype(np.int64)
        if not s.shape[0]:
            return []
        change = np.flatnonzero(np.diff(s, prepend=0, append=0))
        runs = []
        for a, b in zip(change[:-1].tolist(), change[1:].tolist(), strict=True):
            if s[a] != 0:
                runs.append((float(self.start[a]), float(self.start[b - 1]) + self.step, int(s[a])))
        return runs


class RecentSteps(ColumnState):
    """Per-series ring of the last ``steps`` judged steps (see the module docstring)."""

    prefix = "recent"
    # One wave writes one slot of many rows: slot-major storage keeps that write contiguous.
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset({"number", "values", "status"})

    def __init__(self, capacity: int, steps: int) -> None:
        if not 1 <= steps <= MAX_RECENT_STEPS:
            raise ValueError(f"recent steps must be 1..{MAX_RECENT_STEPS}, got {steps}")
        self.steps = steps
        self.version = 0  # odd while a mutation is in progress
        super().__init__(capacity)

    def columns(self) -> ColumnSpec:
        n = self.steps
        return {"written": ("int64", (), 0), "number": ("uint32", (n,), 0),
                "values": ("float32", (n, 4), np.nan), "status": ("int8", (n,), 0)}

    # -------------------------------------------------------------- writes (engine thread)

    def grow(self, capacity: int) -> None:
        self.version += 1
        try:
            super().grow(capacity)
        finally:
            self.version += 1

    def reset(self, rows: np.ndarray) -> None:
        self.version += 1
        try:
            super().reset(rows)
        finally:
            self.version += 1

    def write(self, rows: np.ndarray, sel, number: np.ndarray, values: np.ndarray,
              status: np.ndarray) -> None:
        """One slot per row of a wave: ``number`` (steps since the series' first), ``values``
        shaped ``(len(rows), 4)`` (observed, expected, lower, upper), breach ``status``."""
        self.version += 1
        try:
            written = self.written[sel]
            pos = written % self.steps
            self.number[rows, pos] = number
            self.values[rows, pos] = values
            self.status[rows, pos] = status
            self.written[sel] = written + 1
        finally:
            self.version += 1

    # -------------------------------------------------------------- snapshots: not saved

    def state_views(self, n: int) -> dict[str, np.ndarray]:
        return {}

    def state(self, n: int) -> dict[str, np.ndarray]:
        return {}

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        """Nothing is saved: the restored engine starts with empty rings of ``n`` rows."""
        self.version += 1
        try:
            self.capacity = 0
            for name, (dtype, tail, fill) in self.columns().items():
                setattr(self, name, np.full((0, *tail), fill, dtype=dtype, order=self._order(name)))
            super().grow(max(n, 1))
        finally:
            self.version += 1

    # -------------------------------------------------------------- reads (any thread)

    def read(self, row: int, extra=None, *, tries: int = 50):
        """A consistent copy of ``row``: (numbers, values, status) in time order, oldest first,
        plus whatever ``extra()`` returns (read inside the same consistency check). Returns None
        when a writer kept the row busy for every try (the caller reports "busy")."""
        for attempt in range(tries):
            v0 = self.version
            if v0 % 2 == 0:
                written = int(self.written[row])
                count = min(written, self.steps)
                pos = (written - count + np.arange(count)) % self.steps
                number = self.number[row, pos].copy()
                values = self.values[row, pos].copy()
                status = self.status[row, pos].copy()
                more = extra() if extra is not None else None
                if self.version == v0:
                    return number, values, status, more
            time.sleep(0.0005 * min(attempt + 1, 10))
        return None
