"""Existing alert intervals against streamdet's breaches, for one series at a time (pure).

Two intervals *meet* when they overlap once each is widened by ``slack`` on both sides (touching
edges meet). Intervals that meet, directly or through a chain, form one *incident*: an incident
with intervals from both sides is *both*; a lone existing alert is *only theirs* (streamdet
missed it); a lone breach is *only ours* (streamdet extra). So one alert spanning two breaches
is one incident seen by both, and so is one breach spanning two alerts. Lead time is
streamdet's first start minus theirs (negative: streamdet was earlier). Minutes alerting are
the union of each side's intervals, open ends cut at the horizon.

>>> theirs = [Interval(0.0, 600.0)]
>>> ours = [Interval(-120.0, 300.0), Interval(7200.0, 7500.0)]
>>> c = compare_series(theirs, ours, slack=900.0, horizon=86400.0)
>>> [(i.kind, i.lead) for i in c.incidents]
[('both', -120.0), ('only_ours', None)]
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from streamdet.evaluate import delay_quantiles

BOTH = "both"
ONLY_THEIRS = "only_theirs"
ONLY_OURS = "only_ours"
KINDS = (BOTH, ONLY_THEIRS, ONLY_OURS)
DEFAULT_SLACK = 900.0  # shadow.slack: 15 minutes


@dataclass(frozen=True, slots=True)
class Interval:
    """Alerting from ``start`` to ``end`` (epoch seconds); ``end`` None: still alerting."""

    start: float
    end: float | None = None
    name: str = ""  # their alert name, or our opened event id

    def __post_init__(self) -> None:
        if not math.isfinite(self.start):
            raise ValueError(f"interval start must be a finite time, got {self.start!r}")
        if self.end is not None and self.end < self.start:
            raise ValueError(f"interval end {self.end!r} is before its start {self.start!r}")

    def end_at(self, horizon: float) -> float:
        """The end, or the horizon (at least the start) while still open."""
        return self.end if self.end is not None else max(self.start, horizon)


@dataclass(frozen=True, slots=True, kw_only=True)
class Incident:
    """Intervals of one or both sides that meet, directly or through a chain."""

    kind: str
    theirs: tuple[Interval, ...]
    ours: tuple[Interval, ...]

    @property
    def start(self) -> float:
        return min(i.start for i in (*self.theirs, *self.ours))

    @property
    def lead(self) -> float | None:
        """Streamdet's first start minus theirs (seconds; negative = streamdet earlier)."""
        if self.kind != BOTH:
            return None
        return min(i.start for i in self.ours) - min(i.start for i in self.theirs)

    def open(self) -> bool:
        return any(i.end is None for i in (*self.theirs, *self.ours))

    def last_end(self, horizon: float) -> float:
        return max(i.end_at(horizon) for i in (*self.theirs, *self.ours))


@dataclass(slots=True, kw_only=True)
class Tally:
    """Counts and times for one series, or summed over several."""

    both: int = 0
    only_theirs: int = 0
    only_ours: int = 0
    theirs_minutes: float = 0.0
    ours_minutes: float = 0.0
    leads: list[float] = field(default_factory=list)

    def add(self, other: Tally) -> None:
        self.both += other.both
        self.only_theirs += other.only_theirs
        self.only_ours += other.only_ours
        self.theirs_minutes += other.theirs_minutes
        self.ours_minutes += other.ours_minutes
        self.leads.extend(other.leads)

    @property
    def median_lead(self) -> float | None:
        return delay_quantiles(self.leads)[0]

    def to_dict(self) -> dict[str, Any]:
        return {"both": self.both, "only_theirs": self.only_theirs, "only_ours": self.only_ours,
                "median_lead_seconds": self.median_lead, "theirs_minutes": round(self.theirs_minutes, 3),
                "ours_minutes": round(self.ours_minutes, 3)}


@dataclass(slots=True, kw_only=True)
class SeriesComparison:
    incidents: list[Incident]
    tally: Tally


def meet(a: Interval, b: Interval, slack: float, horizon: float) -> bool:
    """Whether two intervals overlap once both are widened by ``slack`` (touching edges meet).

    >>> meet(Interval(0, 60), Interval(60, 120), 0.0, 1e9)
    True
    >>> meet(Interval(0, 60), Interval(61, 120), 0.0, 1e9)
    False
    """
    return a.start <= b.end_at(horizon) + slack and b.start <= a.end_at(horizon) + slack


def union_seconds(intervals: Iterable[Interval], horizon: float) -> float:
    """Seconds covered by at least one interval (open ends cut at the horizon).

    >>> union_seconds([Interval(0, 60), Interval(30, 90), Interval(200, 260)], 1e9)
    150.0
    """
    spans = sorted((i.start, i.end_at(horizon)) for i in intervals)
    total, cur_lo, cur_hi = 0.0, None, None
    for lo, hi in spans:
        if cur_hi is None or lo > cur_hi:
            if cur_hi is not None:
                total += cur_hi - cur_lo
            cur_lo, cur_hi = lo, hi
        else:
            cur_hi = max(cur_hi, hi)
    if cur_hi is not None:
        total += cur_hi - cur_lo
    return float(total)


def compare_series(theirs: Sequence[Interval], ours: Sequence[Interval], *, slack: float = DEFAULT_SLACK,
                   horizon: float) -> SeriesComparison:
    """Group one series' intervals into incidents (connected by :func:`meet`) and tally them."""
    if slack < 0:
        raise ValueError(f"slack must be >= 0, got {slack!r}")
    items = [(0, i) for i in theirs] + [(1, i) for i in ours]
    items.sort(key=lambda x: (x[1].start, x[0]))
    parent = list(range(len(items)))

    def root(k: int) -> int:
        while parent[k] != k:
            parent[k] = parent[parent[k]]
            k = parent[k]
        return k

    # Quadratic in the intervals of one series, which are few (alerts and breaches per window).
    for a in range(len(items)):
        for b in range(a + 1, len(items)):
            if items[b][1].start > items[a][1].end_at(horizon) + slack:
                break  # sorted by start: no later interval can meet a
            if meet(items[a][1], items[b][1], slack, horizon):
                parent[root(b)] = root(a)
    groups: dict[int, list[tuple[int, Interval]]] = {}
    for k, item in enumerate(items):
        groups.setdefault(root(k), []).append(item)
    incidents = []
    for members in groups.values():
        t = tuple(i for side, i in members if side == 0)
        o = tuple(i for side, i in members if side == 1)
        if t and o:
            incidents.append(Incident(kind=BOTH, theirs=t, ours=o))
        else:
            for i in t:
                incidents.append(Incident(kind=ONLY_THEIRS, theirs=(i,), ours=()))
            for i in o:
                incidents.append(Incident(kind=ONLY_OURS, theirs=(), ours=(i,)))
    incidents.sort(key=lambda inc: (inc.start, KINDS.index(inc.kind)))
    tally = Tally(theirs_minutes=union_seconds(theirs, horizon) / 60.0,
                  ours_minutes=union_seconds(ours, horizon) / 60.0)
    for inc in incidents:
        setattr(tally, inc.kind, getattr(tally, inc.kind) + 1)
        if inc.lead is not None:
            tally.leads.append(inc.lead)
    return SeriesComparison(incidents=incidents, tally=tally)
