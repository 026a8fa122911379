"""YAML configuration as frozen dataclasses, validated with errors that name the key path.

``load_config(path)`` or ``parse_config(mapping)`` returns a :class:`Config` or raises
:class:`ConfigError` listing every problem found (not just the first).

>>> cfg = parse_config({"rules": [{"name": "all", "width": 4}]})
>>> cfg.rules[0].width, cfg.rules[0].confirm_steps
(4.0, 5)
"""

from __future__ import annotations

import fnmatch
import logging
import math
import re
import zoneinfo
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from streamdet.alerting.templates import NAME as TEMPLATE_NAME
from streamdet.alerting.templates import Template, TemplateError

AGGREGATIONS = ("mean", "sum", "min", "max", "last", "count")
DIRECTIONS = ("either", "rise", "drop")
# Old spellings of ``direction``, still read (with a warning) so existing files keep working.
OLD_DIRECTIONS = {"both": "either", "above": "rise", "below": "drop"}
KINDS = ("gauge", "counter")
FORMATS = ("json", "influx", "csv", "telegraf_json", "otlp_proto", "otlp_json")
TIME_UNITS = ("s", "ms", "us", "ns")
DEFAULT_RESOURCE_LABELS = ("service.name", "service.instance.id", "host.name")
_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800}
_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(ms|s|m|h|d|w)?\s*$")
_STEPS = re.compile(r"^\s*(\d+)\s*steps?\s*$")
log = logging.getLogger("streamdet.config")


class ConfigError(ValueError):
    """Invalid configuration; ``problems`` holds one ``key.path: what is wrong`` line each."""

    def __init__(self, problems: list[str]) -> None:
        self.problems = problems
        super().__init__("invalid configuration:\n  " + "\n  ".join(problems))


@dataclass(frozen=True, slots=True, kw_only=True)
class Span:
    """A length given either in seconds or in steps (``"2h"`` or ``"12 steps"``)."""

    seconds: float | None = None
    steps: int | None = None

    def in_steps(self, step: float, minimum: int = 1) -> int:
        if self.steps is not None:
            return max(minimum, self.steps)
        assert self.seconds is not None
        return max(minimum, math.ceil(self.seconds / step - 1e-9))


@dataclass(frozen=True, slots=True, kw_only=True)
class LabelMatcher:
    """Matches one label value: a glob, a regular expression, or the negation of either."""

    glob: str | None = None
    regex: str | None = None
    negate: bool = False

    def matches(self, value: str | None) -> bool:
        if value is None:
            hit = False
        elif self.regex is not None:
            hit = re.fullmatch(self.regex, value) is not None
        else:
            hit = fnmatch.fnmatchcase(value, self.glob or "*")
        return hit != self.negate


@dataclass(frozen=True, slots=True, kw_only=True)
class Match:
    metric: str = "*"
    labels: tuple[tuple[str, LabelMatcher], ...] = ()

    def matches(self, metric: str, labels: Mapping[str, str]) -> bool:
        if not fnmatch.fnmatchcase(metric, self.metric):
            return False
        return all(m.matches(labels.get(name)) for name, m in self.labels)


@dataclass(frozen=True, slots=True, kw_only=True)
class HoltParams:
    alpha: float = 0.1
    beta: float = 0.01
    phi: float = 0.9


@dataclass(frozen=True, slots=True, kw_only=True)
class SeasonalParams:
    enabled: bool = True
    alpha: float = 0.05
    beta: float = 0.005
    phi: float = 0.9
    memory_weeks: float = 6.0


@dataclass(frozen=True, slots=True, kw_only=True)
class LagParams:
    enabled: bool = True


@dataclass(frozen=True, slots=True, kw_only=True)
class QuantileParams:
    enabled: bool = True
    rate: float = 0.05


@dataclass(frozen=True, slots=True, kw_only=True)
class BlendParams:
    learning_rate: float = 0.5
    share: float = 0.02


