"""Existing alerts in: Alertmanager webhook payloads (``version: "4"``) and what series they mean.

One parser serves three ways in: an HTTP receiver on the daemon's health port, a Kafka topic
carrying the same JSON, and a JSON-lines file (one payload per line) for offline reports. A
payload whose envelope is wrong is refused whole with the reason; inside a good envelope a bad
alert is refused alone and the others are kept. :class:`SeriesMatch` maps an alert's labels to
series: equality on chosen labels, plus an optional alert-name -> metric map.

>>> p = parse_payload(b'{"version": "4", "receiver": "r", "status": "firing", "alerts": ['
...                   b'{"status": "firing", "labels": {"alertname": "Slow", "host": "a"},'
...                   b' "startsAt": "2026-03-02T10:00:00Z", "endsAt": "0001-01-01T00:00:00Z"}]}')
>>> a = p.alerts[0]
>>> a.name, a.end, p.errors
('Slow', None, [])
"""

from __future__ import annotations

import hashlib
import logging
import threading
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson

from streamdet.codecs.common import RecordError, parse_time
from streamdet.core.points import shorten

log = logging.getLogger("streamdet.shadow")

VERSION = "4"
STATUSES = ("firing", "resolved")
ZERO_TIME_BEFORE = 0.0  # Go's zero time (0001-01-01) and anything before 1970 means "not set"
MAX_BODY = 1 << 20  # receiver: largest payload accepted (bytes)
MAX_ALERTS = 10_000  # per payload
_ENVELOPE = {"receiver": str, "status": str, "alerts": list, "groupLabels": dict, "commonLabels": dict,
             "commonAnnotations": dict, "externalURL": str, "groupKey": str, "truncatedAlerts": int}
_REQUIRED = ("version", "status", "alerts")


class PayloadError(ValueError):
    """A payload that cannot be used at all; ``code`` is a bounded reason for the metric label."""

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message)
        self.code = code


@dataclass(frozen=True, slots=True, kw_only=True)
class Alert:
    """One alert of a webhook payload, reduced to what comparing needs."""

    status: str
    labels: Mapping[str, str]
    start: float
    end: float | None  # None while firing (or when endsAt is unset)
    fingerprint: str
    annotations: Mapping[str, str] = field(default_factory=dict)
    generator_url: str = ""

    @property
    def name(self) -> str:
        return self.labels.get("alertname", "")


@dataclass(slots=True)
class Parsed:
    alerts: list[Alert]
    errors: list[str]  # one line per refused alert: position and reason


def label_fingerprint(labels: Mapping[str, str]) -> str:
    """A stable id for an alert without ``fingerprint`` (older senders): sha256 of its sorted labels."""
    text = "\x00".join(f"{k}\x01{v}" for k, v in sorted(labels.items()))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _string_map(raw: object, what: str) -> dict[str, str]:
    if not isinstance(raw, dict):
        raise RecordError(f"{what} must be an object of strings, got {type(raw).__name__}")
    for k, v in raw.items():
        if not isinstance(v, str):
            raise RecordError(f"{what} {shorten(k, 40)!r} must be a string, got {type(v).__name__}")
    return raw


def _time(raw: object, what: str) -> float:
    if not isinstance(raw, str):
        raise RecordError(f"{what} must be an RFC 3339 string, got {type(raw).__name__}")
    return parse_time(raw)


def parse_alert(raw: object) -> Alert:
    """One element of ``alerts``; raises RecordError with the reason."""
    if not isinstance(raw, dict):
        raise RecordError(f"an alert must be an object, got {type(raw).__name__}")
    status = raw.get("status")
    if status not in STATUSES:
        raise RecordError(f"status must be 'firing' or 'resolved', got {shorten(repr(status), 40)}")
    if "labels" not in raw:
        raise RecordError("missing field 'labels'")
    labels = _string_map(raw["labels"], "label")
    if not labels:
        raise RecordError("labels are empty")
    annotations = _string_map(raw.get("annotations", {}), "annotation")
    if "startsAt" not in raw:
        raise RecordError("missing field 'startsAt'")
    start = _time(raw["startsAt"], "startsAt")
    end = None
    if status == "resolved":
        if "endsAt" not in raw:
            raise RecordError("missing field 'endsAt' on a resolved alert")
        end = _time(raw["endsAt"], "endsAt")
        if end <= ZERO_TIME_BEFORE:
            raise RecordError("a resolved alert needs a set 'endsAt'")
        if end < start:
            raise RecordError("endsAt is before startsAt")
    elif "endsAt" in raw:
        _time(raw["endsAt"], "endsAt")  # firing: a predicted end at most; checked, not used
    fp = raw.get("fingerprint")
    if fp is not None and not isinstance(fp, str):
        raise RecordError(f"fingerprint must be a string, got {type(fp).__name__}")
    gen = raw.get("generatorURL", "")
    if not isinstance(gen, str):
        raise RecordError(f"generatorURL must be a string, got {type(gen).__name__}")
    return Alert(status=status, labels=dict(labels), start=start, end=end,
                 fingerprint=fp or label_fingerprint(labels), annotations=dict(annotations),
                 generator_url=gen)


