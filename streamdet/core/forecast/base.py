"""What every forecaster sees of a closed step, and the interface they share."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from streamdet.core.columns import ColumnState

HOUR = 3600.0
DAY = 86400.0
WEEK = 604800.0
_MONDAY_OFFSET = 3 * DAY  # 1970-01-01 was a Thursday; shift so Monday 00:00 UTC is hour 0


def hour_of_week(t: np.ndarray) -> np.ndarray:
    """Hour-of-week bucket (0 = Monday 00:00-01:00 UTC) of epoch seconds.

    >>> int(hour_of_week(np.array([0.0]))[0])  # Thursday 1970-01-01 00:00
    72
    """
    return (np.floor((t + _MONDAY_OFFSET) / HOUR).astype(np.int64)) % 168


def hour_of_day(t: np.ndarray) -> np.ndarray:
    return (np.floor(t / HOUR).astype(np.int64)) % 24


@dataclass(frozen=True, slots=True)
class Profile:
    """A seasonal profile: ``period`` buckets over a cycle of ``cycle`` seconds.

    ``cycle=None`` marks a generic profile whose bucket index the caller supplies
    (``StepContext.buckets[period]``) and whose smoothing rate is fixed.
    """

    period: int
    cycle: float | None = None

    @property
    def bucket_seconds(self) -> float | None:
        return None if self.cycle is None else self.cycle / self.period


HOUR_OF_WEEK = Profile(168, WEEK)
HOUR_OF_DAY = Profile(24, DAY)


@dataclass(slots=True)
class StepContext:
    """One closed step for each of ``rows``: where it starts, how long it is, how old the series is."""

    rows: np.ndarray  # int64 row per series
    rule: np.ndarray  # rule index per row
    start: np.ndarray  # step start, epoch seconds
    step: np.ndarray | float  # step length, seconds (a float when all rows share it)
    age: np.ndarray  # start minus the series' first step start, seconds
    buckets: dict[int, np.ndarray | int] = field(default_factory=dict)  # int: shared by all rows
    # The value seasonal profiles learn from: clipped more loosely than the level's input, so a
    # shape that recurs is learnt in full while one spike moves a bucket by a bounded amount.
    shape_y: np.ndarray | None = None
    sel: slice | np.ndarray | None = None  # ``rows`` as a slice when contiguous (cheap 1-D access)
    memo: dict = field(default_factory=dict)  # values several parts derive from this step

    @property
    def r(self) -> slice | np.ndarray:
        """Index for 1-D columns: a slice where possible, else the row array."""
        return self.rows if self.sel is None else self.sel

    def at(self, period: int) -> tuple:
        """Index of this step's bucket in a ``(rows, period)`` column: a strided view when all
        rows share the bucket and are contiguous, a fancy index otherwise."""
        b = self.buckets[period]
        if isinstance(b, int):
            return (self.r, b)
        return (self.rows, b)

    @classmethod
    def build(cls, rows, rule, start, step, age, local: np.ndarray | None = None) -> StepContext:
        """Context of a wave. ``local`` is the step start in the series' local time (UTC when
        omitted); buckets follow it. When every row's bucket time is the same (the usual case:
        steps are aligned to multiples of their length) the buckets are plain ints."""
        clock = start if local is None else local
        if clock.shape[0] and clock[0] == clock.min() == clock.max():
            t = clock[:1]
            buckets = {168: int(hour_of_week(t)[0]), 24: int(hour_of_day(t)[0])}
        else:
            buckets = {168: hour_of_week(clock), 24: hour_of_day(clock)}
        if step.shape[0] and step[0] == step.min() == step.max():
            step = float(step[0])
        return cls(rows, rule, start, step, age, buckets, sel=as_index(rows))

    @classmethod
    def sequence(cls, n: int, *, period: int | None = None, step: float = 1.0) -> list[StepContext]:
        """Contexts for one series observed at steps 0..n-1 (for tests and docs)."""
        out = []
        for i in range(n):
            start = np.array([i * step])
            ctx = cls.build(np.zeros(1, np.int64), np.zeros(1, np.int64), start,
                            np.array([step]), start.copy())
            if period is not None:
                ctx.buckets[period] = np.array([i % period])
            out.append(ctx)
        return out


def as_index(rows: np.ndarray) -> slice | np.ndarray:
    """A slice for sorted contiguous rows (views instead of gathers), else the rows themselves."""
    n = rows.shape[0]
    if n and rows[-1] - rows[0] == n - 1 and (n < 3 or bool((np.diff(rows) == 1).all())):
        return slice(int(rows[0]), int(rows[-1]) + 1)
    return rows


def visits(ctx: StepContext, profile: Profile) -> np.ndarray:
    """About how many times this step's bucket has been visited before, from the series' age.

    Used for running-mean learning rates early on (no per-bucket counters needed).
    """
    assert profile.cycle is not None
    key = ("visits", profile)
    if key in ctx.memo:
        return ctx.memo[key]
    bucket = profile.cycle / profile.period
    per_bucket = np.maximum(bucket / ctx.step, 1.0)
    within = np.floor(np.mod(ctx.start, bucket) / ctx.step)
    out = np.floor(ctx.age / profile.cycle) * per_bucket + np.minimum(within, per_bucket - 1)
    ctx.memo[key] = out
    return out


def damped_sum(phi: np.ndarray | float, h: np.ndarray) -> np.ndarray:
    """phi + phi^2 + ... + phi^h (h may be fractional, >= 1)."""
    phi = np.asarray(phi, dtype=np.float64)
    if phi.ndim == 0 and (h == 1.0).all():
        return np.full(h.shape, float(phi))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = phi * (1.0 - phi**h) / (1.0 - phi)
    return np.where(phi >= 1.0, h, out)


class Forecaster(ColumnState):
    """Base class: subclasses set ``members`` and implement the three methods."""

    members: tuple[str, ...] = ()

    def predict(self, ctx: StepContext) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError

    def update(self, ctx: StepContext, y: np.ndarray) -> None:
        raise NotImplementedError

    def shift(self, rows: np.ndarray, delta: np.ndarray) -> None:
        """Move the learned level of ``rows`` by ``delta`` (re-levelling after a lasting shift)."""
        raise NotImplementedError


def horizon(last: np.ndarray, n: np.ndarray, ctx: StepContext) -> np.ndarray:
    """Steps since the previous update (1 for consecutive steps, more after a gap)."""
    h = np.where(n > 0, (ctx.start - last) / ctx.step, 1.0)
    return np.maximum(np.round(h, 6), 1.0)
