"""Shadow mode inside the daemon: the webhook route, the alerts topic, the book, its metrics.

The daemon calls :class:`ShadowRuntime` at five points only (start, events out, the periodic
tick, checkpoint, stop), so the consumer loop stays as it is. Events go to the shadow topic (or
the events file) with the CloudEvents extension attribute ``shadow: true``; engine state is the
same as without shadow mode, so switching it off keeps everything learned. The comparison state
is saved with every checkpoint (``shadow-comparison.json`` in ``state.dir``, atomically).
"""

from __future__ import annotations

import logging
import os
import time
import uuid
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import orjson
from prometheus_client import Counter, Histogram

from streamdet.events import BreachEvent, rfc3339
from streamdet.shadow.alerts_in import AlertTopicReader, Parsed, webhook_app
from streamdet.shadow.book import Comparison, ShadowBook
from streamdet.shadow.settings import ShadowSettings

log = logging.getLogger("streamdet.shadow")
SUMMARY = "streamdet.shadow.summary"
EXTENSIONS = {"shadow": True}  # CloudEvents extension attribute on everything shadow mode sends
STATE_FILE = "shadow-comparison.json"
_NAMESPACE = uuid.UUID("5d0c7a51-2f0e-5a4c-9a0b-7c3f0e1b6a22")
# Lead-time buckets (seconds, negative = streamdet earlier): common practice for paging delays.
LEAD_BUCKETS = (-3600, -1800, -900, -600, -300, -120, -60, 0, 60, 120, 300, 600, 900, 1800, 3600)


class ShadowMetrics:
    """``streamdet_shadow_*`` metrics, registered on the daemon's registry."""

    def __init__(self, registry) -> None:
        def c(name: str, doc: str, labels: tuple[str, ...] = ()) -> Counter:
            return Counter(f"streamdet_shadow_{name}", doc, labels, registry=registry)

        self.alerts_in = c("alerts_in", "Existing alerts received, by status", ("status",))
        self.payloads_bad = c("payloads_bad", "Alert payloads or alerts refused, by reason", ("reason",))
        self.alerts_unmatched = c("alerts_unmatched", "Alerts about no known series when received")
        self.incidents = c("incidents", "Final compared incidents, by class (both, only_theirs, only_ours)",
                           ("kind",))
        self.summaries = c("summaries", "streamdet.shadow.summary events sent")
        self.lead = Histogram("streamdet_shadow_lead_seconds",
                              "Streamdet's start minus the existing alert's start, per incident seen by both",
                              registry=registry, buckets=LEAD_BUCKETS)


def summary_document(comparison: Comparison, source: str) -> dict[str, Any]:
    """The ``streamdet.shadow.summary`` CloudEvent (deterministic id per horizon)."""
    data = {
        "since": rfc3339(comparison.since) if comparison.since > -1e18 else None,
        "until": rfc3339(comparison.horizon),
        "total": comparison.total.to_dict(),
        "rules": {r: t.to_dict() for r, t in sorted(comparison.rules.items())},
        "series": len(comparison.series),
        "unmatched_alerts": len(comparison.unmatched),
    }
    return {"specversion": "1.0", "id": str(uuid.uuid5(_NAMESPACE, f"{source}|{comparison.horizon:.3f}")),
            "source": source, "type": SUMMARY, "subject": "shadow", "time": rfc3339(comparison.horizon),
            "datacontenttype": "application/json", **EXTENSIONS, "data": data}


