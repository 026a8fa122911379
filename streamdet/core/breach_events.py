"""Breach events from a judged wave: what opened or closed, with the numbers that decided it.

Kept apart from the engine so the judges and the state machine stay pure array code and the
event shape lives in one place (peer-group events will be built beside these).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from streamdet.core.judge import Assessment
from streamdet.events import CLOSED, OPENED, BreachEvent, event_id

if TYPE_CHECKING:
    from streamdet.core.engine import Engine


@dataclass(slots=True)
class Wave:
    """The arrays of one judged wave that events quote."""

    rows: np.ndarray
    start: np.ndarray
    step: np.ndarray | float
    observed: np.ndarray
    a: Assessment
    surprise: np.ndarray  # (rows, 2) combined surprise per side
    window: np.ndarray

    def step_at(self, i: int) -> float:
        return float(self.step if np.ndim(self.step) == 0 else self.step[i])


class Announcer:
    """Builds :class:`BreachEvent` objects from engine state (one per opened or closed row)."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine

    def _evidence(self, row: int, surprise: float) -> tuple[float, float]:
        """Combined p-value and surprise, Bonferroni-adjusted over the rule's watched sides."""
        sides = int(self.engine.rule_sides[int(self.engine.table.rule[row])])
        surprise = max(0.0, surprise - math.log10(sides))
        return 10.0 ** -surprise, surprise

    def _base(self, row: int, i: int, w: Wave) -> dict:
        eng = self.engine
        a = w.a
        rule = eng.config.rules[int(eng.table.rule[row])]
        metric, labels = eng.table.meta[row]
        weights = {m: float(a.weights[j, i]) for j, m in enumerate(eng.members) if a.weights[j, i] > 0}
        step = w.step_at(i)
        return dict(series=eng.table.keys[row], metric=metric, labels=dict(labels), rule=rule.name,
                    step_start=float(w.start[i]), step_end=float(w.start[i] + step),
                    observed=float(w.observed[i]), expected=float(a.centre[i]),
                    lower=float(a.lower[i]), upper=float(a.upper[i]), score=float(a.score[i]),
                    width=rule.width, weights=weights, unit=eng.table.units.get(row, ""))

    def opened(self, row: int, i: int, w: Wave) -> BreachEvent:
        b = self.engine.breaches
        side = int(b.status[row])
        p, surprise = self._evidence(row, float(w.surprise[i, 0 if side > 0 else 1]))
        return BreachEvent(type=OPENED, direction="above" if side > 0 else "below",
                           started=float(b.since[row]), p_value=p, surprise=surprise,
                           **self._base(row, i, w))

    def closed(self, row: int, i: int, w: Wave, reason: str) -> BreachEvent:
        return self._closed(row, reason, self._base(row, i, w))

    def closed_idle(self, row: int, reason: str = "series went quiet") -> BreachEvent:
        """Closed event for a series evicted while its breach was open (no step of its own:
        the last unusual step is reported)."""
        eng = self.engine
        b = eng.breaches
        rule = eng.config.rules[int(eng.table.rule[row])]
        metric, labels = eng.table.meta[row]
        step = float(eng.table.step[row])
        base = dict(series=eng.table.keys[row], metric=metric, labels=dict(labels), rule=rule.name,
                    step_start=float(b.last_out[row]) - step, step_end=float(b.last_out[row]),
                    observed=math.nan, expected=math.nan, lower=math.nan, upper=math.nan,
                    score=math.nan, width=rule.width, weights={}, unit=eng.table.units.get(row, ""))
        event = self._closed(row, reason, base)
        b.status[row] = 0
        return event

    def _closed(self, row: int, reason: str, base: dict) -> BreachEvent:
        eng = self.engine
        b = eng.breaches
        rule = eng.config.rules[int(eng.table.rule[row])]
        worst = float(b.worst[row])
        p, surprise = self._evidence(row, float(b.peak[row]))
        return BreachEvent(
            type=CLOSED, direction="above" if worst >= 0 else "below",
            started=float(b.since[row]), duration=float(b.last_out[row] - b.since[row]),
            worst_score=worst, reason=reason, p_value=p, surprise=surprise,
            opened_id=event_id(OPENED, rule.name, eng.table.keys[row], float(b.decided[row])), **base)