def parse_payload(raw: bytes | str | object, where: str = "payload") -> Parsed:
    """A webhook payload (bytes or decoded JSON) -> alerts and per-alert errors.

    Raises PayloadError when the envelope itself is unusable (not JSON, not an object, wrong
    ``version``, a missing or mistyped field, too many alerts).
    """
    if isinstance(raw, bytes | bytearray | memoryview | str):
        try:
            doc = orjson.loads(raw)
        except orjson.JSONDecodeError as exc:
            raise PayloadError("invalid_json", f"{where}: not valid JSON ({exc})") from None
    else:
        doc = raw
    if not isinstance(doc, dict):
        raise PayloadError("malformed", f"{where}: expected a JSON object, got {type(doc).__name__}")
    for name in _REQUIRED:
        if name not in doc:
            raise PayloadError("missing_field", f"{where}: missing field {name!r}")
    if doc["version"] != VERSION:
        raise PayloadError("version", f"{where}: version must be \"4\" (Alertmanager's webhook "
                                      f"payload), got {shorten(repr(doc['version']), 40)}")
    for name, kind in _ENVELOPE.items():
        if name in doc and not (isinstance(doc[name], kind) and not isinstance(doc[name], bool)):
            raise PayloadError("malformed", f"{where}: field {name!r} must be a {kind.__name__}, "
                                            f"got {type(doc[name]).__name__}")
    if doc["status"] not in STATUSES:
        raise PayloadError("malformed", f"{where}: status must be 'firing' or 'resolved'")
    if len(doc["alerts"]) > MAX_ALERTS:
        raise PayloadError("too_large", f"{where}: {len(doc['alerts'])} alerts (limit {MAX_ALERTS})")
    out = Parsed([], [])
    for i, item in enumerate(doc["alerts"]):
        try:
            out.alerts.append(parse_alert(item))
        except RecordError as exc:
            out.errors.append(f"{where}: alerts[{i}]: {exc}")
    return out


def read_alert_file(path: str | Path) -> tuple[list[Alert], list[str]]:
    """Payloads from a JSON-lines file (one webhook payload per line); errors name the line."""
    alerts, errors = [], []
    with open(path, "rb") as fh:
        for n, line in enumerate(fh, 1):
            if not line.strip():
                continue
            try:
                parsed = parse_payload(line, f"{path}:{n}")
            except PayloadError as exc:
                errors.append(str(exc))
                continue
            alerts.extend(parsed.alerts)
            errors.extend(parsed.errors)
    return alerts, errors


# ---------------------------------------------------------------- alerts -> series


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesMatch:
    """``shadow.match``: which series an alert is about.

    A series matches when, for every label in ``labels`` that the alert carries, the series has
    the same value (and the alert carries at least one of them), and, if the alert's name is in
    ``metrics``, the series' metric is the one named there. So one list can serve alerts about
    hosts, services and sites alike.

    >>> m = SeriesMatch(labels=("host",), metrics={"Slow": "latency"})
    >>> m.matches({"alertname": "Slow", "host": "a"}, "latency", {"host": "a", "path": "/"})
    True
    >>> m.matches({"alertname": "Slow", "host": "a"}, "errors", {"host": "a"})
    False
    """

    labels: tuple[str, ...] = ("instance",)
    metrics: Mapping[str, str] = field(default_factory=dict)

    def matches(self, alert_labels: Mapping[str, str], metric: str, labels: Mapping[str, str]) -> bool:
        want = self.metrics.get(alert_labels.get("alertname", ""))
        if want is not None and want != metric:
            return False
        compared = 0
        for name in self.labels:
            value = alert_labels.get(name)
            if value is None:
                continue
            if labels.get(name) != value:
                return False
            compared += 1
        return compared > 0

    def series_for(self, alert_labels: Mapping[str, str],
                   known: Iterable[tuple[str, str, Mapping[str, str]]]) -> list[str]:
        """Keys of the ``known`` (key, metric, labels) series the alert is about."""
        return [key for key, metric, labels in known if self.matches(alert_labels, metric, labels)]


