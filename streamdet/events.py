"""Breach events as frozen data classes, their deterministic ids and CloudEvents 1.0 encoding.

An event's ``id`` is a UUIDv5 of what decided it (type, rule, series, step start), so the
same input always yields the same ids and a consumer can drop duplicates after a restart.
Encoding is CloudEvents 1.0 structured mode (``application/cloudevents+json``).
"""

from __future__ import annotations

import math
import uuid
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import orjson

OPENED = "streamdet.breach.opened"
CLOSED = "streamdet.breach.closed"
EVENT_TYPES = (OPENED, CLOSED)
CONTENT_TYPE = "application/cloudevents+json"
_NAMESPACE = uuid.UUID("0b6f3f47-6c1e-5b55-9a63-2f1d8f3c2a10")


def event_id(type_: str, rule: str, series: str, step_start: float) -> str:
    """Deterministic id: same decision, same id.

    >>> event_id(OPENED, "r", "m", 60.0) == event_id(OPENED, "r", "m", 60.0)
    True
    """
    return str(uuid.uuid5(_NAMESPACE, f"{type_}|{rule}|{series}|{step_start:.6f}"))


def rfc3339(t: float) -> str:
    """UTC RFC 3339 text of epoch seconds, with milliseconds only when needed."""
    dt = datetime.fromtimestamp(t, tz=UTC)
    if dt.microsecond:
        return dt.isoformat(timespec="milliseconds").replace("+00:00", "Z")
    return dt.isoformat(timespec="seconds").replace("+00:00", "Z")


@dataclass(frozen=True, slots=True, kw_only=True)
class BreachEvent:
    """A breach opened or closed for one series at one closed step."""

    type: str
    series: str
    metric: str
    labels: Mapping[str, str]
    rule: str
    step_start: float
    step_end: float
    observed: float
    expected: float
    lower: float
    upper: float
    score: float  # (observed - expected) / residual scale
    direction: str  # side of the band the breach is on: "above" or "below"
    width: float
    weights: Mapping[str, float]
    started: float  # start of the first unusual step of the breach
    p_value: float = math.nan  # combined tail probability of the evidence (opened: at opening;
    # closed: the breach's strongest), Bonferroni-adjusted when the rule watches both sides
    surprise: float = math.nan  # -log10(p_value)
    duration: float | None = None  # closed only: started .. end of the last outside step
    worst_score: float | None = None  # closed only
    opened_id: str | None = None  # closed only: id of the matching opened event
    reason: str | None = None  # closed only: why it closed
    unit: str = ""  # the series' unit when its format gave one (OTLP), e.g. "s", "By/s"
    id: str = field(default="")

    def __post_init__(self) -> None:
        if self.type not in EVENT_TYPES:
            raise ValueError(f"event type must be one of {EVENT_TYPES}, got {self.type!r}")
        if self.direction not in ("above", "below"):
            raise ValueError(f"direction must be 'above' or 'below', got {self.direction!r}")
        if self.step_end <= self.step_start:
            raise ValueError("step_end must be after step_start")
        if self.type == CLOSED and (self.duration is None or self.opened_id is None):
            raise ValueError("a closed event needs duration and opened_id")
        if not self.id:
            object.__setattr__(self, "id", event_id(self.type, self.rule, self.series,
                                                    self.step_start))

    @property
    def time(self) -> float:
        """Event time: the end of the step that decided it (data time, not wall-clock time)."""
        return self.step_end

    def data(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "metric": self.metric,
            "labels": dict(self.labels),
            "rule": self.rule,
            "step_start": rfc3339(self.step_start),
            "step_end": rfc3339(self.step_end),
            "observed": _num(self.observed),
            "expected": _num(self.expected),
            "lower": _num(self.lower),
            "upper": _num(self.upper),
            "score": _num(self.score),
            "direction": self.direction,
            "width": self.width,
            "weights": {k: round(v, 4) for k, v in self.weights.items()},
            "started": rfc3339(self.started),
            "p_value": _p(self.p_value),
            "surprise": _num(round(self.surprise, 3) if math.isfinite(self.surprise) else self.surprise),
        }
        if self.unit:
            d["unit"] = self.unit
        if self.type == CLOSED:
            d["duration_seconds"] = self.duration
            d["worst_score"] = _num(self.worst_score)
            d["opened_id"] = self.opened_id
            d["reason"] = self.reason
        return d

    def to_cloudevent(self, source: str = "streamdet") -> dict[str, Any]:
        return {
            "specversion": "1.0",
            "id": self.id,
            "source": source,
            "type": self.type,
            "subject": self.series,
            "time": rfc3339(self.time),
            "datacontenttype": "application/json",
            "data": self.data(),
        }

    def to_json(self, source: str = "streamdet") -> bytes:
        return orjson.dumps(self.to_cloudevent(source))

    def one_line(self) -> str:
        """Human-readable summary for terminals."""
        when = rfc3339(self.time)
        if self.type == OPENED:
            return (f"{when} OPEN   {self.series} {self.direction} observed={self.observed:.4g} "
                    f"expected={self.expected:.4g} band=[{self.lower:.4g}, {self.upper:.4g}] "
                    f"score={self.score:+.1f} p={self.p_value:.2g}")
        return (f"{when} CLOSED {self.series} after {self.duration or 0:.0f}s "
                f"worst={self.worst_score or 0:+.1f} ({self.reason})")


def _p(x: float) -> float | None:
    """A probability with four significant digits (they can be as small as 1e-300)."""
    return float(f"{x:.4g}") if math.isfinite(x) else None


def _num(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return round(x, 9) if math.isfinite(x) else None


def parse_cloudevent(raw: bytes | str | Mapping[str, Any]) -> dict[str, Any]:
    """Decode and check a structured-mode CloudEvent produced by streamdet (used by tests and tools)."""
    doc = orjson.loads(raw) if isinstance(raw, bytes | str) else dict(raw)
    for attr in ("specversion", "id", "source", "type"):
        if not isinstance(doc.get(attr), str) or not doc[attr]:
            raise ValueError(f"CloudEvent lacks required attribute {attr!r}")
    if doc["specversion"] != "1.0":
        raise ValueError(f"unsupported specversion {doc['specversion']!r}")
    return doc
