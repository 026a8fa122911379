"""Shared decoding rules: how a time or a value is read, and when a record is refused.

Epoch numbers are told apart by magnitude (documented in the README):
``|x| < 1e11`` seconds, ``< 1e14`` milliseconds, ``< 1e17`` microseconds,
otherwise nanoseconds. ISO 8601 strings may use ``T`` or a space; a time without
an offset is UTC. Times must fall within the years 1 to 9999, and series names and labels
have length limits (:func:`check_series`), so one hostile record cannot make a series
key of megabytes or a time no calendar can show.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime

from streamdet.core.points import (
    MAX_TIME,
    MIN_TIME,
    DecodeError,
    Labels,
    PointBatch,
    PointBuilder,
    series_key,
    shorten,
)

# Documented in the README's input section; a record over a limit is refused with a reason.
MAX_METRIC_NAME = 256
MAX_LABEL_NAME = 256
MAX_LABEL_VALUE = 1024
MAX_SERIES_KEY = 4096
# A message this short cannot hold a label or a key over the limits (a JSON string of n
# characters takes at least n bytes): the JSON fast path checks only the metric name then.
SMALL_MESSAGE = MAX_LABEL_NAME
# MIN_TIME and MAX_TIME (times a calendar can show) live in core.points, shared with the engine.


class RecordError(ValueError):
    """Raised inside a decoder for one bad record; turned into a DecodeError."""


@dataclass(frozen=True, slots=True, kw_only=True)
class TimeRules:
    """Plausibility rules for event times.

    ``now`` is supplied by the adapter (the engine never reads the clock); a point
    more than ``max_future`` seconds after it is refused. ``now=None`` skips the check.
    """

    now: float | None = None
    max_future: float = 3600.0

    def check(self, t: float) -> float:
        if not math.isfinite(t):
            raise RecordError("time is not a finite number")
        if not MIN_TIME <= t <= MAX_TIME:
            raise RecordError(f"time {t:.6g} s is outside the years 1 to 9999")
        if self.now is not None and t > self.now + self.max_future:
            ahead = t - self.now
            raise RecordError(
                f"time is {ahead:.0f} s in the future (more than max_future={self.max_future:g} s)"
            )
        return t


@dataclass(slots=True)
class Decoded:
    """A decoder's result: the good points and one error per refused record."""

    points: PointBatch
    errors: list[DecodeError] = field(default_factory=list)
    records: int = 0  # records seen, good or bad


def epoch_to_seconds(x: float) -> float:
    """Epoch number in s, ms, us or ns (by magnitude) to seconds.

    >>> epoch_to_seconds(1700000000), epoch_to_seconds(1700000000000)
    (1700000000.0, 1700000000.0)
    """
    ax = abs(x)
    if ax < 1e11:
        return float(x)
    if ax < 1e14:
        return x / 1e3
    if ax < 1e17:
        return x / 1e6
    return x / 1e9


def check_series(metric: str, labels: Labels) -> None:
    """Refuse names, label values and series keys over the documented limits.

    >>> check_series("cpu", (("host", "a" * 2000),))
    Traceback (most recent call last):
    ...
    streamdet.codecs.common.RecordError: too long: label 'host' has a value of 2000 characters (limit 1024)
    """
    if len(metric) > MAX_METRIC_NAME:
        raise RecordError(f"too long: metric name of {len(metric)} characters (limit {MAX_METRIC_NAME})")
    size = len(metric) + 2
    for name, value in labels:
        if len(name) > MAX_LABEL_NAME:
            raise RecordError(f"too long: label name of {len(name)} characters (limit {MAX_LABEL_NAME})")
        if len(value) > MAX_LABEL_VALUE:
            raise RecordError(f"too long: label {shorten(name, 40)!r} has a value of {len(value)} "
                              f"characters (limit {MAX_LABEL_VALUE})")
        size += len(name) + len(value) + 4
    if size > MAX_SERIES_KEY // 2 and len(series_key(metric, labels)) > MAX_SERIES_KEY:
        raise RecordError(f"too long: series key of {len(series_key(metric, labels))} characters "
                          f"(limit {MAX_SERIES_KEY})")


def parse_time(raw: object) -> float:
    """Epoch seconds from an epoch number or an ISO 8601 string."""
    if isinstance(raw, bool):
        raise RecordError("time must be a number or an ISO 8601 string, got a boolean")
    if isinstance(raw, int | float):
        if not math.isfinite(raw):
            raise RecordError("time is not a finite number")
        return epoch_to_seconds(float(raw))
    if isinstance(raw, str):
        text = raw.strip()
        try:
            return epoch_to_seconds(float(text))
        except ValueError:
            pass
        try:
            dt = datetime.fromisoformat(text)
        except ValueError:
            raise RecordError(f"time {shorten(text, 40)!r} is not ISO 8601 or an epoch") from None
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=UTC)
        return dt.timestamp()
    if raw is None:
        raise RecordError("missing field 'time'")
    raise RecordError(f"time must be a number or an ISO 8601 string, got {type(raw).__name__}")


def parse_value(raw: object) -> float:
    """A finite float from a number or a numeric string."""
    if isinstance(raw, bool):
        raise RecordError("value must be numeric, got a boolean")
    if isinstance(raw, int | float):
        v = float(raw)
    elif isinstance(raw, str):
        try:
            v = float(raw.strip())
        except ValueError:
            raise RecordError(f"value {shorten(raw, 40)!r} is not numeric") from None
    elif raw is None:
        raise RecordError("missing field 'value'")
    else:
        raise RecordError(f"value must be numeric, got {type(raw).__name__}")
    if math.isnan(v):
        raise RecordError("value is NaN")
    if math.isinf(v):
        raise RecordError("value is infinite")
    return v


class ErrorCollector:
    """Accumulates errors for one decode call with a common position prefix."""

    __slots__ = ("errors", "prefix")

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.errors: list[DecodeError] = []

    def add(self, where: str, reason: str, record: bytes | str) -> None:
        position = f"{self.prefix} {where}".strip() if self.prefix else where
        self.errors.append(DecodeError(position=position, reason=reason, record=shorten(record)))


_EMPTY = PointBatch.empty()


def finish(builder: PointBuilder, errors: ErrorCollector, records: int, *, own: bool = True) -> Decoded:
    """The decode result; with a caller's builder (``own=False``) the points stay in it."""
    points = builder.build() if own else _EMPTY
    return Decoded(points=points, errors=errors.errors, records=records)