# ---------------------------------------------------------------- the HTTP receiver


def webhook_app(accept: Callable[[Parsed], None], *, max_body: int = MAX_BODY,
                refused: Callable[[str], None] = lambda code: None) -> Callable:
    """A WSGI app taking Alertmanager's webhook POSTs; ``accept`` gets each parsed payload.

    Refusals are 4xx with the reason in the body and are reported to ``refused(code)``: 405 not
    POST, 415 not JSON, 411 no length, 413 too large, 400 not JSON or a bad envelope; 422 when
    some alerts were refused (the others were kept; ``accept`` counts those). Never raises on input.
    """

    def reply(start_response, status: str, text: str) -> list[bytes]:
        start_response(status, [("Content-Type", "text/plain; charset=utf-8")])
        return [(text + "\n").encode()]

    def refuse(start_response, status: str, code: str, text: str) -> list[bytes]:
        refused(code)
        log.warning("alert webhook refused (%s): %s", status, shorten(text, 200))
        return reply(start_response, status, text)

    def app(environ: dict[str, Any], start_response) -> list[bytes]:
        if environ.get("REQUEST_METHOD") != "POST":
            return refuse(start_response, "405 Method Not Allowed", "method", "POST a webhook payload")
        ctype = environ.get("CONTENT_TYPE", "").split(";")[0].strip().lower()
        if ctype != "application/json":
            return refuse(start_response, "415 Unsupported Media Type", "content_type",
                          f"content type must be application/json, got {shorten(ctype or 'none', 60)!r}")
        try:
            length = int(environ.get("CONTENT_LENGTH") or "")
        except ValueError:
            return refuse(start_response, "411 Length Required", "length", "a Content-Length is required")
        if length < 0 or length > max_body:
            return refuse(start_response, "413 Content Too Large", "too_large",
                          f"body of {length} bytes is over the limit of {max_body}")
        body = environ["wsgi.input"].read(length)
        try:
            parsed = parse_payload(body, "webhook")
        except PayloadError as exc:
            return refuse(start_response, "400 Bad Request", exc.code, str(exc))
        accept(parsed)
        if parsed.errors:  # counted per alert by ``accept``
            text = (f"kept {len(parsed.alerts)} alert(s); refused {len(parsed.errors)}: "
                    + "; ".join(parsed.errors[:5]))
            log.warning("alert webhook: %s", shorten(text, 200))
            return reply(start_response, "422 Unprocessable Content", text)
        return reply(start_response, "200 OK", f"kept {len(parsed.alerts)} alert(s)")

    return app


# ---------------------------------------------------------------- the Kafka topic


class AlertTopicReader:
    """Reads webhook payloads from a Kafka topic in a thread; each message is one payload."""

    def __init__(self, conf: dict[str, Any], topic: str, accept: Callable[[Parsed], None],
                 refused: Callable[[str], None], poll_timeout: float = 0.5, max_body: int = MAX_BODY) -> None:
        self.conf, self.topic, self.accept, self.refused = conf, topic, accept, refused
        self.max_body = max_body
        self.poll_timeout = poll_timeout
        self._stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="shadow-alerts", daemon=True)

    def start(self) -> AlertTopicReader:
        self.thread.start()
        return self

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        self.thread.join(timeout)

    def _run(self) -> None:
        from confluent_kafka import Consumer, KafkaError

        consumer = Consumer(self.conf)
        consumer.subscribe([self.topic])
        try:
            while not self._stop.is_set():
                for msg in consumer.consume(500, self.poll_timeout):
                    err = msg.error()
                    if err is not None:
                        if err.code() != KafkaError._PARTITION_EOF:
                            log.warning("alerts topic %s: %s", self.topic, err.str())
                        continue
                    where = f"{msg.topic()}/{msg.partition()}@{msg.offset()}"
                    value = msg.value() or b""
                    if len(value) > self.max_body:
                        self.refused("too_large")
                        log.warning("alert payload %s refused: %d bytes", where, len(value))
                        continue
                    try:
                        parsed = parse_payload(value, where)
                    except PayloadError as exc:
                        self.refused(exc.code)
                        log.warning("alert payload refused: %s", shorten(str(exc), 200))
                        continue
                    self.accept(parsed)  # counts the refused alerts inside
        finally:
            consumer.close()
