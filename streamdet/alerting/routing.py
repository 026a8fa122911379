"""What an on-call engineer needs beside the numbers: severity, a one-line summary in plain
words, the rule's static labels and its rendered annotations, and numbers rounded for people.

All of it is derived at encoding time from the event and its rule's configuration, so the core
stays as it is. Severity comes from the event's ``surprise`` (-log10 p): ``info`` below the
rule's ``severity.warning``, ``critical`` from ``severity.critical`` (levels named as is common
practice in Alertmanager routing; common practice, no source).
"""

from __future__ import annotations

import math
import zoneinfo
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from streamdet.config import Config, Routing, Rule, SeverityLevels
from streamdet.events import CLOSED, OPENED, BreachEvent, OutlierEvent, rfc3339

SEVERITIES = ("info", "warning", "critical")
_YEAR = 365.25 * 86400.0
_ONCE_IN_UNITS = ((120 * 60.0, 60.0, "minute"), (86400.0 - 1800, 3600.0, "hour"),
                  (7 * 86400.0 - 43200, 86400.0, "day"), (8 * 7 * 86400.0, 7 * 86400.0, "week"),
                  (_YEAR - 15 * 86400, _YEAR / 12, "month"), (math.inf, _YEAR, "year"))


def severity_of(surprise: float, levels: SeverityLevels) -> str:
    """``info``, ``warning`` or ``critical`` for a surprise (-log10 p); unknown rarity is ``info``.

    >>> severity_of(7.0, SeverityLevels()), severity_of(12.0, SeverityLevels())
    ('warning', 'critical')
    """
    if not math.isfinite(surprise) and surprise != math.inf:
        return "info"
    if surprise >= levels.critical:
        return "critical"
    return "warning" if surprise >= levels.warning else "info"


