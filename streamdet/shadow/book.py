"""Both sides of a shadow comparison, kept over time: their alert intervals, our breach intervals.

Our interval runs from the opened event (when streamdet would have paged: the end of the step
that decided it) to the closed event; theirs from ``startsAt`` to ``endsAt`` of the resolved
alert. The book is plain data (JSON round trip for the checkpoint), keeps the known series
(metric, labels, rule) so alerts can be matched at comparison time, and answers
:meth:`ShadowBook.compare` with per-series, per-rule and overall tallies. It is guarded by a
lock because the webhook receiver adds alerts from its own thread.
"""

from __future__ import annotations

import threading
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from streamdet.events import CLOSED, OPENED, BreachEvent
from streamdet.shadow.alerts_in import Alert, SeriesMatch
from streamdet.shadow.compare import (
    DEFAULT_SLACK,
    Incident,
    Interval,
    SeriesComparison,
    Tally,
    compare_series,
)

STATE_VERSION = 1


@dataclass(slots=True, kw_only=True)
class TheirAlert:
    labels: dict[str, str]
    start: float
    end: float | None


@dataclass(slots=True, kw_only=True)
class Comparison:
    since: float
    horizon: float
    series: dict[str, SeriesComparison]
    rules: dict[str, Tally]
    total: Tally
    rule_of: dict[str, str]
    unmatched: list[TheirAlert]