@dataclass(frozen=True, slots=True, kw_only=True)
class ForecasterParams:
    holt: HoltParams = field(default_factory=HoltParams)
    seasonal: SeasonalParams = field(default_factory=SeasonalParams)
    lags: LagParams = field(default_factory=LagParams)
    quantile: QuantileParams = field(default_factory=QuantileParams)


PEER_METHODS = ("mad", "dbscan")
PEER_TOTALS = ("sum", "mean")
MAX_PEER_WINDOW = 288


@dataclass(frozen=True, slots=True, kw_only=True)
class PeerParams:
    """``peers``: series of the rule sharing the ``group_by`` label values form a group."""

    group_by: tuple[str, ...]
    method: str = "mad"  # mad: modified z-score per step; dbscan: shape of the last `window` steps
    threshold: float = 3.5  # mad: a member step is outside when |modified z| exceeds this
    min_members: int = 5  # members with data in a step needed to judge the group
    window: int = 12  # dbscan: steps per member vector
    every: int = 1  # dbscan: cluster every this many steps
    min_samples: int = 4  # dbscan: neighbourhood size (the point included) of a core point
    total: str | None = None  # sum | mean: the group's per-step total as a derived series


# ---- alert routing (issue 10): read by streamdet.alerting, never by the core
@dataclass(frozen=True, slots=True, kw_only=True)
class SeverityLevels:
    """Surprise (-log10 p of the breach's evidence) at which an event becomes ``warning`` and
    ``critical``; below ``warning`` it is ``info``. Width 3 opens at a surprise of about 5.1."""

    warning: float = 6.0
    critical: float = 10.0


@dataclass(frozen=True, slots=True, kw_only=True)
class Routing:
    """Static ``labels`` and templated ``annotations`` a rule adds to its events and alerts."""

    labels: tuple[tuple[str, str], ...] = ()
    annotations: tuple[tuple[str, Template], ...] = ()
    severity: SeverityLevels = field(default_factory=SeverityLevels)


_LABEL_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")  # Alertmanager's (Prometheus') label names
# ---- end of alert routing


@dataclass(frozen=True, slots=True, kw_only=True)
class Rule:
    """Settings for the series a rule selects. Defaults are the README's."""

    name: str = "default"
    match: Match = field(default_factory=Match)
    kind: str = "gauge"
    step: float | None = 60.0  # None: inferred per series ("auto")
    aggregation: str = "mean"
    lateness: float = 0.0
    grace: float = 7200.0  # partition event time past a step's end that closes it for every series
    width: float = 3.0
    min_width: float = 0.0
    scale_floor: float = 0.5
    timezone: str = "UTC"  # IANA name; hour-of-day and hour-of-week buckets follow local time
    direction: str = "either"  # which moves to watch: "rise" (above the band), "drop", "either"
    confirm_steps: int = 5
    clear_steps: int = 3
    rearm: Span = field(default_factory=lambda: Span(seconds=3600.0))
    relearn_after: Span = field(default_factory=lambda: Span(seconds=7200.0))
    warmup: Span = field(default_factory=lambda: Span(seconds=86400.0))
    forecasters: ForecasterParams = field(default_factory=ForecasterParams)
    blend: BlendParams = field(default_factory=BlendParams)
    peers: PeerParams | None = None
    routing: Routing = field(default_factory=Routing)

    @property
    def edge_rarity(self) -> float:
        """One-sided tail probability of a band edge: ``Q(width)``, as rare as ``width``
        standard deviations on normal noise."""
        return _normal_sf(self.width)

    @property
    def open_rarity(self) -> float:
        """Combined p-value of the evidence window that opens a breach, over all watched sides:
        as rare as two independent steps outside the band, ``(2 Q(width))**2``."""
        return (2.0 * self.edge_rarity) ** 2

    @property
    def unusual_rarity(self) -> float:
        """A step rarer than this on a side is *unusual* there (it may open a breach and does
        not count towards clearing): the edge of a band one standard deviation narrower."""
        return _normal_sf(max(self.width - 1.0, 0.5))


