"""The ``shadow`` config section: where shadow events go, how alerts map to series, the slack.

``shadow: true`` is short for ``shadow: {enabled: true}``; ``streamdet run --shadow`` turns it on
regardless of the file.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace

from streamdet.config import Config, ConfigError, _Section
from streamdet.shadow.alerts_in import MAX_BODY, SeriesMatch
from streamdet.shadow.compare import DEFAULT_SLACK


@dataclass(frozen=True, slots=True, kw_only=True)
class ShadowSettings:
    enabled: bool = False
    topic: str = "streamdet-shadow"  # shadow events and summaries (or --events-file)
    slack: float = DEFAULT_SLACK
    match: SeriesMatch = field(default_factory=SeriesMatch)
    webhook_path: str = "/alerts"  # on the health port
    alerts_topic: str | None = None  # Kafka topic carrying webhook payloads
    max_body: int = MAX_BODY
    summary_interval: float = 3600.0  # wall seconds between streamdet.shadow.summary events
    settle: float = 3600.0  # an incident is final once nothing touched it for slack + settle
    retention: float = 35 * 86400.0  # intervals older than this (data time) are forgotten

    def on(self) -> ShadowSettings:
        return replace(self, enabled=True)


def parse_shadow(config: Config) -> ShadowSettings:
    """Validate ``config.extra['shadow']``; raises ConfigError naming each bad key path."""
    raw = config.extra.get("shadow")
    d = ShadowSettings()
    if raw is None or raw is False:
        return d
    if raw is True:
        return d.on()
    problems: list[str] = []
    s = _Section(raw, "shadow", problems)
    m = s.section("match")
    labels = m.get("labels", list(d.match.labels))
    if isinstance(labels, str):
        labels = [labels]
    if not isinstance(labels, list) or not all(isinstance(x, str) and x for x in labels):
        m.bad("labels", "expected a list of label names")
        labels = list(d.match.labels)
    metrics = m.get("metrics", {}) or {}
    if not isinstance(metrics, Mapping) or not all(isinstance(k, str) and isinstance(v, str)
                                                   for k, v in metrics.items()):
        m.bad("metrics", "expected a mapping of alert name -> metric name")
        metrics = {}
    m.done()
    path = s.text("webhook_path", d.webhook_path)
    if not path.startswith("/") or path in ("/metrics", "/healthz", "/readyz"):
        s.bad("webhook_path", "must start with '/' and not be /metrics, /healthz or /readyz")
    alerts_topic = s.get("alerts_topic", None)
    if alerts_topic is not None and not (isinstance(alerts_topic, str) and alerts_topic):
        s.bad("alerts_topic", "expected a topic name or null")
        alerts_topic = None
    out = ShadowSettings(
        enabled=s.boolean("enabled", True),
        topic=s.text("topic", d.topic),
        slack=s.duration("slack", d.slack),
        match=SeriesMatch(labels=tuple(labels), metrics=dict(metrics)),
        webhook_path=path,
        alerts_topic=alerts_topic,
        max_body=int(s.number("max_body", d.max_body, lo=1024, integer=True)),
        summary_interval=s.duration("summary_interval", d.summary_interval, positive=True),
        settle=s.duration("settle", d.settle),
        retention=s.duration("retention", d.retention, positive=True),
    )
    s.done()
    if problems:
        raise ConfigError(problems)
    return out
