"""The series table: series key -> row, the rule each series follows, caps and idle eviction.

Rows are reused after eviction; every other part of the engine keeps its state in arrays
indexed by these rows. A series whose format declared it a counter (OTLP cumulative sums) is
marked in ``counter``; units a format gave are kept in ``units`` (row -> unit, sparse). Keys
of series that no rule selects are remembered (bounded: at most
``UNMATCHED_MEMORY`` keys and ``UNMATCHED_CHARS`` characters, then forgotten all at once) so the
rule globs are not re-run for every point. Keys refused for ``max_series`` are not remembered.
"""

from __future__ import annotations

from itertools import repeat
from typing import ClassVar

import numpy as np

from streamdet.config import Config
from streamdet.core.columns import ColumnSpec, ColumnState
from streamdet.core.points import COUNTER, Labels, PointBatch

UNMATCHED_MEMORY = 100_000
UNMATCHED_CHARS = 8_000_000


class SeriesTable(ColumnState):
    prefix = "series"
    COLUMNS: ClassVar[ColumnSpec] = {
        "rule": ("i4", (), -1),
        "step": ("f8", (), np.nan),  # seconds; NaN while an "auto" step is being inferred
        "lateness": ("f8", (), 0.0),
        "warmup": ("i4", (), 0),  # steps
        "relearn": ("i4", (), 0),  # steps
        "rearm": ("f8", (), 0.0),  # seconds
        "first": ("f8", (), np.nan),  # start of the first closed step
        "last_seen": ("f8", (), -np.inf),  # latest point time
        "counter": ("i1", (), 0),  # 1: the format declared a counter (rates whatever the rule)
    }
    OPTIONAL = frozenset({"counter"})  # absent from snapshots taken before it existed

    def __init__(self, config: Config, capacity: int = 1024) -> None:
        super().__init__(capacity)
        self.config = config
        self.index: dict[str, int] = {}
        self.keys: list[str | None] = []
        self.meta: list[tuple[str, Labels] | None] = []
        self.free: list[int] = []
        self.unmatched: set[str] = set()
        self.units: dict[int, str] = {}
        self.any_counter = False  # some row was declared a counter by its format
        self.unmatched_chars = 0

    @property
    def n(self) -> int:
        """Rows in use or freed (the high-water mark); arrays beyond it are untouched."""
        return len(self.keys)

    @property
    def active(self) -> int:
        return len(self.index)

    def resolve(self, batch: PointBatch, on_new) -> tuple[np.ndarray, int, int]:
        """Row per point (-1 where dropped), points with no rule, points over ``max_series``.

        ``on_new(rows)`` is called for rows created here, before they are used.
        """
        index = self.index
        # map() over dict.get runs in C: no Python frame per point.
        rows = np.fromiter(map(index.get, batch.keys, repeat(-1)), dtype=np.int64,
                           count=len(batch.keys))
        no_rule = over_cap = 0
        if (rows < 0).any():
            created: list[int] = []
            missing = np.flatnonzero(rows < 0)
            for i in missing.tolist():
                key = batch.keys[i]
                row = index.get(key, -1)
                if row < 0 and key not in self.unmatched:
                    row = self._create(key, batch.series[key], created)
                if row == -1:
                    no_rule += 1
                elif row == -2:
                    over_cap += 1
                    row = -1
                rows[i] = row
            if created:
                on_new(np.asarray(created, dtype=np.int64))
                if batch.notes:
                    self._note(created, batch)
        return rows, no_rule, over_cap

    def _note(self, created: list[int], batch: PointBatch) -> None:
        """Kind and unit the format declared for new rows (after ``on_new`` reset them)."""
        notes = batch.notes
        for row in created:
            note = notes.get(self.keys[row])  # type: ignore[arg-type]
            if note is None:
                continue
            if note.kind == COUNTER:
                self.counter[row] = 1
                self.any_counter = True
            if note.unit:
                self.units[row] = note.unit

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        super().load(arrays, n)
        self.any_counter = bool(self.counter[:n].any())

    def _create(self, key: str, meta: tuple[str, Labels], created: list[int]) -> int:
        metric, labels = meta
        rule = self.config.rule_for(metric, dict(labels))
        if rule is None:
            if len(self.unmatched) >= UNMATCHED_MEMORY or self.unmatched_chars >= UNMATCHED_CHARS:
                self.unmatched.clear()
                self.unmatched_chars = 0
            self.unmatched.add(key)
            self.unmatched_chars += len(key)
            return -1
        return self.add(key, meta, rule, created)

    def add(self, key: str, meta: tuple[str, Labels], rule: int, created: list[int]) -> int:
        """Row for a new series of ``rule`` (appended to ``created``); -2 over ``max_series``."""
        if len(self.index) >= self.config.series.max_series:
            return -2
        if self.free:
            row = self.free.pop()
            self.keys[row] = key
            self.meta[row] = meta
        else:
            row = len(self.keys)
            if row >= self.capacity:
                self.grow(max(2 * self.capacity, 1024))
            self.keys.append(key)
            self.meta.append(meta)
        self.index[key] = row
        created.append(row)
        self.rule[row] = rule
        return row

    def knows(self, key: str) -> bool:
        """Whether ``key`` is a series with state here (readers keep cache entries only for these)."""
        return key in self.index

    def live(self) -> np.ndarray:
        """Mask of rows that hold a series (freed rows have no rule)."""
        return self.rule[: self.n] >= 0

    def release(self, rows: np.ndarray) -> None:
        self.rule[rows] = -1
        self.counter[rows] = 0
        for row in rows.tolist():
            self.units.pop(row, None)
            key = self.keys[row]
            if key is not None:
                del self.index[key]
            self.keys[row] = None
            self.meta[row] = None
            self.free.append(row)

    def labels_of(self, row: int) -> dict[str, str]:
        meta = self.meta[row]
        return dict(meta[1]) if meta else {}
