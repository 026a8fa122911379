"""Decoded metric points as column arrays, and the per-record errors beside them.

Codecs build a :class:`PointBatch`; the engine consumes it. A batch carries one
series key per point (``metric{label="value",...}``) plus the metric name and
labels of every key it mentions, so the engine can register new series.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field

import numpy as np

Labels = tuple[tuple[str, str], ...]
COUNTER = "counter"
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


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesNote:
    """What a format says about a series beyond its points: its kind and unit.

    ``kind="counter"`` marks a cumulative, monotonic series (the engine turns it into a
    per-second rate, whatever the rule's ``kind``); ``unit`` is kept with the series and
    quoted in its events and plots. Decoders of formats that carry neither set none.
    """

    kind: str = "gauge"
    unit: str = ""


@dataclass(frozen=True, slots=True)
class PointBatch:
    """Points as parallel columns.

    ``keys[i]``, ``time[i]`` (epoch seconds, float64) and ``value[i]`` describe
    point ``i``; ``series`` maps every key in ``keys`` to ``(metric, labels)``; ``notes``
    holds a :class:`SeriesNote` for the keys whose format declared a kind or a unit.
    """

    keys: list[str]
    time: np.ndarray
    value: np.ndarray
    series: dict[str, tuple[str, Labels]] = field(default_factory=dict)
    notes: dict[str, SeriesNote] = field(default_factory=dict)

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
        notes: dict[str, SeriesNote] = {}
        keys: list[str] = []
        for b in batches:
            series.update(b.series)
            notes.update(b.notes)
            keys.extend(b.keys)
        return cls(
            keys,
            np.concatenate([b.time for b in batches]),
            np.concatenate([b.value for b in batches]),
            series,
            notes,
        )

    def take(self, index: np.ndarray) -> PointBatch:
        """The points at ``index`` (an integer array), in that order."""
        keys = [self.keys[i] for i in index.tolist()]
        present = set(keys)
        notes = {k: self.notes[k] for k in present if k in self.notes} if self.notes else {}
        return PointBatch(
            keys, self.time[index], self.value[index], {k: self.series[k] for k in present}, notes
        )


class KeyCache:
    """Raw record identity -> series key, and key -> (metric, labels), kept by a long-running
    reader across batches so a series seen before costs one dict lookup.

    Bounded. After each batch the reader calls :meth:`settle` with the engine's idea of which
    keys it holds: entries made in that batch for series the engine refused (over
    ``series.max_series``, or selected by no rule) are removed at once, so refused series never
    stay cached with their labels. Entries of series the engine later evicts stay until the
    cache holds more than ``limit`` raw identities or keys; then it is cleared whole at the
    start of the next batch (each live series is cached again on its next point, one uncached
    decode each). :func:`cache_limit` sizes ``limit`` from ``max_series``.
    """

    __slots__ = ("limit", "meta", "new_keys", "new_raw", "notes", "raw")

    def __init__(self, limit: int = CACHE_LIMIT) -> None:
        self.limit = limit
        self.raw: dict[tuple, str] = {}
        self.meta: dict[str, tuple[str, Labels]] = {}
        self.notes: dict[str, SeriesNote] = {}
        self.new_raw: list[tuple] = []  # identities and keys added since the last trim()
        self.new_keys: list[str] = []

    def __len__(self) -> int:
        return max(len(self.raw), len(self.meta))

    def trim(self) -> None:
        """Start of a batch: forget what the last batch added, and clear the cache if over its limit."""
        self.new_raw.clear()
        self.new_keys.clear()
        if len(self.raw) > self.limit or len(self.meta) > self.limit:
            self.raw.clear()
            self.meta.clear()
            self.notes.clear()

    def settle(self, known: Callable[[str], bool]) -> int:
        """Remove the entries added since the last :meth:`trim` whose key ``known`` rejects;
        returns how many keys were removed. Costs one call per key new in the batch."""
        gone = {k for k in self.new_keys if not known(k)}
        if gone:
            raw = self.raw
            for ident in self.new_raw:
                if raw.get(ident) in gone:
                    del raw[ident]
            for k in gone:
                self.meta.pop(k, None)
                self.notes.pop(k, None)
        self.new_raw.clear()
        self.new_keys.clear()
        return len(gone)


def cache_limit(max_series: int) -> int:
    """Entries a reader's :class:`KeyCache` may hold for an engine capped at ``max_series``:
    every live series twice over (raw label orders, series evicted since the last clear).

    >>> cache_limit(1000)
    3024
    """
    return 2 * max_series + 1024


class PointBuilder:
    """Collects points one record at a time; codecs use it to build a batch.

    With a :class:`KeyCache` the batch's ``series`` mapping is the cache's (it may name more
    series than the batch holds, which is all the engine needs).
    """

    __slots__ = ("_cache", "_new_keys", "_new_raw", "_raw", "keys", "notes", "series", "times", "values")

    def __init__(self, cache: KeyCache | None = None) -> None:
        if cache is None:
            cache = KeyCache()
        cache.trim()
        self.keys: list[str] = []
        self.times: list[float] = []
        self.values: list[float] = []
        self.series: dict[str, tuple[str, Labels]] = cache.meta
        self.notes: dict[str, SeriesNote] = cache.notes
        self._cache: dict[tuple[str, Labels], str] = {}
        self._raw = cache.raw
        self._new_raw = cache.new_raw
        self._new_keys = cache.new_keys

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
            self._new_raw.append(ident)
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
            if key not in self.series:
                self.series[key] = ident
                self._new_keys.append(key)
        self.keys.append(key)
        self.times.append(time)
        self.values.append(value)

    def add_checked(self, metric: str, labels: Labels, time: float, value: float,
                    check: Callable[[str, Labels], None]) -> None:
        """:meth:`add`, running ``check(metric, labels)`` first (it may raise) only for a series
        this builder has not added before."""
        if (metric, labels) not in self._cache:
            check(metric, labels)
        self.add(metric, labels, time, value)

    def note(self, note: SeriesNote) -> None:
        """Attach ``note`` to the series of the point added last."""
        self.notes[self.keys[-1]] = note

    def build(self) -> PointBatch:
        return PointBatch(
            self.keys,
            np.asarray(self.times, dtype=np.float64),
            np.asarray(self.values, dtype=np.float64),
            self.series,
            self.notes,
        )