def _normal_sf(x: float) -> float:
    """P(Z > x) for a standard normal Z."""
    return 0.5 * math.erfc(x / math.sqrt(2.0))


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesLimits:
    max_series: int = 200_000
    idle_ttl: float = 7 * 86400.0


@dataclass(frozen=True, slots=True, kw_only=True)
class JsonMapping:
    """Key names of the JSON input (``input.json``) for producers with their own shape.

    ``time_unit`` "auto" tells epoch units apart by magnitude; ``label_keys`` lifts top-level
    keys into labels.
    """

    metric_key: str = "metric"
    labels_key: str = "labels"
    time_key: str = "time"
    value_key: str = "value"
    time_unit: str = "auto"
    label_keys: tuple[str, ...] = ()

    @property
    def is_default(self) -> bool:
        return self == JsonMapping()


@dataclass(frozen=True, slots=True, kw_only=True)
class InputConfig:
    format: str = "json"
    max_future: float = 3600.0
    influx_precision: str = "ns"
    telegraf_units: str = "s"  # Telegraf's json_timestamp_units
    json: JsonMapping = field(default_factory=JsonMapping)
    resource_labels: tuple[str, ...] = DEFAULT_RESOURCE_LABELS  # OTLP resource attributes kept


@dataclass(frozen=True, slots=True, kw_only=True)
class Config:
    rules: tuple[Rule, ...] = (Rule(),)
    series: SeriesLimits = field(default_factory=SeriesLimits)
    input: InputConfig = field(default_factory=InputConfig)
    lag_resolution: float = 7200.0  # engine.lag_resolution: cell size of the lag rings
    recent_steps: int = 0  # engine.recent_steps: steps per series kept for /series bands (0: none)
    extra: Mapping[str, Any] = field(default_factory=dict)  # sections owned by adapters
    warnings: tuple[str, ...] = field(default=(), compare=False)  # accepted, but should be changed
    mutes: tuple[Any, ...] = ()  # silences and maintenance windows (core/mutes.py: Mute)

    def rule_for(self, metric: str, labels: Mapping[str, str]) -> int | None:
        """Index of the first rule whose match selects the series, or None."""
        for i, rule in enumerate(self.rules):
            if rule.match.matches(metric, labels):
                return i
        return None


# ---------------------------------------------------------------- parsing

_DEFAULTS: dict[str, Any] = {
    c.__name__: c()
    for c in (HoltParams, SeasonalParams, LagParams, QuantileParams, BlendParams,
              SeriesLimits, InputConfig)
}


def parse_duration(raw: object) -> float:
    """Seconds from a number or a string like ``90s``, ``5m``, ``2h``, ``1d``, ``1w``."""
    if isinstance(raw, bool):
        raise ValueError("expected a duration like 90s, 5m, 2h, 1d")
    if isinstance(raw, int | float):
        return float(raw)
    if isinstance(raw, str):
        m = _DURATION.match(raw)
        if m:
            unit = m.group(2) or "s"
            return float(m.group(1)) * (0.001 if unit == "ms" else _UNITS[unit])
    raise ValueError(f"expected a duration like 90s, 5m, 2h, 1d, got {raw!r}")


