"""Per-series weights over forecaster members: exponentially weighted average with fixed share.

Herbster & Warmuth (1998), "Tracking the best expert": after each step every ready member's
weight is multiplied by ``exp(-learning_rate * loss)``, then a fraction ``share`` of the total
is spread evenly over the ready members, so a member that was poor for a while can recover
quickly when the series changes character. The loss is the absolute error in units of the
series' residual scale, capped at 10. Members still warming up have no say and keep their weight.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

import numpy as np

from streamdet.core.columns import ColumnSpec, ColumnState, per_rule

LOSS_CAP = 10.0


class Blend(ColumnState):
    prefix = "blend"
    BY_BUCKET: ClassVar[frozenset[str]] = frozenset({"w"})  # read as (members, rows)

    def __init__(self, capacity: int = 0, *, members: Sequence[str],
                 learning_rate: float | Sequence[float] = 0.5,
                 share: float | Sequence[float] = 0.02) -> None:
        self.members = tuple(members)
        super().__init__(capacity)
        self.learning_rate = np.atleast_1d(np.asarray(learning_rate, dtype=np.float64))
        self.share = np.atleast_1d(np.asarray(share, dtype=np.float64))

    def columns(self) -> ColumnSpec:
        return {"w": ("f4", (len(self.members),), 1.0 / len(self.members))}

    def combine(self, rows: np.ndarray, preds: np.ndarray, ready: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Blended forecast, effective weights ``(members, rows)`` and whether any member is ready."""
        w = self.w[rows].T.astype(np.float64) * ready
        total = w.sum(axis=0)
        any_ready = ready.any(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            w /= total
        none = total <= 0  # no ready member has weight (or none is ready): equal weights
        if none.any():
            w[:, none] = ready[:, none] / np.maximum(ready[:, none].sum(axis=0), 1)
        centre = (w * preds).sum(axis=0)
        return centre, w, any_ready

    def update(self, rows: np.ndarray | slice, rule: np.ndarray, preds: np.ndarray, ready: np.ndarray,
               y: np.ndarray, scale: np.ndarray) -> None:
        """One fixed-share step; ``scale`` must be positive (it is the loss unit)."""
        # (in place where possible: each (members, rows) temporary is a pass over memory)
        w = self.w[rows].T.astype(np.float64)
        v = preds - y
        np.abs(v, out=v)
        v /= scale
        np.minimum(v, LOSS_CAP, out=v)  # the loss
        v *= -per_rule(self.learning_rate, rule)
        np.exp(v, out=v)
        wr = w * ready
        mass = wr.sum(axis=0)
        v *= wr
        vsum = v.sum(axis=0)
        even = ready / np.maximum(ready.sum(axis=0), 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            v /= vsum
        decayed = ~(vsum > 0)  # every ready weight decayed to nothing: restart them evenly
        if decayed.any():
            v[:, decayed] = even[:, decayed]
        share = per_rule(self.share, rule)
        v *= 1.0 - share
        even *= share
        v += even  # the fixed-share mix
        empty = ~(mass > 0)
        if empty.any():
            mass[empty] = 1.0 / len(self.members)
        v *= mass
        np.copyto(w, v, where=ready)
        new = w
        new /= new.sum(axis=0)
        self.w[rows] = new.T
