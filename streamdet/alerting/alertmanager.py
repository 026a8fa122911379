"""Alertmanager as a sink: opened breaches post as firing alerts, closed ones as resolved.

``POST /api/v2/alerts`` takes a JSON list of postable alerts (``labels``, ``annotations``,
``startsAt``, ``endsAt``, ``generatorURL``; Alertmanager's OpenAPI spec, api/v2/openapi.yaml).
An alert is identified by its label set, so the labels a firing alert was sent with are kept
and its resolution is sent with the same ones. Alertmanager resolves an alert whose ``endsAt``
has passed, so every firing alert is sent again every ``resend_interval`` (default 1 minute)
with ``endsAt`` four intervals ahead (Prometheus does the same with its resend delay; from
memory): a daemon that stops re-sending lets its alerts end on their own within 4 intervals.

Everything runs on one background thread behind a bounded queue: ``submit`` never blocks the
consume loop (a full queue drops the events and counts them). Failed posts are retried with
exponential backoff capped at ``max_backoff``; a 400 (Alertmanager refusing an alert) is split
down to the alert it refuses, which is counted and dropped rather than retried forever.
"""

from __future__ import annotations

import logging
import queue
import re
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import orjson

from streamdet.alerting.routing import Encoder, Routed, placeholders
from streamdet.alerting.templates import Template, TemplateError
from streamdet.daemon.health import Metrics
from streamdet.daemon.logs import RateLimitedLog
from streamdet.events import OPENED, BreachEvent, rfc3339

log = logging.getLogger("streamdet.alertmanager")
API_PATH = "/api/v2/alerts"
ENDS_AFTER = 4  # a firing alert's endsAt is this many resend intervals ahead
CHUNK = 500  # alerts per request
_BAD_NAME = re.compile(r"[^A-Za-z0-9_]")
_RESERVED = ("alertname", "severity", "metric")


@dataclass(frozen=True, slots=True, kw_only=True)
class AlertmanagerSettings:
    url: str  # the full POST address (``.../api/v2/alerts``)
    resend_interval: float = 60.0
    timeout: float = 5.0
    max_backoff: float = 30.0
    queue_size: int = 10_000
    generator_url: Template | None = None


def parse_alertmanager(section) -> AlertmanagerSettings | None:
    """Read ``output.alertmanager`` from a config ``_Section``; None when absent or without url."""
    if not section.raw:
        section.done()
        return None
    url = section.text("url", "http://127.0.0.1:9093")
    parsed = urllib.parse.urlsplit(url)
    if parsed.scheme not in ("http", "https") or not parsed.hostname:
        section.bad("url", f"expected an http(s) address such as http://alertmanager:9093, got {url!r}")
    path = parsed.path.rstrip("/")
    if not path.endswith(API_PATH):
        path += API_PATH
    d = AlertmanagerSettings(url="")
    kw: dict[str, Any] = dict(
        url=urllib.parse.urlunsplit((parsed.scheme, parsed.netloc, path, parsed.query, "")),
        resend_interval=section.duration("resend_interval", d.resend_interval, positive=True),
        timeout=section.duration("timeout", d.timeout, positive=True),
        max_backoff=section.duration("max_backoff", d.max_backoff, positive=True),
        queue_size=section.number("queue_size", d.queue_size, lo=1, integer=True),
    )
    raw = section.get("generator_url", None)
    if raw is not None:
        try:
            kw["generator_url"] = Template.parse(raw)
        except TemplateError as exc:
            section.bad("generator_url", str(exc))
    section.done()
    return AlertmanagerSettings(**kw)


def label_name(name: str) -> str:
    """A valid Alertmanager label name: other characters become '_', a leading digit gets '_'."""
    name = _BAD_NAME.sub("_", name) or "_"
    return "_" + name if name[0].isdigit() else name