class _Section:
    """Reads one mapping, recording problems under its key path."""

    def __init__(self, raw: object, path: str, problems: list[str]) -> None:
        self.path = path
        self.problems = problems
        if raw is None:
            raw = {}
        if not isinstance(raw, Mapping):
            problems.append(f"{path or '(top level)'}: expected a mapping, got {type(raw).__name__}")
            raw = {}
        self.raw: Mapping[str, Any] = raw
        self.seen: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def bad(self, name: str, msg: str) -> None:
        self.problems.append(f"{self.key(name)}: {msg}")

    def get(self, name: str, default: Any) -> Any:
        self.seen.add(name)
        return self.raw.get(name, default)

    def number(self, name: str, default: float, *, lo: float | None = None,
               hi: float | None = None, lo_open: bool = False, integer: bool = False) -> Any:
        raw = self.get(name, default)
        if isinstance(raw, bool) or not isinstance(raw, int | float) or (
            integer and not float(raw).is_integer()
        ):
            kind = "a whole number" if integer else "a number"
            self.bad(name, f"expected {kind}, got {raw!r}")
            return default
        value = int(raw) if integer else float(raw)
        if not math.isfinite(value):
            self.bad(name, f"must be finite, got {raw!r}")
            return default
        if lo is not None and (value <= lo if lo_open else value < lo):
            self.bad(name, f"must be {'>' if lo_open else '>='} {lo:g}, got {raw!r}")
            return default
        if hi is not None and value > hi:
            self.bad(name, f"must be <= {hi:g}, got {raw!r}")
            return default
        return value

    def choice(self, name: str, default: str, choices: tuple[str, ...]) -> str:
        raw = self.get(name, default)
        if raw not in choices:
            self.bad(name, f"expected one of {', '.join(choices)}, got {raw!r}")
            return default
        return raw

    def boolean(self, name: str, default: bool) -> bool:
        raw = self.get(name, default)
        if not isinstance(raw, bool):
            self.bad(name, f"expected true or false, got {raw!r}")
            return default
        return raw

    def text(self, name: str, default: str) -> str:
        raw = self.get(name, default)
        if not isinstance(raw, str) or not raw:
            self.bad(name, f"expected a non-empty string, got {raw!r}")
            return default
        return raw

    def duration(self, name: str, default: float, *, positive: bool = False) -> float:
        raw = self.get(name, default)
        try:
            value = parse_duration(raw)
        except ValueError as exc:
            self.bad(name, str(exc))
            return default
        if value < 0 or (positive and value == 0):
            self.bad(name, f"must be {'> 0' if positive else '>= 0'}, got {raw!r}")
            return default
        return value

    def span(self, name: str, default: Span) -> Span:
        raw = self.get(name, None)
        if raw is None:
            return default
        if isinstance(raw, str) and (m := _STEPS.match(raw)):
            return Span(steps=int(m.group(1)))
        try:
            return Span(seconds=parse_duration(raw))
        except ValueError:
            self.bad(name, f"expected a duration like 2h or a count like '12 steps', got {raw!r}")
            return default

    def section(self, name: str) -> _Section:
        return _Section(self.get(name, None), self.key(name), self.problems)

    def done(self) -> None:
        unknown = sorted(set(self.raw) - self.seen, key=str)
        for name in unknown:
            valid = ", ".join(sorted(self.seen))
            self.problems.append(f"{self.key(str(name))}: unknown key; valid keys here: {valid}")


def _unit_interval(s: _Section, name: str, default: float) -> float:
    return s.number(name, default, lo=0.0, hi=1.0, lo_open=True)


def _timezone(s: _Section) -> str:
    name = s.get("timezone", "UTC")
    try:
        zoneinfo.ZoneInfo(str(name))
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        s.bad("timezone", f"unknown time zone {name!r}; use an IANA name such as Europe/Berlin or UTC")
        return "UTC"
    return str(name)


def _parse_match(s: _Section) -> Match:
    metric = s.text("metric", "*")
    labels_sec = s.section("labels")
    labels: list[tuple[str, LabelMatcher]] = []
    for name, raw in labels_sec.raw.items():
        labels_sec.seen.add(name)
        key = labels_sec.key(str(name))
        if isinstance(raw, str | int | float) and not isinstance(raw, bool):
            labels.append((str(name), LabelMatcher(glob=str(raw))))
            continue
        if isinstance(raw, Mapping):
            m = _Section(raw, key, s.problems)
            regex = m.get("regex", None)
            not_ = m.get("not", None)
            not_regex = m.get("not_regex", None)
            m.done()
            given = [x for x in (regex, not_, not_regex) if x is not None]
            if len(given) != 1:
                s.problems.append(f"{key}: give exactly one of regex, not, not_regex")
                continue
            if regex is not None or not_regex is not None:
                pattern = str(regex if regex is not None else not_regex)
                try:
                    re.compile(pattern)
                except re.error as exc:
                    s.problems.append(f"{key}: invalid regular expression ({exc})")
                    continue
                labels.append((str(name), LabelMatcher(regex=pattern, negate=not_regex is not None)))
            else:
                labels.append((str(name), LabelMatcher(glob=str(not_), negate=True)))
            continue
        s.problems.append(f"{key}: expected a glob string or a mapping with regex/not/not_regex")
    s.done()
    return Match(metric=metric, labels=tuple(labels))


