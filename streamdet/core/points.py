"""Decoded metric points as column arrays, and the per-record errors beside them.

Codecs build a :class:`PointBatch`; the engine consumes it. A batch carries one
series key per point (``metric{label="value",...}``) plus the metric name and
labels of every key it mentions, so the engine can register new series.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

import numpy as np

Labels = tuple[tuple[str, str], ...]
CACHE_LIMIT = 500_000  # raw record identities remembered by a shared PointBuilder cache
# Times a calendar can show, with two weeks' margin for time zones and step arithmetic
# (historical series such as yearly river levels reach far before 1970). Codecs refuse
# records outside them; the engine drops (and counts) points outside them.
MIN_TIME = -62134387200.0  # 0001-01-15T00:00:00Z
MAX_TIME = 253400659200.0  # 9999-12-13T00:00:00Z


def _escape_label_value(value: str) -> str:
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def series_key(metric: str, labels: Labels) -> str:
    """Canonical key of a series: the OpenMetrics text form with sorted labels.

    >>> series_key("http_requests", (("code", "200"), ("host", "a")))
    'http_requests{code="200",host="a"}'
    """
    if not labels:
        return metric
    inner = ",".join(f'{k}="{_escape_label_value(v)}"' for k, v in labels)
    return f"{metric}{{{inner}}}"


def normalise_labels(labels: Mapping[str, object] | None) -> Labels:
    """Sorted ``(name, value)`` pairs with string values; empty values dropped."""
    if not labels:
        return ()
    return tuple(sorted((str(k), str(v)) for k, v in labels.items() if v is not None and v != ""))


@dataclass(frozen=True, slots=True, kw_only=True)
class DecodeError:
    """One record that could not be turned into points, and why."""

    position: str  # e.g. "line 17", "message 3 item 2"
    reason: str
    record: str  # the offending text, shortened

    def __str__(self) -> str:
        return f"{self.position}: {self.reason}: {self.record}"


def shorten(record: bytes | str, limit: int = 160) -> str:
    text = record.decode("utf-8", "replace") if isinstance(record, bytes) else record
    return text if len(text) <= limit else text[: limit - 3] + "..."


@dataclass(frozen=True, slots=True)
class PointBatch:
    """Points as parallel columns.

    ``keys[i]``, ``time[i]`` (epoch seconds, float64) and ``value[i]`` describe
    point ``i``; ``series`` maps every key in ``keys`` to ``(metric, labels)``.
    """

    keys: list[str]
    time: np.ndarray
    value: np.ndarray
    series: dict[str, tuple[str, Labels]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = len(self.keys)
        if self.time.shape != (n,) or self.value.shape != (n,):
            raise ValueError(
                f"PointBatch columns disagree: {n} keys, time shape {self.time.shape}, "
                f"value shape {self.value.shape}; expected ({n},) for both"
            )

    def __len__(self) -> int:
        return len(self.keys)

    @classmethod
    def empty(cls) -> PointBatch:
        return cls([], np.empty(0), np.empty(0), {})

    @classmethod
    def concat(cls, batches: Iterable[PointBatch]) -> PointBatch:
        batches = [b for b in batches if len(b)]
        if not batches:
            return cls.empty()
        series: dict[str, tuple[str, Labels]] = {}
        keys: list[str] = []
        for b in batches:
            series.update(b.series)
            keys.extend(b.keys)
        return cls(
            keys,
            np.concatenate([b.time for b in batches]),
            np.concatenate([b.value for b in batches]),
            series,
        )

    def take(self, index: np.ndarray) -> PointBatch:
        """The points at ``index`` (an integer array), in that order."""
        keys = [self.keys[i] for i in index.tolist()]
        return PointBatch(
            keys, self.time[index], self.value[index], {k: self.series[k] for k in set(keys)}
        )


class KeyCache:
    """Raw record identity -> series key, and key -> (metric, labels), kept by a long-running
    reader across batches so a series seen before costs one dict lookup. Bounded."""

    __slots__ = ("meta", "raw")

    def __init__(self) -> None:
        self.raw: dict[tuple, str] = {}
        self.meta: dict[str, tuple[str, Labels]] = {}

    def trim(self) -> None:
        if len(self.raw) > CACHE_LIMIT:
            self.raw.clear()
            self.meta.clear()


class PointBuilder:
    """Collects points one record at a time; codecs use it to build a batch.

    With a :class:`KeyCache` the batch's ``series`` mapping is the cache's (it may name more
    series than the batch holds, which is all the engine needs).
    """

    __slots__ = ("_cache", "_raw", "keys", "series", "times", "values")

    def __init__(self, cache: KeyCache | None = None) -> None:
        if cache is None:
            cache = KeyCache()
        cache.trim()
        self.keys: list[str] = []
        self.times: list[float] = []
        self.values: list[float] = []
        self.series: dict[str, tuple[str, Labels]] = cache.meta
        self._cache: dict[tuple[str, Labels], str] = {}
        self._raw = cache.raw

    def __len__(self) -> int:
        return len(self.keys)

    def add_raw(self, metric: str, items: tuple, time: float, value: float) -> bool:
        """Add with labels as given (``tuple(labels.items())``, any order); False if a label
        value is not a string (the caller then takes the slow, validating path)."""
        ident = (metric, items)
        key = self._raw.get(ident)
        if key is None:
            if not all(type(v) is str for _k, v in items):
                return False
            labels = tuple(sorted((k, v) for k, v in items if v != ""))
            self.add(metric, labels, time, value)
            self._raw[ident] = self.keys[-1]
            return True
        self.keys.append(key)
        self.times.append(time)
        self.values.append(value)
        return True

    def add(self, metric: str, labels: Labels, time: float, value: float) -> None:
        ident = (metric, labels)
        key = self._cache.get(ident)
        if key is None:
            key = series_key(metric, labels)
            self._cache[ident] = key
            self.series[key] = ident
        self.keys.append(key)
        self.times.append(time)
        self.values.append(value)

    def build(self) -> PointBatch:
        return PointBatch(
            self.keys,
            np.asarray(self.times, dtype=np.float64),
            np.asarray(self.values, dtype=np.float64),
            self.series,
        )
