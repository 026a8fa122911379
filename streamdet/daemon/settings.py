"""Daemon settings: the ``kafka``, ``state``, ``health``, ``output`` and ``logging`` sections.

Environment variables override the file for container use: ``STREAMDET_<SECTION>_<KEY>``
(for example ``STREAMDET_KAFKA_BOOTSTRAP_SERVERS``, ``STREAMDET_STATE_DIR``), and
``STREAMDET_LIBRDKAFKA_<NAME>`` sets a librdkafka property for both clients, with ``_``
standing for ``.`` (``STREAMDET_LIBRDKAFKA_SASL_PASSWORD`` -> ``sasl.password``). A variable's
value stays a string unless its key is a list (``input_topics``: comma-separated) or a number
(``batch_size``). Secrets are never logged: :func:`redacted` masks them.

:func:`parse_settings` checks everything ``run`` would otherwise fail on later: the port, the
state directory, and the librdkafka properties (through librdkafka's own validation, without
connecting).
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from confluent_kafka import Consumer, KafkaException, Producer

from streamdet.alerting.alertmanager import AlertmanagerSettings, parse_alertmanager
from streamdet.config import Config, ConfigError, InputConfig, _Section, parse_input, read_config_file

# Property names whose values are secrets (issue 7: password, secret, key, token and
# sasl.oauthbearer.config, which carries a client secret); credential, .pem and jaas besides.
_SECRET = re.compile(r"(password|secret|key|token|oauthbearer\.config|credential|\.pem|jaas)", re.I)
_SECTIONS = ("kafka", "state", "health", "output", "logging")
# Environment values are strings, except for these keys.
_ENV_LISTS = {("kafka", "input_topics")}
_ENV_NUMBERS = {("kafka", "batch_size"), ("state", "chunk_bytes")}


@dataclass(frozen=True, slots=True, kw_only=True)
class DaemonSettings:
    bootstrap_servers: str = "127.0.0.1:9092"
    group_id: str = "streamdet"
    input_topics: tuple[str, ...] = ("metrics",)
    topic_inputs: Mapping[str, InputConfig] = field(default_factory=dict)  # per-topic format
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
    on_rule_change: str = "error"  # state.on_rule_change: error | drop (see Engine.restore)
    health_address: str = "127.0.0.1:8734"
    source: str = "streamdet"
    log_format: str = "text"
    log_level: str = "info"
    alertmanager: AlertmanagerSettings | None = None  # output.alertmanager
    mutes_api: bool = False  # health.mutes_api: GET/POST/DELETE /mutes on the health port
    mutes_api_remote: bool = False  # health.mutes_api_remote: answer non-loopback clients too
    # --- Kafka state store (daemon/kafka_store.py): state.store, state.topic, state.chunk_bytes
    state_store: str = "local"  # local (state.dir) | kafka (a compacted topic)
    state_topic: str | None = None  # default <group_id>-state
    state_chunk_bytes: int = 900_000

    @property
    def health_host_port(self) -> tuple[str, int]:
        host, _, port = self.health_address.rpartition(":")
        return host or "127.0.0.1", int(port)

    def consumer_properties(self) -> dict[str, Any]:
        """librdkafka properties of the consumer, before the daemon adds its callbacks."""
        return {"bootstrap.servers": self.bootstrap_servers, **self.client, "group.id": self.group_id,
                "enable.auto.commit": False, "auto.offset.reset": "earliest",
                "partition.assignment.strategy": "cooperative-sticky",
                "session.timeout.ms": int(self.session_timeout * 1000), **self.consumer}

    def producer_properties(self) -> dict[str, Any]:
        """librdkafka properties of the producer (events and dead letters)."""
        return {"bootstrap.servers": self.bootstrap_servers, **self.client, "enable.idempotence": True,
                "acks": "all", "linger.ms": 5, "queue.buffering.max.messages": 100_000, **self.producer}


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
                out.setdefault(section, {})[key] = _coerce(section, key, value)
    return out


def _coerce(section: str, key: str, value: str) -> Any:
    """A string stays a string unless the key is a list or a number."""
    if (section, key) in _ENV_LISTS:
        return [v.strip() for v in value.split(",") if v.strip()]
    if (section, key) in _ENV_NUMBERS:
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
    topics, topic_inputs = _input_topics(k, config, d)

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
        topic_inputs=topic_inputs,
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
    kw["on_rule_change"] = s.choice("on_rule_change", d.on_rule_change, ("error", "drop"))
    kw["state_store"] = s.choice("store", d.state_store, ("local", "kafka"))
    topic = s.get("topic", None)
    if topic is not None and (not isinstance(topic, str) or not topic):
        s.bad("topic", f"expected a topic name, got {topic!r}")
        topic = None
    kw["state_topic"] = topic
    kw["state_chunk_bytes"] = s.number("chunk_bytes", d.state_chunk_bytes, lo=1024, hi=64 * 1024 * 1024,
                                       integer=True)
    if (why := _unusable_directory(kw["state_dir"])) is not None:
        s.bad("dir", why)
    s.done()
    h = _Section(config.extra.get("health"), "health", problems)
    address = h.text("address", d.health_address)
    if not re.fullmatch(r"[^:]*:\d{1,5}", address):
        h.bad("address", f"expected host:port, got {address!r}")
        address = d.health_address
    elif int(address.rpartition(":")[2]) > 65535:
        h.bad("address", f"port must be 0..65535 (0: any free port), got {address!r}")
        address = d.health_address
    kw["health_address"] = address
    # --- mutes API (streamdet/daemon/mutes_api.py): off by default, loopback only by default
    kw["mutes_api"] = h.boolean("mutes_api", d.mutes_api)
    kw["mutes_api_remote"] = h.boolean("mutes_api_remote", d.mutes_api_remote)
    from streamdet.daemon.mutes_api import is_loopback

    host = address.rpartition(":")[0] or "127.0.0.1"
    if kw["mutes_api"] and not kw["mutes_api_remote"] and not is_loopback(host):
        h.bad("mutes_api", f"the health address {address!r} is not a loopback address: anyone who "
              "reaches it could silence alerts. Bind health.address to 127.0.0.1, or accept the risk "
              "with health.mutes_api_remote: true")
    # --- end mutes API
    h.done()
    o = _Section(config.extra.get("output"), "output", problems)
    kw["source"] = o.text("source", d.source)
    kw["alertmanager"] = parse_alertmanager(o.section("alertmanager"))
    o.done()
    lg = _Section(config.extra.get("logging"), "logging", problems)
    kw["log_format"] = lg.choice("format", d.log_format, ("text", "json"))
    kw["log_level"] = lg.choice("level", d.log_level, ("debug", "info", "warning", "error"))
    lg.done()
    if config.input.format == "csv":
        problems.append("input.format: the daemon reads messages (json, influx, telegraf_json, "
                        "otlp_proto, otlp_json); csv is for replay")
    if not problems:
        problems.extend(librdkafka_problems(DaemonSettings(**kw)))
    if problems:
        raise ConfigError(problems)
    return DaemonSettings(**kw)


def _input_topics(k: _Section, config: Config, d: DaemonSettings
                  ) -> tuple[list[str], dict[str, InputConfig]]:
    """``kafka.input_topics``: topic names, or ``{topic: name, format: ..., ...}`` entries whose
    other keys override the ``input`` section for that topic."""
    raw = k.get("input_topics", list(d.input_topics))
    if isinstance(raw, str):
        raw = [raw]
    if not isinstance(raw, list) or not raw:
        k.bad("input_topics", "expected a non-empty list of topic names or {topic: ..., format: ...}")
        return list(d.input_topics), {}
    topics: list[str] = []
    inputs: dict[str, InputConfig] = {}
    for i, entry in enumerate(raw):
        path = f"{k.key('input_topics')}[{i}]"
        if isinstance(entry, str) and entry:
            topics.append(entry)
            continue
        if not isinstance(entry, Mapping):
            k.problems.append(f"{path}: expected a topic name or a mapping with 'topic', got {entry!r}")
            continue
        name = entry.get("topic")
        if not isinstance(name, str) or not name:
            k.problems.append(f"{path}.topic: expected a topic name, got {name!r}")
            continue
        rest = _Section({key: v for key, v in entry.items() if key != "topic"}, path, k.problems)
        inp = parse_input(rest, config.input)
        if inp.format == "csv":
            k.problems.append(f"{path}.format: csv is for replay; a topic carries json, influx, "
                              "telegraf_json, otlp_proto or otlp_json")
        topics.append(name)
        inputs[name] = inp
    for dup in sorted({t for t in topics if topics.count(t) > 1}):
        k.problems.append(f"{k.key('input_topics')}: topic {dup!r} is listed more than once")
    return topics or list(d.input_topics), inputs


def _unusable_directory(path: str) -> str | None:
    """Why ``path`` cannot be (or become) a writable directory, or None."""
    p = Path(path)
    if p.exists():
        if not p.is_dir():
            return f"{path!r} exists and is not a directory"
        if not os.access(p, os.W_OK | os.X_OK):
            return f"directory {path!r} is not writable"
        return None
    parent = p.absolute().parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        return f"cannot create {path!r}: {str(parent)!r} is not a directory"
    if not os.access(parent, os.W_OK | os.X_OK):
        return f"cannot create {path!r}: {str(parent)!r} is not writable"
    return None


class _Discard:
    """Takes librdkafka's log lines while a client is built only to be validated."""

    def log(self, level: int, msg: str, *args: object) -> None:
        pass