def human_number(x: float | None) -> str:
    """Three significant digits, no exponent between 0.001 and a billion; thousands separated.

    >>> human_number(53.91234), human_number(0.000123), human_number(1234567.8), human_number(-0.5)
    ('53.9', '0.000123', '1,234,568', '-0.5')
    """
    if x is None or not math.isfinite(x):
        return "n/a"
    if x == 0:
        return "0"
    a = abs(x)
    if a >= 1000:
        return f"{x:,.0f}" if a < 1e9 else f"{x:.3g}"
    if a < 0.001:
        return f"{x:.3g}"
    digits = max(0, 2 - math.floor(math.log10(a)))
    text = f"{round(x, digits):.{digits}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def human_duration(seconds: float | None) -> str:
    """'40 min', '2 h 5 min', '3 d 4 h'.

    >>> human_duration(2400), human_duration(7500), human_duration(273600), human_duration(30)
    ('40 min', '2 h 5 min', '3 d 4 h', '30 s')
    """
    if seconds is None or not math.isfinite(seconds):
        return "an unknown time"
    s = max(0, round(seconds))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min"
    if s < 86400:
        h, m = divmod(s // 60, 60)
        return f"{h} h {m} min" if m else f"{h} h"
    d, h = divmod(s // 3600, 24)
    return f"{d} d {h} h" if h else f"{d} d"


def once_in(p_value: float, step: float) -> str:
    """How rarely a stretch like this one happens by chance: one step in ``1/p``, as a time.

    With 5-minute steps, p = 3.9e-5 is one step in about 25,700, i.e. once in about 3 months.

    >>> once_in(300 / (90 * 86400), 300.0), once_in(1e-40, 60.0), once_in(0.5, 60.0)
    ('once in 3 months', 'once in more than 1,000 years', 'once in 2 minutes')
    """
    if not (p_value > 0 and math.isfinite(p_value)) or step <= 0:
        return "of unknown rarity"
    seconds = step / min(p_value, 1.0)
    if seconds > 1000 * _YEAR:
        return "once in more than 1,000 years"
    for limit, size, unit in _ONCE_IN_UNITS:
        if seconds < limit:
            n = max(1, round(seconds / size))
            return f"once in {n:,} {unit}{'' if n == 1 else 's'}"
    raise AssertionError("unreachable")  # pragma: no cover


def local_slot(t: float, timezone: str) -> str:
    """'Tuesday 11:00': weekday and time of day of ``t`` in the rule's time zone."""
    dt = datetime.fromtimestamp(t, tz=UTC).astimezone(zoneinfo.ZoneInfo(timezone))
    return f"{dt:%A %H:%M}"


def summary(e: BreachEvent, timezone: str = "UTC") -> str:
    """One line in plain words, e.g. ``orders{shop="a"} is 65 % below its usual 53.9 for
    Tuesday 11:00; unusual like once in 3 months``."""
    step = e.step_end - e.step_start
    rarity = once_in(e.p_value, step)
    rarity = f"unusual like {rarity}" if rarity.startswith("once") else f"unusual, {rarity}"
    if e.type == OPENED:
        when = local_slot(e.step_start, timezone)
        usual = human_number(e.expected)
        if e.expected and math.isfinite(e.expected) and math.isfinite(e.observed) and \
                abs(e.observed - e.expected) < 10 * abs(e.expected):
            pct = abs(e.observed - e.expected) / abs(e.expected) * 100
            what = f"is {pct:.0f} % {e.direction} its usual {usual}"
        else:
            what = f"is at {human_number(e.observed)}, {e.direction} its usual {usual}"
        return f"{e.series} {what} for {when}; {rarity}"
    return (f"{e.series}: breach {e.direction} usual closed after {human_duration(e.duration)} "
            f"({e.reason}); at its strongest {rarity}")


@dataclass(frozen=True, slots=True)
class Routed:
    """Routing data of one event: what goes beside its numbers in the CloudEvent and the alert."""

    severity: str
    summary: str
    labels: Mapping[str, str]  # the rule's static labels
    annotations: Mapping[str, str]  # rendered; ``summary`` included


def placeholders(e: BreachEvent, severity: str, text: str) -> dict[str, str]:
    """Values a template may name: the series' labels, then the event's fields (which win)."""
    step = e.step_end - e.step_start
    values = {str(k): str(v) for k, v in e.labels.items()}
    values.update({
        "metric": e.metric, "series": e.series, "rule": e.rule, "severity": severity,
        "type": "opened" if e.type == OPENED else "closed", "id": e.id, "direction": e.direction,
        "observed": human_number(e.observed), "expected": human_number(e.expected),
        "lower": human_number(e.lower), "upper": human_number(e.upper),
        "score": f"{e.score:+.1f}" if math.isfinite(e.score) else "n/a",
        "surprise": f"{e.surprise:.1f}" if math.isfinite(e.surprise) else "n/a",
        "p_value": f"{e.p_value:.2g}", "once_in": once_in(e.p_value, step),
        "step_start": rfc3339(e.step_start), "step_end": rfc3339(e.step_end),
        "started": rfc3339(e.started), "started_ms": str(int(e.started * 1000)),
        "step_end_ms": str(int(e.step_end * 1000)), "summary": text,
    })
    if e.type == CLOSED:
        values.update({"duration": human_duration(e.duration), "reason": e.reason or ""})
    return values


def route(e: BreachEvent, rule: Rule | None) -> Routed:
    """Severity, summary, labels and annotations of ``e`` under ``rule`` (defaults when None)."""
    routing = rule.routing if rule is not None else Routing()
    severity = severity_of(e.surprise, routing.severity)
    text = summary(e, rule.timezone if rule is not None else "UTC")
    values = placeholders(e, severity, text)
    annotations = {"summary": text}
    annotations.update({name: t.render(values) for name, t in routing.annotations})
    return Routed(severity, annotations["summary"], dict(routing.labels), annotations)


class Encoder:
    """CloudEvents encoding with routing data, for the rules of one config.

    ``detected_at`` is the wall-clock time of the detection, stamped by the adapter that reads
    the clock (the daemon's sink); replay leaves it out unless asked.
    """

    def __init__(self, config: Config | None = None, source: str = "streamdet") -> None:
        self.rules = {r.name: r for r in config.rules} if config is not None else {}
        self.source = source

    def route(self, e: BreachEvent) -> Routed:
        return route(e, self.rules.get(e.rule))

    def to_cloudevent(self, e: BreachEvent | OutlierEvent, detected_at: float | None = None
                      ) -> dict[str, Any]:
        if isinstance(e, OutlierEvent):  # peer outliers carry no routing data yet
            return e.to_cloudevent(self.source)
        return e.to_cloudevent(self.source, routed=self.route(e), detected_at=detected_at)

    def to_json(self, e: BreachEvent | OutlierEvent, detected_at: float | None = None) -> bytes:
        if isinstance(e, OutlierEvent):
            return e.to_json(self.source)
        return e.to_json(self.source, routed=self.route(e), detected_at=detected_at)