def _parse_forecasters(s: _Section) -> ForecasterParams:
    h = s.section("holt")
    holt = HoltParams(
        alpha=_unit_interval(h, "alpha", _DEFAULTS['HoltParams'].alpha),
        beta=h.number("beta", _DEFAULTS['HoltParams'].beta, lo=0.0, hi=1.0),
        phi=h.number("phi", _DEFAULTS['HoltParams'].phi, lo=0.0, hi=1.0),
    )
    h.done()
    z = s.section("seasonal")
    seasonal = SeasonalParams(
        enabled=z.boolean("enabled", True),
        alpha=_unit_interval(z, "alpha", _DEFAULTS['SeasonalParams'].alpha),
        beta=z.number("beta", _DEFAULTS['SeasonalParams'].beta, lo=0.0, hi=1.0),
        phi=z.number("phi", _DEFAULTS['SeasonalParams'].phi, lo=0.0, hi=1.0),
        memory_weeks=z.number("memory_weeks", _DEFAULTS['SeasonalParams'].memory_weeks, lo=0.0, lo_open=True),
    )
    z.done()
    g = s.section("lags")
    lags = LagParams(enabled=g.boolean("enabled", True))
    g.done()
    q = s.section("quantile")
    quantile = QuantileParams(
        enabled=q.boolean("enabled", True),
        rate=_unit_interval(q, "rate", _DEFAULTS['QuantileParams'].rate),
    )
    q.done()
    s.done()
    return ForecasterParams(holt=holt, seasonal=seasonal, lags=lags, quantile=quantile)


def _parse_peers(s: _Section, step: float | None) -> PeerParams | None:
    """The ``peers`` mapping of a rule (None when absent)."""
    raw_group = s.get("group_by", None)
    group: tuple[str, ...] = ()
    if (not isinstance(raw_group, list) or not raw_group
            or not all(isinstance(g, str) and g for g in raw_group)):
        s.bad("group_by", f"expected a non-empty list of label names, got {raw_group!r}")
    elif len(set(raw_group)) != len(raw_group):
        s.bad("group_by", f"a label is listed twice: {raw_group!r}")
    else:
        group = tuple(raw_group)
    d = PeerParams(group_by=group)
    method = s.choice("method", d.method, PEER_METHODS)
    only = {"mad": ("threshold",), "dbscan": ("window", "every", "min_samples")}
    for other, keys in only.items():
        for key in keys:
            if other != method and key in s.raw:
                s.bad(key, f"only used with method: {other} (this group uses method: {method})")
    total = s.get("total", None)
    if total is not None and total not in PEER_TOTALS:
        s.bad("total", f"expected one of {', '.join(PEER_TOTALS)}, got {total!r}")
        total = None
    if step is None:
        s.problems.append(f"{s.path}: peer groups need a fixed step (members are judged step by "
                          "step together); set the rule's step instead of auto")
    params = PeerParams(
        group_by=group, method=method,
        threshold=s.number("threshold", d.threshold, lo=0.0, lo_open=True),
        min_members=s.number("min_members", d.min_members, lo=3, hi=1_000_000, integer=True),
        window=s.number("window", d.window, lo=2, hi=MAX_PEER_WINDOW, integer=True),
        every=s.number("every", d.every, lo=1, hi=100_000, integer=True),
        min_samples=s.number("min_samples", d.min_samples, lo=2, hi=1_000_000, integer=True),
        total=total,
    )
    s.done()
    return params


