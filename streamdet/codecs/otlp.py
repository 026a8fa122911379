"""OpenTelemetry metrics (OTLP): ``ExportMetricsServiceRequest`` as protobuf or OTLP/JSON.

This is what the OpenTelemetry Collector's Kafka exporter writes (``encoding: otlp_proto`` or
``otlp_json``). Payloads are parsed with the generated classes of ``opentelemetry-proto``.
A series is the metric name plus the resource attributes named in
``input.otlp.resource_labels`` plus the data point's own attributes (scope attributes are
not part of it; a point attribute wins over a resource attribute of the same name).

* Gauge -> the value. Non-monotonic cumulative Sum -> the value (a gauge).
* Monotonic cumulative Sum -> a *counter* series: the engine turns it into a per-second rate and
  treats a decrease as a reset, as for rules with ``kind: counter``.
* Delta Sum -> value / (time - start_time): a rate over the point's own interval.
* Histogram and ExponentialHistogram -> ``<name>_count`` and ``<name>_sum`` as rates (counters
  when cumulative, rates over the interval when delta) and ``<name>_mean``, the mean of the
  observations in the interval (cumulative: from the difference to the series' previous point,
  so the first point of a series gives no mean).
* Summary -> ``<name>{quantile="0.99"}`` per quantile (gauges), ``_count`` and ``_sum`` counters.

Units are kept with each series (rates get ``/s``). Points flagged "no recorded value" are
skipped; a point that is malformed or of an unsupported kind is a decode error with a reason.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import orjson
from google.protobuf import json_format
from google.protobuf.message import DecodeError as ProtobufDecodeError
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest

from streamdet.codecs.common import Decoded, ErrorCollector, RecordError, TimeRules, check_series, finish
from streamdet.config import DEFAULT_RESOURCE_LABELS
from streamdet.core.points import COUNTER, Labels, PointBuilder, SeriesNote, series_key, shorten

DELTA, CUMULATIVE = 1, 2
NO_RECORDED_VALUE = 1
MEAN_MEMORY = 200_000  # cumulative histogram series whose previous (count, sum) is remembered
_DEFAULT_RULES = TimeRules()
_GAUGE = SeriesNote()


class _Notes:
    """One :class:`SeriesNote` per (kind, unit), shared by every series with them."""

    def __init__(self) -> None:
        self._cache: dict[tuple[str, str], SeriesNote] = {}

    def __call__(self, kind: str, unit: str) -> SeriesNote:
        note = self._cache.get((kind, unit))
        if note is None:
            note = self._cache[(kind, unit)] = SeriesNote(kind=kind, unit=unit)
        return note


def _per_second(unit: str) -> str:
    if not unit or unit == "1":
        return "1/s"
    return f"{unit}/s"


def _attribute(key: str, value) -> str:
    """A label value from an OTLP AnyValue: strings as they are, numbers and booleans as text;
    arrays, key-value lists and bytes are refused."""
    kind = value.WhichOneof("value")
    if kind == "string_value":
        return value.string_value
    if kind == "int_value":
        return str(value.int_value)
    if kind == "bool_value":
        return "true" if value.bool_value else "false"
    if kind == "double_value":
        d = value.double_value
        if not math.isfinite(d):
            raise RecordError(f"attribute {shorten(key, 40)!r} is {d!r}, not a usable label value")
        return repr(d)
    if kind is None:
        return ""
    raise RecordError(f"attribute {shorten(key, 40)!r} holds {kind.removesuffix('_value')} "
                      "values, which cannot be a label (strings, numbers and booleans only)")


def _attributes(attrs, base: dict[str, str] | None = None) -> dict[str, str]:
    out = dict(base) if base else {}
    seen = set()
    for kv in attrs:
        key = kv.key
        if not key:
            raise RecordError("an attribute has an empty key")
        if key in seen:
            raise RecordError(f"attribute {shorten(key, 40)!r} is given twice")
        seen.add(key)
        out[key] = _attribute(key, kv.value)
    return out


def _labels(attrs: dict[str, str]) -> Labels:
    return tuple(sorted((k, v) for k, v in attrs.items() if v != ""))


def _finite(name: str, v: float) -> float:
    if math.isnan(v):
        raise RecordError(f"{name} is NaN")
    if math.isinf(v):
        raise RecordError(f"{name} is infinite")
    return v


class OtlpDecoder:
    """Decodes OTLP metrics messages; keeps, per series, what cumulative histogram means need.

    One decoder per input partition (the daemon) or per replay: the remembered (count, sum) are
    bounded by ``MEAN_MEMORY`` series and are not part of engine checkpoints.

    >>> from opentelemetry.proto.metrics.v1 import metrics_pb2 as m
    >>> req = ExportMetricsServiceRequest(resource_metrics=[{"scope_metrics": [{"metrics": [
    ...     m.Metric(name="queue", unit="{job}", gauge=m.Gauge(data_points=[
    ...         m.NumberDataPoint(time_unix_nano=60_000_000_000, as_int=7)]))]}]}])
    >>> d = OtlpDecoder().decode(req.SerializeToString())
    >>> d.points.keys, d.points.value.tolist(), d.points.notes["queue"].unit
    (['queue'], [7.0], '{job}')
    """

    def __init__(self, resource_labels: Sequence[str] = DEFAULT_RESOURCE_LABELS, *,
                 json: bool = False) -> None:
        self.resource_labels = frozenset(resource_labels)
        self.json = json
        self._note = _Notes()
        self._previous: dict[str, tuple[int, int, float, int]] = {}  # mean key -> start, count, sum, t

    # ------------------------------------------------------------ parsing

    def parse(self, data: bytes) -> ExportMetricsServiceRequest:
        """The request in ``data``; RecordError with the parser's reason if it is not one."""
        req = ExportMetricsServiceRequest()
        if not self.json:
            try:
                req.ParseFromString(data)
            except (ProtobufDecodeError, RecursionError, ValueError) as exc:
                raise RecordError(f"not an OTLP ExportMetricsServiceRequest (protobuf: "
                                  f"{shorten(str(exc) or type(exc).__name__, 80)})") from None
            return req
        try:
            doc = orjson.loads(data)
        except orjson.JSONDecodeError as exc:
            raise RecordError(f"invalid JSON ({exc})") from None
        if type(doc) is not dict:
            raise RecordError(f"expected an OTLP/JSON object, got {type(doc).__name__}")
        _drop_exemplars(doc)
        try:
            json_format.ParseDict(doc, req, ignore_unknown_fields=True)
        except (json_format.ParseError, ValueError, TypeError, AttributeError, RecursionError,
                OverflowError) as exc:
            raise RecordError(f"not an OTLP/JSON ExportMetricsServiceRequest "
                              f"({shorten(str(exc) or type(exc).__name__, 120)})") from None
        return req

    # ------------------------------------------------------------ decoding

    def decode(self, data: bytes, *, prefix: str = "", rules: TimeRules = _DEFAULT_RULES,
               builder: PointBuilder | None = None) -> Decoded:
        """Decode one message; ``builder`` as for the other decoders."""
        own = builder is None
        out = PointBuilder() if builder is None else builder
        errors = ErrorCollector(prefix)
        try:
            req = self.parse(data)
        except RecordError as exc:
            errors.add("message", str(exc), data)
            return finish(out, errors, 1, own=own)
        records = 0
        keep = self.resource_labels
        for ri, rm in enumerate(req.resource_metrics):
            try:
                resource = {kv.key: _attribute(kv.key, kv.value) for kv in rm.resource.attributes
                            if kv.key in keep}
            except RecordError as exc:
                n = sum(_point_count(m) for sm in rm.scope_metrics for m in sm.metrics)
                records += max(n, 1)
                errors.add(f"resource {ri}", f"resource {exc}", str(rm.resource)[:160])
                continue
            for sm in rm.scope_metrics:
                for metric in sm.metrics:
                    records += self._metric(metric, resource, out, rules, errors)
        return finish(out, errors, records, own=own)

    def _metric(self, metric, resource: dict[str, str], out: PointBuilder, rules: TimeRules,
                errors: ErrorCollector) -> int:
        name = metric.name
        kind = metric.WhichOneof("data")
        if kind is None or not name:
            why = "metric without a name" if not name else "metric without data (no gauge, sum, ...)"
            errors.add(f"metric {shorten(name, 60)!r}", why, str(metric)[:160])
            return 1
        data = getattr(metric, kind)
        points = data.data_points
        adder = getattr(self, f"_{kind}")
        unit = metric.unit
        for i, p in enumerate(points):
            if p.flags & NO_RECORDED_VALUE:
                continue
            try:
                labels = _labels(_attributes(p.attributes, resource))
                t = p.time_unix_nano
                if t == 0:
                    raise RecordError("missing time_unix_nano")
                adder(name, unit, data, p, labels, rules.check(t / 1e9), out)
            except RecordError as exc:
                errors.add(f"metric {shorten(name, 60)!r} point {i}", str(exc), str(p)[:160])
        return len(points)

    def _add(self, out: PointBuilder, metric: str, labels: Labels, t: float, v: float,
             note: SeriesNote) -> None:
        out.add_checked(metric, labels, t, v, check_series)
        if note is not _GAUGE:
            out.note(note)

    def _interval(self, p, temporality: int) -> float:
        """Seconds covered by a delta point; RecordError without a usable start time."""
        if p.start_time_unix_nano == 0 or p.start_time_unix_nano >= p.time_unix_nano:
            raise RecordError("delta point without a start_time_unix_nano before its time")
        return (p.time_unix_nano - p.start_time_unix_nano) / 1e9

    @staticmethod
    def _temporality(data) -> int:
        temporality = data.aggregation_temporality
        if temporality not in (DELTA, CUMULATIVE):
            raise RecordError(f"aggregation temporality {temporality} is neither delta nor cumulative")
        return temporality

    @staticmethod
    def _number(p) -> float:
        which = p.WhichOneof("value")
        if which == "as_double":
            return _finite("value", p.as_double)
        if which == "as_int":
            return float(p.as_int)
        raise RecordError("data point has no value (as_double or as_int)")

    def _note_for(self, kind: str, unit: str) -> SeriesNote:
        return _GAUGE if kind != COUNTER and not unit else self._note(kind, unit)

    def _gauge(self, name, unit, data, p, labels, t, out) -> None:
        self._add(out, name, labels, t, self._number(p), self._note_for("gauge", unit))

    def _sum(self, name, unit, data, p, labels, t, out) -> None:
        temporality = self._temporality(data)
        v = self._number(p)
        if temporality == DELTA:
            self._add(out, name, labels, t, v / self._interval(p, temporality),
                      self._note("gauge", _per_second(unit)))
        elif data.is_monotonic:
            self._add(out, name, labels, t, v, self._note(COUNTER, _per_second(unit)))
        else:
            self._add(out, name, labels, t, v, self._note_for("gauge", unit))

    def _histogram(self, name, unit, data, p, labels, t, out) -> None:
        temporality = self._temporality(data)
        count = p.count
        has_sum = p.HasField("sum")
        total = _finite("sum", p.sum) if has_sum else math.nan
        if temporality == DELTA:
            dt = self._interval(p, temporality)
            self._add(out, f"{name}_count", labels, t, count / dt, self._note("gauge", "1/s"))
            if has_sum:
                self._add(out, f"{name}_sum", labels, t, total / dt, self._note("gauge", _per_second(unit)))
                if count > 0:
                    self._add(out, f"{name}_mean", labels, t, total / count, self._note_for("gauge", unit))
            return
        self._add(out, f"{name}_count", labels, t, float(count), self._note(COUNTER, "1/s"))
        if not has_sum:
            return
        self._add(out, f"{name}_sum", labels, t, total, self._note(COUNTER, _per_second(unit)))
        mean = self._cumulative_mean(f"{name}_mean", labels, p.start_time_unix_nano, count, total,
                                     p.time_unix_nano)
        if mean is not None:
            self._add(out, f"{name}_mean", labels, t, mean, self._note_for("gauge", unit))

    _exponential_histogram = _histogram

    def _cumulative_mean(self, metric: str, labels: Labels, start: int, count: int, total: float,
                         t: int) -> float | None:
        """Mean of the observations since the series' previous point (None when there were none,
        on first sight, or for a point older than the previous one)."""
        key = series_key(metric, labels)
        prev = self._previous.get(key)
        if prev is not None and t <= prev[3]:
            return None
        if len(self._previous) >= MEAN_MEMORY and prev is None:
            self._previous.clear()
        self._previous[key] = (start, count, total, t)
        if prev is None:
            return None
        p_start, p_count, p_total, _ = prev
        if start != p_start or count < p_count:  # the histogram restarted: all of it is new
            p_count, p_total = 0, 0.0
        if count == p_count:
            return None
        return (total - p_total) / (count - p_count)

    def _summary(self, name, unit, data, p, labels, t, out) -> None:
        quantiles = []
        for q in p.quantile_values:
            if not 0.0 <= q.quantile <= 1.0:
                raise RecordError(f"quantile {q.quantile!r} is outside 0..1")
            quantiles.append((f"{q.quantile:g}", _finite(f"quantile {q.quantile:g}", q.value)))
        total = _finite("sum", p.sum)
        for q, v in quantiles:
            ql = tuple(sorted({**dict(labels), "quantile": q}.items()))
            self._add(out, name, ql, t, v, self._note_for("gauge", unit))
        self._add(out, f"{name}_count", labels, t, float(p.count), self._note(COUNTER, "1/s"))
        self._add(out, f"{name}_sum", labels, t, total, self._note(COUNTER, _per_second(unit)))


