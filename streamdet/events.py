"""Breach and peer-outlier events as frozen data classes, deterministic ids, CloudEvents 1.0.

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
from typing import TYPE_CHECKING, Any

import orjson

if TYPE_CHECKING:
    from streamdet.alerting.routing import Routed

OPENED = "streamdet.breach.opened"
CLOSED = "streamdet.breach.closed"
EVENT_TYPES = (OPENED, CLOSED)
OUTLIER_OPENED = "streamdet.outlier.opened"
OUTLIER_CLOSED = "streamdet.outlier.closed"
OUTLIER_TYPES = (OUTLIER_OPENED, OUTLIER_CLOSED)
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

    @property
    def partition_key(self) -> str:
        """Kafka message key: a series' events stay in order on one partition."""
        return self.series

    def data(self, routed: Routed | None = None, detected_at: float | None = None) -> dict[str, Any]:
        """The ``data`` member: what a person reads first (summary, severity, series, rounded
        numbers), then the exact numbers, the routing labels and annotations, and the
        forecaster weights last. ``detected_at`` is wall-clock time (None: not stamped)."""
        if routed is None:
            from streamdet.alerting.routing import route

            routed = route(self, None)
        d: dict[str, Any] = {
            "summary": routed.summary,
            "severity": routed.severity,
            "metric": self.metric,
            "labels": dict(self.labels),
            "rule": self.rule,
            "direction": self.direction,
            "observed": _num(self.observed),
            "expected": _num(self.expected),
            "lower": _num(self.lower),
            "upper": _num(self.upper),
            "display": {k: routed_number(getattr(self, k)) for k in ("observed", "expected", "lower",
                                                                     "upper")},
            "step_start": rfc3339(self.step_start),
            "step_end": rfc3339(self.step_end),
            "started": rfc3339(self.started),
            "detected_at": rfc3339(detected_at) if detected_at is not None else None,
            "detection_delay_seconds": (round(detected_at - self.step_end, 3)
                                        if detected_at is not None else None),
            "p_value": _p(self.p_value),
            "surprise": _num(round(self.surprise, 3) if math.isfinite(self.surprise) else self.surprise),
            "score": _num(self.score),
            "width": self.width,
            "routing": {"labels": dict(routed.labels), "annotations": dict(routed.annotations)},
        }
        if self.unit:
            d["unit"] = self.unit
        if self.type == CLOSED:
            d["duration_seconds"] = self.duration
            d["worst_score"] = _num(self.worst_score)
            d["opened_id"] = self.opened_id
            d["reason"] = self.reason
        d["weights"] = {k: round(v, 4) for k, v in self.weights.items()}
        return d

    def to_cloudevent(self, source: str = "streamdet", *, routed: Routed | None = None,
                      detected_at: float | None = None) -> dict[str, Any]:
        data = self.data(routed, detected_at)
        return {
            "specversion": "1.0",
            "id": self.id,
            "source": source,
            "type": self.type,
            "subject": self.series,
            "time": rfc3339(self.time),
            "datacontenttype": "application/json",
            "severity": data["severity"],  # extension attribute: routers can filter without data
            "data": data,
        }

    def to_json(self, source: str = "streamdet", *, routed: Routed | None = None,
                detected_at: float | None = None) -> bytes:
        return orjson.dumps(self.to_cloudevent(source, routed=routed, detected_at=detected_at))

    def one_line(self) -> str:
        """Human-readable summary for terminals."""
        when = rfc3339(self.time)
        if self.type == OPENED:
            return (f"{when} OPEN   {self.series} {self.direction} observed={self.observed:.4g} "
                    f"expected={self.expected:.4g} band=[{self.lower:.4g}, {self.upper:.4g}] "
                    f"score={self.score:+.1f} p={self.p_value:.2g}")
        return (f"{when} CLOSED {self.series} after {self.duration or 0:.0f}s "
                f"worst={self.worst_score or 0:+.1f} ({self.reason})")