def _parse_routing(s: _Section) -> Routing:
    """The rule's ``labels``, ``annotations`` and ``severity`` keys (alert routing)."""
    labels: list[tuple[str, str]] = []
    lab = s.section("labels")
    for name, value in lab.raw.items():
        lab.seen.add(name)
        if not isinstance(name, str) or not _LABEL_NAME.fullmatch(name):
            lab.bad(str(name), "a label name is letters, digits and underscores, not starting with a digit")
        elif name in ("severity", "metric"):
            lab.bad(name, f"{name!r} is set by streamdet (see the README, 'Routing alerts')")
        elif isinstance(value, bool) or not isinstance(value, str | int | float) or value == "":
            lab.bad(name, f"expected a non-empty string, got {value!r}")
        else:
            labels.append((name, str(value)))
    lab.done()
    annotations: list[tuple[str, Template]] = []
    ann = s.section("annotations")
    for name, value in ann.raw.items():
        ann.seen.add(name)
        if not isinstance(name, str) or not TEMPLATE_NAME.fullmatch(name):
            ann.bad(str(name), "an annotation name is letters, digits and underscores")
            continue
        try:
            annotations.append((name, Template.parse(value)))
        except TemplateError as exc:
            ann.bad(name, str(exc))
    ann.done()
    sev = s.section("severity")
    d = SeverityLevels()
    warning = sev.number("warning", d.warning, lo=0.0)
    critical = sev.number("critical", d.critical, lo=0.0)
    if critical < warning:
        sev.bad("critical", f"must be >= warning ({warning:g}), got {critical:g}")
        critical = warning
    sev.done()
    return Routing(labels=tuple(labels), annotations=tuple(annotations),
                   severity=SeverityLevels(warning=warning, critical=critical))


def _direction(s: _Section, default: str, warnings: list[str]) -> str:
    """``direction``, reading an old spelling (``above``/``below``/``both``) as its new word."""
    raw = s.get("direction", default)
    if isinstance(raw, str) and raw in OLD_DIRECTIONS:
        new = OLD_DIRECTIONS[raw]
        warnings.append(f"{s.key('direction')}: {raw!r} is the old spelling of {new!r} and will stop "
                        f"working in a later release; write direction: {new}")
        return new
    return s.choice("direction", default, DIRECTIONS)


def _parse_rule(s: _Section, index: int, warnings: list[str] | None = None) -> Rule:
    d = Rule()
    name = s.text("name", f"rule{index}")
    match = _parse_match(s.section("match"))
    raw_step = s.get("step", "60s")
    step: float | None
    if raw_step == "auto":
        step = None
    else:
        s.seen.discard("step")
        step = s.duration("step", 60.0, positive=True)
    lateness = s.duration("lateness", 0.0)
    if step is not None and lateness >= step:
        s.bad("lateness", f"must be shorter than the step ({step:g} s), got {lateness:g} s")
    grace = s.duration("grace", d.grace)
    if grace < lateness:
        s.bad("grace", f"must be at least lateness ({lateness:g} s), got {grace:g} s")
    confirm = s.section("confirm")
    confirm_steps = confirm.number("steps", d.confirm_steps, lo=1, hi=32, integer=True)
    if confirm.get("fraction", None) is not None:
        confirm.bad("fraction", "no longer used: breaches open on the combined evidence of the last "
                    "confirm.steps steps (see the README, 'Evidence'); remove the key")
    confirm.done()
    clear = s.section("clear")
    clear_steps = clear.number("steps", d.clear_steps, lo=1, hi=10_000, integer=True)
    rearm = clear.span("rearm", d.rearm)
    clear.done()
    blend_sec = s.section("blend")
    blend = BlendParams(
        learning_rate=blend_sec.number("learning_rate", _DEFAULTS['BlendParams'].learning_rate, lo=0.0),
        share=blend_sec.number("share", _DEFAULTS['BlendParams'].share, lo=0.0, hi=1.0),
    )
    blend_sec.done()
    rule = Rule(
        name=name,
        match=match,
        kind=s.choice("kind", d.kind, KINDS),
        step=step,
        aggregation=s.choice("aggregation", d.aggregation, AGGREGATIONS),
        lateness=lateness,
        grace=grace,
        width=s.number("width", d.width, lo=0.0, lo_open=True),
        min_width=s.number("min_width", d.min_width, lo=0.0),
        scale_floor=s.number("scale_floor", d.scale_floor, lo=0.0, hi=1.0),
        timezone=_timezone(s),
        direction=_direction(s, d.direction, [] if warnings is None else warnings),
        confirm_steps=confirm_steps,
        clear_steps=clear_steps,
        rearm=rearm,
        relearn_after=s.span("relearn_after", d.relearn_after),
        warmup=s.span("warmup", d.warmup),
        forecasters=_parse_forecasters(s.section("forecasters")),
        blend=blend,
        peers=None if s.get("peers", None) is None else _parse_peers(s.section("peers"), step),
        routing=_parse_routing(s),
    )
    s.done()
    return rule


