"""Daemon settings: the ``kafka``, ``state``, ``health``, ``output`` and ``logging`` sections.

Environment variables override the file for container use: ``STREAMDET_<SECTION>_<KEY>``
(for example ``STREAMDET_KAFKA_BOOTSTRAP_SERVERS``, ``STREAMDET_STATE_DIR``), and
``STREAMDET_LIBRDKAFKA_<NAME>`` sets a librdkafka property for both clients, with ``_``
standing for ``.`` (``STREAMDET_LIBRDKAFKA_SASL_PASSWORD`` -> ``sasl.password``). Secrets are
never logged: :func:`redacted` masks them.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from streamdet.config import Config, ConfigError, _Section

_SECRET = re.compile(r"(password|secret|token|credential|key(?!s)|\.pem|jaas)", re.I)
_SECTIONS = ("kafka", "state", "health", "output", "logging")


@dataclass(frozen=True, slots=True, kw_only=True)
class DaemonSettings:
    bootstrap_servers: str = "127.0.0.1:9092"
    group_id: str = "streamdet"
    input_topics: tuple[str, ...] = ("metrics",)
    output_topic: str | None = "streamdet-events"
    dead_letter_topic: str | None = "streamdet-dead-letters"
    batch_size: int = 20000
    poll_timeout: float = 0.5
    checkpoint_interval: float = 10.0
    session_timeout: float = 45.0
    client: Mapping[str, str] = field(default_factory=dict)  # librdkafka, both clients
    consumer: Mapping[str, str] = field(default_factory=dict)
    producer: Mapping[str, str] = field(default_factory=dict)
    state_dir: str = "./streamdet-state"
    health_address: str = "127.0.0.1:9464"
    source: str = "streamdet"
    log_format: str = "text"
    log_level: str = "info"

    @property
    def health_host_port(self) -> tuple[str, int]:
        host, _, port = self.health_address.rpartition(":")
        return host or "127.0.0.1", int(port)


def apply_environment(raw: Mapping[str, Any], env: Mapping[str, str]) -> dict[str, Any]:
    """A copy of the decoded YAML with ``STREAMDET_*`` variables applied."""
    out: dict[str, Any] = {k: (dict(v) if isinstance(v, Mapping) else v) for k, v in raw.items()}
    for name, value in env.items():
        if not name.startswith("STREAMDET_"):
            continue
        rest = name[len("STREAMDET_"):]
        if rest.startswith("LIBRDKAFKA_"):
            prop = rest[len("LIBRDKAFKA_"):].lower().replace("_", ".")
            kafka = out.setdefault("kafka", {})
            kafka["client"] = {**kafka.get("client", {}), prop: value}
            continue
        for section in _SECTIONS:
            if rest.startswith(section.upper() + "_"):
                key = rest[len(section) + 1:].lower()
                out.setdefault(section, {})[key] = _coerce(value)
    return out


def _coerce(value: str) -> Any:
    if "," in value:
        return [v.strip() for v in value.split(",") if v.strip()]
    for cast in (int, float):
        try:
            return cast(value)
        except ValueError:
            pass
    return value


def _props(sec: _Section, name: str) -> dict[str, str]:
    raw = sec.get(name, {}) or {}
    if not isinstance(raw, Mapping):
        sec.bad(name, "expected a mapping of librdkafka properties")
        return {}
    return {str(k): str(v).lower() if isinstance(v, bool) else str(v) for k, v in raw.items()}


def parse_settings(config: Config) -> DaemonSettings:
    """Validate the adapter sections kept aside by :func:`streamdet.config.parse_config`."""
    problems: list[str] = []
    d = DaemonSettings()
    k = _Section(config.extra.get("kafka"), "kafka", problems)
    topics = k.get("input_topics", list(d.input_topics))
    if isinstance(topics, str):
        topics = [topics]
    if not isinstance(topics, list) or not topics or not all(isinstance(t, str) and t for t in topics):
        k.bad("input_topics", "expected a non-empty list of topic names")
        topics = list(d.input_topics)

    def topic_or_none(name: str, default: str | None) -> str | None:
        raw = k.get(name, default)
        if raw in (None, "", False):
            return None
        if not isinstance(raw, str):
            k.bad(name, f"expected a topic name or null, got {raw!r}")
            return default
        return raw

    kw = dict(
        bootstrap_servers=k.text("bootstrap_servers", d.bootstrap_servers),
        group_id=k.text("group_id", d.group_id),
        input_topics=tuple(topics),
        output_topic=topic_or_none("output_topic", d.output_topic),
        dead_letter_topic=topic_or_none("dead_letter_topic", d.dead_letter_topic),
        batch_size=k.number("batch_size", d.batch_size, lo=1, integer=True),
        poll_timeout=k.duration("poll_timeout", d.poll_timeout, positive=True),
        checkpoint_interval=k.duration("checkpoint_interval", d.checkpoint_interval, positive=True),
        session_timeout=k.duration("session_timeout", d.session_timeout, positive=True),
        client=_props(k, "client"),
        consumer=_props(k, "consumer"),
        producer=_props(k, "producer"),
    )
    k.done()
    s = _Section(config.extra.get("state"), "state", problems)
    kw["state_dir"] = s.text("dir", d.state_dir)
    s.done()
    h = _Section(config.extra.get("health"), "health", problems)
    address = h.text("address", d.health_address)
    if not re.fullmatch(r"[^:]*:\d{1,5}", address):
        h.bad("address", f"expected host:port, got {address!r}")
        address = d.health_address
    kw["health_address"] = address
    h.done()
    o = _Section(config.extra.get("output"), "output", problems)
    kw["source"] = o.text("source", d.source)
    o.done()
    lg = _Section(config.extra.get("logging"), "logging", problems)
    kw["log_format"] = lg.choice("format", d.log_format, ("text", "json"))
    kw["log_level"] = lg.choice("level", d.log_level, ("debug", "info", "warning", "error"))
    lg.done()
    if config.input.format == "csv":
        problems.append("input.format: the daemon reads json or influx messages; csv is for replay")
    if problems:
        raise ConfigError(problems)
    return DaemonSettings(**kw)


def redacted(props: Mapping[str, str]) -> dict[str, str]:
    """librdkafka properties with secret values masked, for logs."""
    return {k: ("***" if _SECRET.search(k) else v) for k, v in props.items()}


def load_with_environment(path: str | None, env: Mapping[str, str] | None = None):
    """Read the YAML (or defaults), apply ``STREAMDET_*`` variables, validate both parts."""
    import yaml

    from streamdet.config import parse_config

    env = os.environ if env is None else env
    raw: dict[str, Any] = {}
    if path:
        try:
            with open(path, encoding="utf-8") as fh:
                raw = yaml.safe_load(fh) or {}
        except OSError as exc:
            raise ConfigError([f"{path}: cannot read ({exc.strerror})"]) from None
        except yaml.YAMLError as exc:
            raise ConfigError([f"{path}: not valid YAML ({exc})"]) from None
    if not isinstance(raw, Mapping):
        raise ConfigError(["(top level): expected a mapping"])
    config = parse_config(apply_environment(raw, env))
    return config, parse_settings(config)