class ShadowRuntime:
    def __init__(self, settings: ShadowSettings, *, registry, state_dir: str | Path,
                 consumer_conf: Mapping[str, Any] | None = None, source: str = "streamdet") -> None:
        self.settings = settings
        self.source = source  # CloudEvents source of the summaries
        self.metrics = ShadowMetrics(registry)
        self.path = Path(state_dir) / STATE_FILE
        self.book = self.load()
        self.reader: AlertTopicReader | None = None
        if settings.alerts_topic and consumer_conf is not None:
            group = f"{consumer_conf.get('group.id', 'streamdet')}-shadow-alerts"
            conf = {**consumer_conf, "group.id": group, "enable.auto.commit": True,
                    "partition.assignment.strategy": "range,roundrobin"}
            self.reader = AlertTopicReader(conf, settings.alerts_topic, self.accept, self.refused,
                                           max_body=settings.max_body).start()
        self._last_summary = time.monotonic()

    # ------------------------------------------------------------ in

    def load(self) -> ShadowBook:
        s = self.settings
        try:
            doc = orjson.loads(self.path.read_bytes())
        except FileNotFoundError:
            return ShadowBook(match=s.match, slack=s.slack)
        except (OSError, orjson.JSONDecodeError) as exc:
            log.error("%s: unreadable shadow comparison state (%s); starting the comparison afresh",
                      self.path, exc)
            return ShadowBook(match=s.match, slack=s.slack)
        try:
            return ShadowBook.from_dict(doc, match=s.match, slack=s.slack)
        except (ValueError, KeyError, TypeError, IndexError, AttributeError) as exc:
            log.error("%s: unusable shadow comparison state (%s); starting the comparison afresh",
                      self.path, exc)
            return ShadowBook(match=s.match, slack=s.slack)

    def routes(self) -> dict[str, Callable]:
        return {self.settings.webhook_path: webhook_app(self.accept, max_body=self.settings.max_body,
                                                        refused=self.refused)}

    def accept(self, parsed: Parsed) -> None:
        for a in parsed.alerts:
            self.metrics.alerts_in.labels(a.status).inc()
        for _ in parsed.errors:
            self.metrics.payloads_bad.labels("bad_alert").inc()
        unmatched = self.book.add_alerts(parsed.alerts)
        if unmatched:
            self.metrics.alerts_unmatched.inc(len(unmatched))
            log.info("%d alert(s) match no known series yet (first: %s)", len(unmatched),
                     dict(unmatched[0].labels))

    def refused(self, code: str) -> None:
        self.metrics.payloads_bad.labels(code).inc()

    def observe(self, events: Iterable[BreachEvent]) -> None:
        events = list(events)
        if events:
            self.book.add_events(events)

    # ------------------------------------------------------------ periodic

    def tick(self, engines: Iterable, send: Callable[[bytes, dict[str, Any]], None],
             *, force: bool = False) -> Comparison | None:
        """Every ``summary_interval``: learn the engines' series, count final incidents, send a summary."""
        if not force and time.monotonic() - self._last_summary < self.settings.summary_interval:
            return None
        self._last_summary = time.monotonic()
        for engine in engines:
            self.book.add_series(series_of(engine))
            if engine.clock > float("-inf"):
                self.book.advance(engine.clock)
        if self.book.latest == float("-inf"):
            return None
        self.book.forget_before(self.book.latest - self.settings.retention)
        comparison = self.book.compare(since=self.book.latest - self.settings.retention)
        for _key, inc in self.book.final_incidents(comparison, self.settings.settle):
            self.metrics.incidents.labels(inc.kind).inc()
            if inc.lead is not None:
                self.metrics.lead.observe(inc.lead)
        send(b"shadow", summary_document(comparison, self.source))
        self.metrics.summaries.inc()
        return comparison

    def save(self) -> None:
        """Atomically (temp file, fsync, rename), with every checkpoint."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_suffix(".tmp")
        with open(tmp, "wb") as fh:
            fh.write(orjson.dumps(self.book.to_dict()))
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.path)

    def stop(self) -> None:
        if self.reader is not None:
            self.reader.stop()


def series_of(engine) -> list[tuple[str, str, dict[str, str], str]]:
    """(key, metric, labels, rule name) of every live series of an engine."""
    tab = engine.table
    rules = engine.config.rules
    out = []
    for row, key in enumerate(tab.keys):
        meta = tab.meta[row] if row < len(tab.meta) else None
        if key is None or meta is None:
            continue
        r = int(tab.rule[row])
        out.append((key, meta[0], dict(meta[1]), rules[r].name if 0 <= r < len(rules) else "?"))
    return out