def _strings(s: _Section, name: str, default: tuple[str, ...]) -> tuple[str, ...]:
    raw = s.get(name, list(default))
    if not isinstance(raw, list) or not all(isinstance(x, str) and x for x in raw):
        s.bad(name, f"expected a list of non-empty strings, got {raw!r}")
        return default
    return tuple(raw)


def parse_input(s: _Section, base: InputConfig | None = None) -> InputConfig:
    """The ``input`` section (or a per-topic override of it: keys not given keep ``base``)."""
    d = base or InputConfig()
    telegraf_units = s.get("telegraf_units", d.telegraf_units)
    if isinstance(telegraf_units, str) and telegraf_units.startswith("1"):
        telegraf_units = telegraf_units[1:]  # Telegraf writes json_timestamp_units = "1ms"
    if telegraf_units not in TIME_UNITS:
        s.bad("telegraf_units", f"expected one of {', '.join(TIME_UNITS)}, got {telegraf_units!r}")
        telegraf_units = d.telegraf_units
    j = s.section("json")
    dj = d.json
    mapping = JsonMapping(
        metric_key=j.text("metric_key", dj.metric_key), labels_key=j.text("labels_key", dj.labels_key),
        time_key=j.text("time_key", dj.time_key), value_key=j.text("value_key", dj.value_key),
        time_unit=j.choice("time_unit", dj.time_unit, ("auto", *TIME_UNITS)),
        label_keys=_strings(j, "label_keys", dj.label_keys))
    keys = [mapping.metric_key, mapping.labels_key, mapping.time_key, mapping.value_key]
    if len(set(keys)) < 4 or set(keys) & set(mapping.label_keys):
        j.bad("(keys)", "metric_key, labels_key, time_key, value_key and label_keys must all differ")
    j.done()
    o = s.section("otlp")
    resource_labels = _strings(o, "resource_labels", d.resource_labels)
    o.done()
    cfg = InputConfig(
        format=s.choice("format", d.format, FORMATS),
        max_future=s.duration("max_future", d.max_future),
        influx_precision=s.choice("influx_precision", d.influx_precision, TIME_UNITS),
        telegraf_units=telegraf_units, json=mapping, resource_labels=resource_labels)
    s.done()
    return cfg


ADAPTER_SECTIONS = ("kafka", "state", "health", "output", "logging", "shadow")