@dataclass(frozen=True, slots=True, kw_only=True)
class OutlierEvent:
    """A member of a peer group started or stopped standing out from its group.

    ``subject`` is the member's series key; the Kafka key is the group key, so one group's
    events stay in order on one partition.
    """

    type: str
    series: str  # the member
    metric: str
    labels: Mapping[str, str]
    rule: str
    group: str  # group key: rule and group_by label values
    group_labels: Mapping[str, str]
    method: str  # "mad" or "dbscan"
    step_start: float
    step_end: float
    observed: float  # the member's value at the step
    median: float  # the group's median at the step
    mad: float  # the group's median absolute deviation (raw)
    score: float  # mad: modified z-score; dbscan: distance to the largest cluster in eps units
    threshold: float  # mad: the |score| cut-off; dbscan: eps
    members: int  # members judged at the step
    direction: str  # "above" or "below" the group
    started: float  # start of the first outside step
    cluster_sizes: tuple[int, ...] = ()  # dbscan: cluster sizes, largest first (noise excluded)
    duration: float | None = None  # closed only
    worst_score: float | None = None  # closed only
    opened_id: str | None = None  # closed only
    reason: str | None = None  # closed only
    id: str = field(default="")

    def __post_init__(self) -> None:
        if self.type not in OUTLIER_TYPES:
            raise ValueError(f"outlier event type must be one of {OUTLIER_TYPES}, got {self.type!r}")
        if self.direction not in ("above", "below"):
            raise ValueError(f"direction must be 'above' or 'below', got {self.direction!r}")
        if self.step_end <= self.step_start:
            raise ValueError("step_end must be after step_start")
        if self.type == OUTLIER_CLOSED and (self.duration is None or self.opened_id is None):
            raise ValueError("a closed event needs duration and opened_id")
        if not self.id:
            object.__setattr__(self, "id", event_id(self.type, self.rule, self.series, self.step_start))

    @property
    def time(self) -> float:
        return self.step_end

    @property
    def partition_key(self) -> str:
        return self.group

    def data(self) -> dict[str, Any]:
        d: dict[str, Any] = {
            "metric": self.metric,
            "labels": dict(self.labels),
            "rule": self.rule,
            "group": self.group,
            "group_labels": dict(self.group_labels),
            "member": self.series,
            "method": self.method,
            "step_start": rfc3339(self.step_start),
            "step_end": rfc3339(self.step_end),
            "observed": _num(self.observed),
            "group_median": _num(self.median),
            "group_mad": _num(self.mad),
            "score": _num(self.score),
            "threshold": _num(self.threshold),
            "members_judged": self.members,
            "direction": self.direction,
            "started": rfc3339(self.started),
        }
        if self.method == "dbscan":
            d["cluster_sizes"] = list(self.cluster_sizes)
        if self.type == OUTLIER_CLOSED:
            d["duration_seconds"] = self.duration
            d["worst_score"] = _num(self.worst_score)
            d["opened_id"] = self.opened_id
            d["reason"] = self.reason
        return d

    def to_cloudevent(self, source: str = "streamdet") -> dict[str, Any]:
        return {"specversion": "1.0", "id": self.id, "source": source, "type": self.type,
                "subject": self.series, "time": rfc3339(self.time),
                "datacontenttype": "application/json", "data": self.data()}

    def to_json(self, source: str = "streamdet") -> bytes:
        return orjson.dumps(self.to_cloudevent(source))

    def one_line(self) -> str:
        when = rfc3339(self.time)
        if self.type == OUTLIER_OPENED:
            return (f"{when} OUTLIER {self.series} {self.direction} its group {self.group}: "
                    f"observed={self.observed:.4g} median={self.median:.4g} score={self.score:+.1f} "
                    f"members={self.members}")
        return (f"{when} OUTLIER CLOSED {self.series} after {self.duration or 0:.0f}s "
                f"worst={self.worst_score or 0:+.1f} ({self.reason})")


Event = BreachEvent | OutlierEvent


def _p(x: float) -> float | None:
    """A probability with four significant digits (they can be as small as 1e-300)."""
    return float(f"{x:.4g}") if math.isfinite(x) else None


def _num(x: float | None) -> float | None:
    """A number at full precision, or None when it is missing or not finite."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def routed_number(x: float | None) -> str:
    """The number as people read it (three significant digits; see alerting.routing)."""
    from streamdet.alerting.routing import human_number

    return human_number(x)


def parse_cloudevent(raw: bytes | str | Mapping[str, Any]) -> dict[str, Any]:
    """Decode and check a structured-mode CloudEvent produced by streamdet (used by tests and tools)."""
    doc = orjson.loads(raw) if isinstance(raw, bytes | str) else dict(raw)
    if not isinstance(doc, dict):
        raise ValueError(f"a CloudEvent is a JSON object, got {type(doc).__name__}")
    for attr in ("specversion", "id", "source", "type"):
        if not isinstance(doc.get(attr), str) or not doc[attr]:
            raise ValueError(f"CloudEvent lacks required attribute {attr!r}")
    if doc["specversion"] != "1.0":
        raise ValueError(f"unsupported specversion {doc['specversion']!r}")
    return doc