def alert_labels(e: BreachEvent, routed: Routed) -> dict[str, str]:
    """Series labels (names made valid; ``alertname``, ``severity`` and ``metric`` of the series
    become ``exported_*``), ``metric``, the rule's labels, ``alertname`` (the rule's name unless
    its labels set one) and ``severity``."""
    labels: dict[str, str] = {}
    for k, v in e.labels.items():
        name = label_name(str(k))
        if name in _RESERVED:
            name = "exported_" + name
        if v != "":
            labels[name] = str(v)
    labels["metric"] = e.metric
    labels.update(routed.labels)
    labels.setdefault("alertname", e.rule)
    labels["severity"] = routed.severity
    return labels


class AlertmanagerSink:
    """Posts events to Alertmanager from a background thread; ``submit`` never blocks."""

    def __init__(self, settings: AlertmanagerSettings, *, encoder: Encoder, metrics: Metrics,
                 clock: Callable[[], float] = time.time, log_interval: float = 10.0) -> None:
        self.settings = settings
        self.encoder = encoder
        self.metrics = metrics
        self.clock = clock
        self.queue: queue.Queue[BreachEvent] = queue.Queue(settings.queue_size)
        self.firing: dict[str, dict[str, Any]] = {}  # opened id -> alert (without endsAt)
        self.resolved: list[dict[str, Any]] = []  # to post once
        self.fresh: set[str] = set()  # firing alerts not yet posted
        self._final = threading.Event()
        self._next_resend = 0.0
        self._retry_at = 0.0
        self._backoff = 0.0
        self.log = RateLimitedLog(log, log_interval)
        self.thread = threading.Thread(target=self._run, name="alertmanager", daemon=True)

    def start(self) -> AlertmanagerSink:
        self.thread.start()
        return self

    # ------------------------------------------------------------ consume-loop side

    def submit(self, events: Sequence[BreachEvent]) -> None:
        for e in events:
            if not isinstance(e, BreachEvent):  # peer outliers are not posted (yet)
                continue
            try:
                self.queue.put_nowait(e)
            except queue.Full:
                self.metrics.alertmanager_dropped.labels("queue_full").inc()

    def close(self, timeout: float = 5.0) -> None:
        """Post what is pending (one last attempt, within ``timeout``) and stop the thread."""
        self._final.set()
        self.thread.join(timeout)
        if self.thread.is_alive():
            self.log.log(logging.WARNING, "alertmanager sink: pending alerts not posted within %g s",
                         timeout, key="close")
        self.log.flush()

    # ------------------------------------------------------------ worker

    def _run(self) -> None:
        while True:
            final = self._final.is_set()
            try:
                first = None if final else self.queue.get(timeout=0.2)
            except queue.Empty:
                first = None
            if first is not None:
                self._take(first)
            self._drain()
            try:
                self._post_due(final)
            except Exception:  # a bug here must not end the thread silently or crash the daemon
                log.exception("alertmanager sink: unexpected error; continuing")
            self.metrics.alertmanager_firing.set(len(self.firing))
            self.log.flush()
            if final:
                return

    def _drain(self) -> None:
        while True:
            try:
                self._take(self.queue.get_nowait())
            except queue.Empty:
                return

    def _take(self, e: BreachEvent) -> None:
        routed = self.encoder.route(e)
        now = self.clock()
        if e.type == OPENED:
            alert: dict[str, Any] = {"labels": alert_labels(e, routed),
                                     "annotations": dict(routed.annotations),
                                     "startsAt": rfc3339(min(e.started, now))}
            if self.settings.generator_url is not None:
                url = self.settings.generator_url.render(placeholders(e, routed.severity, routed.summary))
                if url:
                    alert["generatorURL"] = url
            self.firing[e.id] = alert
            self.fresh.add(e.id)
            return
        opened = self.firing.pop(e.opened_id or "", None)
        self.fresh.discard(e.opened_id or "")
        ends = min(e.time, now)
        if opened is None:  # opened before a restart: the closed event's own labels
            opened = {"labels": alert_labels(e, routed), "annotations": dict(routed.annotations),
                      "startsAt": rfc3339(min(e.started, ends))}
        resolved = {**opened, "annotations": {**opened["annotations"], **routed.annotations},
                    "endsAt": rfc3339(max(ends, e.started))}
        if len(self.resolved) >= self.settings.queue_size:
            self.resolved.pop(0)
            self.metrics.alertmanager_dropped.labels("pending_full").inc()
        self.resolved.append(resolved)

    def _post_due(self, final: bool = False) -> None:
        mono = time.monotonic()
        if mono < self._retry_at and not final:
            return
        resend = mono >= self._next_resend and bool(self.firing)
        if not (resend or self.fresh or self.resolved):
            return
        ends = rfc3339(self.clock() + ENDS_AFTER * self.settings.resend_interval)
        ids = list(self.firing) if resend else list(self.fresh)
        batch = [(("firing", i), {**self.firing[i], "endsAt": ends}) for i in ids]
        batch += [(("resolved", j), a) for j, a in enumerate(self.resolved)]
        refused = self._post_all(batch)
        if refused is None:
            self._backoff = min(self.settings.max_backoff, max(0.5, self._backoff * 2))
            self._retry_at = time.monotonic() + self._backoff
            return
        self._backoff = 0.0
        n_resolved = len(self.resolved)
        for kind, key in refused:  # never retried: Alertmanager will refuse them again
            if kind == "firing":
                self.firing.pop(key, None)
        self.fresh.difference_update(ids)
        del self.resolved[:n_resolved]
        sent = Counter(kind for (kind, _k), _a in batch if (kind, _k) not in refused)
        for kind in ("firing", "resolved"):
            self.metrics.alertmanager_alerts_sent.labels(kind).inc(sent[kind])
        if resend:
            self._next_resend = mono + self.settings.resend_interval

    def _post_all(self, batch: list[tuple[tuple[str, Any], dict[str, Any]]]) -> set | None:
        """Post in chunks. None when Alertmanager could not be reached or failed (retry all
        later; posting an alert twice is harmless); otherwise the keys of refused alerts."""
        refused: set = set()
        for lo in range(0, len(batch), CHUNK):
            chunk = batch[lo:lo + CHUNK]
            status = self._post([a for _k, a in chunk])
            if status == "failed":
                return None
            if status == "refused":
                if len(chunk) > 1:  # a 400 refuses the whole request: find the alerts it refuses
                    for key, a in chunk:
                        one = self._post([a])
                        if one == "failed":
                            return None
                        if one == "refused":
                            refused.add(key)
                else:
                    refused.add(chunk[0][0])
        for _key, a in (x for x in batch if x[0] in refused):
            self.metrics.alertmanager_rejected.inc()
            self.log.log(logging.ERROR, "alertmanager refused the alert %s; dropped", a.get("labels"),
                         key="refused")
        return refused

    def _post(self, alerts: list[dict[str, Any]]) -> str:
        """One request: 'ok', 'refused' (400/422: will never succeed) or 'failed' (retry)."""
        req = urllib.request.Request(self.settings.url, data=orjson.dumps(alerts), method="POST",
                                     headers={"Content-Type": "application/json"})
        reason = "connection"
        try:
            with urllib.request.urlopen(req, timeout=self.settings.timeout) as resp:
                resp.read(65536)
            return "ok"
        except urllib.error.HTTPError as exc:
            if exc.code in (400, 422):
                self.metrics.alertmanager_post_failures.labels("refused").inc()
                return "refused"
            reason = "server_error" if exc.code >= 500 else "http_error"
            why = f"HTTP {exc.code}"
        except TimeoutError:
            reason, why = "timeout", f"no answer within {self.settings.timeout:g} s"
        except (urllib.error.URLError, OSError, ValueError) as exc:
            why = str(getattr(exc, "reason", exc))
        self.metrics.alertmanager_post_failures.labels(reason).inc()
        self.log.log(logging.WARNING, "posting %d alert(s) to %s failed (%s); retrying with backoff",
                     len(alerts), self.settings.url, why, key=("post", reason))
        return "failed"


def alertmanager_sink(config, settings, metrics: Metrics) -> AlertmanagerSink | None:
    """The sink the daemon's settings ask for (``output.alertmanager.url``), started; or None."""
    am = getattr(settings, "alertmanager", None)
    if am is None:
        return None
    return AlertmanagerSink(am, encoder=Encoder(config, settings.source), metrics=metrics).start()