def parse_config(raw: object) -> Config:
    """Validate a decoded YAML document; raises ConfigError naming every bad key path."""
    problems: list[str] = []
    warnings: list[str] = []
    top = _Section(raw, "", problems)
    rules_raw = top.get("rules", None)
    rules: list[Rule] = []
    if rules_raw is None:
        rules = [Rule()]
    elif not isinstance(rules_raw, list) or not rules_raw:
        problems.append("rules: expected a non-empty list of rules")
    else:
        for i, r in enumerate(rules_raw):
            rules.append(_parse_rule(_Section(r, f"rules[{i}]", problems), i, warnings))
        names = [r.name for r in rules]
        for dup in sorted({n for n in names if names.count(n) > 1}):
            problems.append(f"rules: rule name {dup!r} is used more than once")
    srs = top.section("series")
    series = SeriesLimits(
        max_series=srs.number("max_series", _DEFAULTS['SeriesLimits'].max_series, lo=1, integer=True),
        idle_ttl=srs.duration("idle_ttl", _DEFAULTS['SeriesLimits'].idle_ttl, positive=True),
    )
    srs.done()
    input_cfg = parse_input(top.section("input"))
    eng = top.section("engine")
    lag_resolution = eng.duration("lag_resolution", 7200.0, positive=True)
    if lag_resolution > 86400 or 86400 % lag_resolution:
        eng.bad("lag_resolution", f"must divide one day evenly (e.g. 1h, 2h, 30m), got {lag_resolution:g} s")
        lag_resolution = 7200.0
    recent_steps = eng.number("recent_steps", 0, lo=0, hi=100_000, integer=True)  # series bands
    eng.done()
    # --- mutes (silences and maintenance windows, streamdet/core/mutes.py)
    from streamdet.core.mutes import parse_mutes

    mutes, mute_problems = parse_mutes(top.get("mutes", None))
    problems.extend(mute_problems)
    # --- end mutes
    extra = {name: top.get(name, None) for name in ADAPTER_SECTIONS}
    extra = {k: v for k, v in extra.items() if v is not None}
    top.done()
    if problems:
        raise ConfigError(problems)
    for w in warnings:
        log.warning("config: %s", w)
    return Config(rules=tuple(rules), series=series, input=input_cfg,
                  lag_resolution=lag_resolution, recent_steps=int(recent_steps), extra=extra,
                  warnings=tuple(warnings), mutes=mutes)


class _UniqueKeyLoader(yaml.SafeLoader):
    """YAML's safe loader, except that a key given twice in one mapping is an error (plain
    YAML keeps the last value without a word, which hides a typo'd override)."""

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict:
        seen: dict[object, int] = {}
        for key_node, _value in node.value:
            key = self.construct_object(key_node, deep=deep)
            try:
                if key in seen:
                    raise yaml.constructor.ConstructorError(
                        None, None, f"duplicate key {shorten_key(key)!r} (first on line {seen[key]})",
                        key_node.start_mark)
                seen[key] = key_node.start_mark.line + 1
            except TypeError:  # an unhashable key: the base class gives the error
                continue
        return super().construct_mapping(node, deep=deep)


def shorten_key(key: object, limit: int = 60) -> str:
    text = str(key)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _yaml_problem(path: str | Path, exc: yaml.YAMLError) -> str:
    """The parser's reason and position, never the text of the line: it may hold a secret."""
    if isinstance(exc, yaml.MarkedYAMLError):
        parts = []
        for text, mark in ((exc.context, exc.context_mark), (exc.problem, exc.problem_mark)):
            if text:
                where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark is not None else ""
                parts.append(where + text)
        return f"{path}: not valid YAML ({'; '.join(parts)})"
    return f"{path}: not valid YAML ({type(exc).__name__})"


def read_config_file(path: str | Path) -> object:
    """The YAML document of a config file ({} when empty); every way it can be unreadable (missing,
    not UTF-8, not YAML, a key given twice) is a ConfigError naming the file and the position."""
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise ConfigError([f"{path}: cannot read ({exc.strerror})"]) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise ConfigError([f"{path}: not UTF-8 (byte {exc.start} on line {line}: {exc.reason}); "
                           "save the file as UTF-8"]) from None
    try:
        raw = yaml.load(text, Loader=_UniqueKeyLoader)  # a SafeLoader subclass
    except yaml.YAMLError as exc:
        raise ConfigError([_yaml_problem(path, exc)]) from None
    except RecursionError:
        raise ConfigError([f"{path}: not valid YAML (nested too deeply)"]) from None
    return raw if raw is not None else {}


def load_config(path: str | Path) -> Config:
    """Read and validate a YAML file; file and YAML errors become ConfigError too."""
    return parse_config(read_config_file(path))