@dataclass(slots=True)
class ShadowBook:
    match: SeriesMatch = field(default_factory=SeriesMatch)
    slack: float = DEFAULT_SLACK
    alerts: dict[str, TheirAlert] = field(default_factory=dict)  # fingerprint@start -> alert
    ours: dict[str, dict[str, list]] = field(default_factory=dict)  # series -> id -> [start, end]
    known: dict[str, tuple[str, dict[str, str], str]] = field(default_factory=dict)  # key -> m, l, rule
    latest: float = float("-inf")  # largest time seen on either side (the default horizon)
    counted: set[str] = field(default_factory=set)  # ids of final incidents already counted
    lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    # ------------------------------------------------------------ in

    def add_alerts(self, alerts: Iterable[Alert]) -> list[Alert]:
        """Record alerts (firing opens, resolved closes); returns those matching no known series."""
        unmatched = []
        with self.lock:
            for a in alerts:
                key = f"{a.fingerprint}@{a.start:.3f}"
                cur = self.alerts.get(key)
                if cur is None:
                    cur = self.alerts[key] = TheirAlert(labels=dict(a.labels), start=a.start, end=None)
                if a.end is not None:
                    cur.end = a.end
                self.latest = max(self.latest, a.start, a.end or a.start)
                if not self._series_for(a.labels):
                    unmatched.append(a)
        return unmatched

    def add_events(self, events: Sequence[BreachEvent]) -> None:
        for e in events:
            self.add_event(type_=e.type, id_=e.id, series=e.series, metric=e.metric, labels=e.labels,
                           rule=e.rule, time=e.time, started=e.started, opened_id=e.opened_id)

    def add_event(self, *, type_: str, id_: str, series: str, metric: str, labels: Mapping[str, str],
                  rule: str, time: float, started: float, opened_id: str | None) -> None:
        """One opened or closed event (also as read back from an events file)."""
        with self.lock:
            self.known.setdefault(series, (metric, dict(labels), rule))
            mine = self.ours.setdefault(series, {})
            if type_ == OPENED:
                mine.setdefault(id_, [time, None])
            elif type_ == CLOSED and opened_id is not None:
                interval = mine.setdefault(opened_id, [started, None])
                interval[1] = max(time, interval[0])
            self.latest = max(self.latest, time)

    def add_series(self, series: Iterable[tuple[str, str, Mapping[str, str], str]]) -> None:
        """Known series (key, metric, labels, rule): alerts about them are matched."""
        with self.lock:
            for key, metric, labels, rule in series:
                if key not in self.known:
                    self.known[key] = (metric, dict(labels), rule)

    def advance(self, t: float) -> None:
        with self.lock:
            self.latest = max(self.latest, t)

    def forget_before(self, t: float) -> None:
        """Drop intervals that ended before ``t`` (bounded state)."""
        with self.lock:
            self.alerts = {k: a for k, a in self.alerts.items() if a.end is None or a.end >= t}
            for key in list(self.ours):
                kept = {i: v for i, v in self.ours[key].items() if v[1] is None or v[1] >= t}
                if kept:
                    self.ours[key] = kept
                else:
                    del self.ours[key]

    def _series_for(self, labels: Mapping[str, str]) -> list[str]:
        return self.match.series_for(labels, ((k, m, lab) for k, (m, lab, _r) in self.known.items()))

    # ------------------------------------------------------------ out

    def compare(self, *, since: float = float("-inf"), horizon: float | None = None) -> Comparison:
        """Every series with an alert or a breach overlapping ``[since, horizon]``, compared."""
        with self.lock:
            h = self.latest if horizon is None else horizon
            theirs: dict[str, list[Interval]] = {}
            unmatched = []
            for a in self.alerts.values():
                if (a.end if a.end is not None else h) < since or a.start > h:
                    continue
                keys = self._series_for(a.labels)
                if not keys:
                    unmatched.append(a)
                for k in keys:
                    theirs.setdefault(k, []).append(Interval(a.start, a.end, a.labels.get("alertname", "")))
            ours: dict[str, list[Interval]] = {}
            for k, items in self.ours.items():
                for eid, (start, end) in items.items():
                    if (end if end is not None else h) < since or start > h:
                        continue
                    ours.setdefault(k, []).append(Interval(start, end, eid))
            rule_of = {k: r for k, (_m, _l, r) in self.known.items()}
        out = Comparison(since=since, horizon=h, series={}, rules={}, total=Tally(), rule_of=rule_of,
                         unmatched=unmatched)
        for k in sorted(set(theirs) | set(ours)):
            c = compare_series(theirs.get(k, []), ours.get(k, []), slack=self.slack, horizon=h)
            out.series[k] = c
            out.rules.setdefault(rule_of.get(k, "?"), Tally()).add(c.tally)
            out.total.add(c.tally)
        return out

    def final_incidents(self, comparison: Comparison, settle: float) -> list[tuple[str, Incident]]:
        """Incidents that nothing can join any more and that were not counted yet; marks them."""
        out = []
        for key, c in comparison.series.items():
            for inc in c.incidents:
                if inc.open() or comparison.horizon - inc.last_end(comparison.horizon) <= self.slack + settle:
                    continue
                ident = incident_id(key, inc)
                if ident not in self.counted:
                    self.counted.add(ident)
                    out.append((key, inc))
        return out

    # ------------------------------------------------------------ persistence

    def to_dict(self) -> dict[str, Any]:
        with self.lock:
            return {
                "version": STATE_VERSION,
                "alerts": {k: [a.labels, a.start, a.end] for k, a in self.alerts.items()},
                "ours": self.ours,
                "known": {k: [m, lab, r] for k, (m, lab, r) in self.known.items()},
                "latest": None if self.latest == float("-inf") else self.latest,
                "counted": sorted(self.counted),
            }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any], *, match: SeriesMatch, slack: float) -> ShadowBook:
        if doc.get("version") != STATE_VERSION:
            raise ValueError(f"shadow state version {doc.get('version')!r}, expected {STATE_VERSION}")
        book = cls(match=match, slack=slack)
        book.alerts = {k: TheirAlert(labels=dict(v[0]), start=float(v[1]),
                                     end=None if v[2] is None else float(v[2]))
                       for k, v in doc["alerts"].items()}
        book.ours = {k: {i: [float(s), None if e is None else float(e)] for i, (s, e) in v.items()}
                     for k, v in doc["ours"].items()}
        book.known = {k: (v[0], dict(v[1]), v[2]) for k, v in doc["known"].items()}
        book.latest = float("-inf") if doc["latest"] is None else float(doc["latest"])
        book.counted = set(doc["counted"])
        return book


def incident_id(series: str, inc: Incident) -> str:
    parts = [series] + [f"t{i.start:.3f}" for i in inc.theirs] + [f"o{i.name or i.start}" for i in inc.ours]
    return "|".join(parts)