def _point_count(metric) -> int:
    kind = metric.WhichOneof("data")
    return len(getattr(metric, kind).data_points) if kind else 1


def _drop_exemplars(doc: dict) -> None:
    """Remove exemplars from an OTLP/JSON document before the proto3 JSON parser sees it: their
    trace and span ids are hex in OTLP/JSON (base64 in the proto3 mapping), and they are not
    used here."""
    for rm in _items(doc, "resourceMetrics", "resource_metrics"):
        for sm in _items(rm, "scopeMetrics", "scope_metrics"):
            for m in _items(sm, "metrics"):
                for kind in ("gauge", "sum", "histogram", "exponentialHistogram",
                             "exponential_histogram", "summary"):
                    data = m.get(kind) if type(m) is dict else None
                    if type(data) is dict:
                        for p in _items(data, "dataPoints", "data_points"):
                            if type(p) is dict:
                                p.pop("exemplars", None)


def _items(obj: object, *names: str) -> list:
    if type(obj) is not dict:
        return []
    for name in names:
        value = obj.get(name)
        if type(value) is list:
            return value
    return []


def decode_otlp_proto(data: bytes, *, prefix: str = "", rules: TimeRules = _DEFAULT_RULES,
                      resource_labels: Sequence[str] = DEFAULT_RESOURCE_LABELS,
                      builder: PointBuilder | None = None) -> Decoded:
    """One protobuf ``ExportMetricsServiceRequest`` (a fresh decoder: no cumulative means)."""
    return OtlpDecoder(resource_labels).decode(data, prefix=prefix, rules=rules, builder=builder)


