"""Column-wise per-series state: one array row per series, grown in place, saved as plain arrays.

Every stateful part of the engine (steps, forecasters, band, confirm) subclasses
:class:`ColumnState` and declares its arrays in ``COLUMNS``; the engine grows,
resets, snapshots and restores them all the same way. No Python object per series.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

# name -> (dtype, trailing shape, fill value on reset)
ColumnSpec = dict[str, tuple[str, tuple[int, ...], float]]


class ColumnState:
    """Arrays of shape ``(capacity, *tail)`` named by ``COLUMNS``; attributes of the instance."""

    COLUMNS: ClassVar[ColumnSpec] = {}
    # Columns read one position at a time across many rows (an hour-of-week bucket, a ring
    # slot, a forecaster's weight): stored position-major (Fortran order), so what a wave reads
    # is one contiguous run of memory instead of one cache line per row.
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset()
    OPTIONAL: ClassVar[frozenset[str]] = frozenset()  # columns an older snapshot may lack (reset)
    prefix: str = ""

    def __init__(self, capacity: int = 0) -> None:
        self.capacity = 0
        for name, (dtype, tail, fill) in self.columns().items():
            if hasattr(type(self), name):
                raise TypeError(f"column {name!r} of {type(self).__name__} would hide a method")
            setattr(self, name, np.full((0, *tail), fill, dtype=dtype, order=self._order(name)))
        self.grow(capacity)

    def _order(self, name: str) -> str:
        return "F" if name in self.BY_BUCKET else "C"

    def columns(self) -> ColumnSpec:
        """The column spec; subclasses with sizes known only at run time override this."""
        return self.COLUMNS

    def grow(self, capacity: int) -> None:
        """Make room for ``capacity`` rows, keeping existing rows; new rows hold the fill value."""
        if capacity <= self.capacity:
            return
        for name, (dtype, tail, fill) in self.columns().items():
            old = getattr(self, name)
            new = np.full((capacity, *tail), fill, dtype=dtype, order=self._order(name))
            new[: old.shape[0]] = old
            setattr(self, name, new)
        self.capacity = capacity

    def reset(self, rows: np.ndarray) -> None:
        """Forget rows (a new series takes them over)."""
        for name, (_dtype, _tail, fill) in self.columns().items():
            getattr(self, name)[rows] = fill

    def state_views(self, n: int) -> dict[str, np.ndarray]:
        """What a snapshot saves, keyed ``<prefix>.<column>``: views of the first ``n`` rows of
        every column (the snapshot copies them). Parts with more to save override this."""
        return {f"{self.prefix}.{name}": getattr(self, name)[:n] for name in self.columns()}

    def state(self, n: int) -> dict[str, np.ndarray]:
        """The first ``n`` rows of every column, keyed ``<prefix>.<column>``."""
        return {f"{self.prefix}.{name}": getattr(self, name)[:n].copy() for name in self.columns()}

    def load(self, arrays: dict[str, np.ndarray], n: int) -> None:
        """Inverse of :meth:`state`; a missing or misshapen array raises ValueError naming it
        (columns in ``OPTIONAL`` may be missing: an older snapshot; they take the fill value).

        Each column is allocated once at ``n`` rows (or the current capacity, if larger) and
        filled from the saved array: no fill-then-overwrite pass over restored rows."""
        spec = self.columns()
        for name, (_dtype, tail, _fill) in spec.items():
            key = f"{self.prefix}.{name}"
            if key not in arrays:
                if name in self.OPTIONAL:
                    continue
                raise ValueError(f"snapshot lacks array {key!r}")
            if arrays[key].shape != (n, *tail):
                raise ValueError(f"snapshot array {key!r} has shape {arrays[key].shape}, "
                                 f"expected {(n, *tail)}")
        capacity = max(n, 1, self.capacity)
        for name, (dtype, tail, fill) in spec.items():
            key = f"{self.prefix}.{name}"
            new = np.empty((capacity, *tail), dtype=dtype, order=self._order(name))
            if key in arrays:
                new[:n] = arrays[key]
                new[n:] = fill
            else:
                new[:] = fill
            setattr(self, name, new)
        self.capacity = capacity

    def bytes_per_row(self) -> int:
        total = 0
        for dtype, tail, _fill in self.columns().values():
            total += np.dtype(dtype).itemsize * int(np.prod(tail, dtype=np.int64))
        return total


def per_rule(table: np.ndarray, rule: np.ndarray) -> np.ndarray | float:
    """A per-rule parameter for each row: a scalar when there is only one rule (no gather)."""
    if table.shape[0] == 1:
        return table[0].item()
    return table[rule]


def row_numbers(r: slice | np.ndarray) -> np.ndarray:
    """The row numbers a slice or an index array selects."""
    return r if isinstance(r, np.ndarray) else np.arange(r.start, r.stop)


def take(x: np.ndarray | float, idx: np.ndarray) -> np.ndarray | float:
    """``x[idx]`` for a per-row array, ``x`` itself for a scalar shared by every row."""
    return x[idx] if isinstance(x, np.ndarray) and x.ndim else x