_QUIET = _Discard()


def librdkafka_problems(settings: DaemonSettings) -> list[str]:
    """librdkafka's own verdict on both clients' properties (unknown names, bad values, conflicts
    such as idempotence without acks=all), found by creating each client without brokers to
    contact and dropping it. Secret values are masked in the messages."""
    problems = []
    for name, props, client in (("consumer", settings.consumer_properties(), Consumer),
                                ("producer", settings.producer_properties(), Producer)):
        conf = {k: v for k, v in props.items() if k != "bootstrap.servers"}
        conf.update({"logger": _QUIET, "error_cb": lambda _err: None})
        try:
            handle = client(conf)
        except KafkaException as exc:
            err = exc.args[0]
            text = err.str() if hasattr(err, "str") else str(err)
            problems.append(f"kafka ({name} properties from kafka.client / kafka.{name}): "
                            f"{_mask_values(text.strip(), props)}")
            continue
        except (TypeError, ValueError) as exc:
            problems.append(f"kafka ({name} properties): {_mask_values(str(exc), props)}")
            continue
        if isinstance(handle, Consumer):
            handle.close()
    return problems


def _mask_values(text: str, props: Mapping[str, Any]) -> str:
    for k, v in props.items():
        if _SECRET.search(k) and isinstance(v, str) and v:
            text = text.replace(v, "***")
    return text


def redacted(props: Mapping[str, str]) -> dict[str, str]:
    """librdkafka properties with secret values masked, for logs."""
    return {k: ("***" if _SECRET.search(k) else v) for k, v in props.items()}


def load_with_environment(path: str | None, env: Mapping[str, str] | None = None):
    """Read the YAML (or defaults), apply ``STREAMDET_*`` variables, validate both parts."""
    from streamdet.config import parse_config

    env = os.environ if env is None else env
    raw = read_config_file(path) if path else {}
    if not isinstance(raw, Mapping):
        raise ConfigError(["(top level): expected a mapping"])
    config = parse_config(apply_environment(raw, env))
    return config, parse_settings(config)