def decode_otlp_json(data: bytes, *, prefix: str = "", rules: TimeRules = _DEFAULT_RULES,
                     resource_labels: Sequence[str] = DEFAULT_RESOURCE_LABELS,
                     builder: PointBuilder | None = None) -> Decoded:
    """One OTLP/JSON ``ExportMetricsServiceRequest`` (a fresh decoder: no cumulative means)."""
    return OtlpDecoder(resource_labels, json=True).decode(data, prefix=prefix, rules=rules,
                                                           builder=builder)


def encode_gauges(points: Sequence[dict], *, json: bool = False, units: dict[str, str] | None = None,
                  resource: dict[str, str] | None = None) -> bytes:
    """Points in our JSON shape (``metric``, ``labels``, ``time``, ``value``) as one OTLP
    request of gauges, labels as point attributes: for the demo, tests and benchmarks.

    >>> data = encode_gauges([{"metric": "q", "labels": {"a": "b"}, "time": 60, "value": 1.5}])
    >>> OtlpDecoder().decode(data).points.keys
    ['q{a="b"}']
    """
    from opentelemetry.proto.common.v1.common_pb2 import AnyValue, KeyValue
    from opentelemetry.proto.metrics.v1 import metrics_pb2 as pb
    from opentelemetry.proto.resource.v1.resource_pb2 import Resource

    by_metric: dict[str, list] = {}
    for p in points:
        by_metric.setdefault(p["metric"], []).append(pb.NumberDataPoint(
            time_unix_nano=round(p["time"] * 1e9), as_double=p["value"],
            attributes=[KeyValue(key=k, value=AnyValue(string_value=v)) for k, v in p["labels"].items()]))
    metrics = [pb.Metric(name=name, unit=(units or {}).get(name, ""), gauge=pb.Gauge(data_points=dps))
               for name, dps in by_metric.items()]
    res = Resource(attributes=[KeyValue(key=k, value=AnyValue(string_value=v))
                               for k, v in (resource or {}).items()])
    req = ExportMetricsServiceRequest(resource_metrics=[
        {"resource": res, "scope_metrics": [{"metrics": metrics}]}])
    if json:
        return json_format.MessageToJson(req, indent=None).encode()
    return req.SerializeToString()
