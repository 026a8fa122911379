"""OTLP metrics: payloads built with the opentelemetry-proto classes decode to the series, kinds,
units and values the OpenTelemetry metrics data model implies; hostile payloads never raise."""

import math

import numpy as np
import orjson
import pytest
from google.protobuf import json_format
from hypothesis import given, settings
from hypothesis import strategies as st
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest
from opentelemetry.proto.common.v1.common_pb2 import AnyValue, ArrayValue, KeyValue
from opentelemetry.proto.metrics.v1 import metrics_pb2 as pb
from opentelemetry.proto.resource.v1.resource_pb2 import Resource

from streamdet.codecs import format_for_path
from streamdet.codecs.common import TimeRules
from streamdet.codecs.otlp import OtlpDecoder, decode_otlp_json, decode_otlp_proto
from streamdet.codecs.readers import MessageReader
from streamdet.config import InputConfig, parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBuilder

S = 1_000_000_000  # nanoseconds per second (OTLP times are Unix nanoseconds: metrics.proto)
T0 = 1_709_294_400  # 2024-03-01T12:00:00Z
CUM, DELTA = pb.AGGREGATION_TEMPORALITY_CUMULATIVE, pb.AGGREGATION_TEMPORALITY_DELTA


def kv(key, value):
    if isinstance(value, bool):
        return KeyValue(key=key, value=AnyValue(bool_value=value))
    if isinstance(value, int):
        return KeyValue(key=key, value=AnyValue(int_value=value))
    if isinstance(value, float):
        return KeyValue(key=key, value=AnyValue(double_value=value))
    return KeyValue(key=key, value=AnyValue(string_value=value))


def request(*metrics, resource=None):
    if resource is None:
        resource = {"service.name": "checkout", "host.name": "web-1", "process.pid": 42}
    res = Resource(attributes=[kv(k, v) for k, v in resource.items()])
    return ExportMetricsServiceRequest(resource_metrics=[pb.ResourceMetrics(
        resource=res, scope_metrics=[pb.ScopeMetrics(metrics=list(metrics))])])


def number(t, value, start=0, **attrs):
    p = pb.NumberDataPoint(time_unix_nano=int(t * S), start_time_unix_nano=int(start * S),
                           attributes=[kv(k, v) for k, v in attrs.items()])
    if isinstance(value, int):
        p.as_int = value
    else:
        p.as_double = value
    return p


def decode(req, **kw):
    d = decode_otlp_proto(req.SerializeToString(), **kw)
    return d


def test_gauge_series_key_units_and_resource_label_selection():
    # Reference: opentelemetry-proto's generated classes; series = name + chosen resource
    # attributes + point attributes (process.pid is not among the default resource labels).
    req = request(pb.Metric(name="queue.depth", unit="{job}", gauge=pb.Gauge(data_points=[
        number(T0, 7, site="north"), number(T0 + 60, 8.5, site="north")])))
    d = decode(req)
    assert d.errors == [] and d.records == 2
    key = 'queue.depth{host.name="web-1",service.name="checkout",site="north"}'
    assert d.points.keys == [key, key]
    assert d.points.time.tolist() == [T0, T0 + 60]
    assert d.points.value.tolist() == [7.0, 8.5]
    assert d.points.notes[key].unit == "{job}" and d.points.notes[key].kind == "gauge"
    d2 = decode(req, resource_labels=("process.pid",))
    assert d2.points.keys[0] == 'queue.depth{process.pid="42",site="north"}'


def test_point_attribute_wins_over_resource_attribute_and_empty_values_drop():
    req = request(pb.Metric(name="m", gauge=pb.Gauge(data_points=[
        number(T0, 1.0, **{"host.name": "override", "zone": ""})])))
    assert decode(req).points.keys == ['m{host.name="override",service.name="checkout"}']


def _rates_through_engine(batch, kind):
    cfg = parse_config({"rules": [{"name": "r", "kind": kind, "step": "60s", "warmup": "3 steps"}]})
    eng = Engine(cfg, record_steps=True)
    eng.ingest(batch)
    eng.finish()
    return eng.log.columns()["observed"]


def test_cumulative_sum_with_reset_gives_the_same_rates_as_a_json_counter():
    # A monotonic cumulative Sum is a counter (OTel metrics data model, "Sums"); its per-second
    # rates with a reset must equal those of the same samples sent in our JSON under a rule with
    # kind: counter. Reset rule (a drop means the counter restarted from 0): common practice,
    # no source.
    values = [0, 60, 120, 180, 30, 90, 150]
    times = [T0 + 60 * i for i in range(len(values))]
    req = request(pb.Metric(name="requests", unit="{request}", sum=pb.Sum(
        aggregation_temporality=CUM, is_monotonic=True,
        data_points=[number(t, v, start=T0 - 1) for t, v in zip(times, values, strict=True)])))
    otlp = decode(req, resource_labels=()).points
    assert otlp.notes["requests"].kind == "counter" and otlp.notes["requests"].unit == "{request}/s"
    from streamdet.codecs import decode_json
    lines = b"\n".join(orjson.dumps({"metric": "requests", "time": t, "value": v})
                       for t, v in zip(times, values, strict=True))
    ours = decode_json(lines, lines=True).points
    via_otlp = _rates_through_engine(otlp, "gauge")  # the format says counter, the rule need not
    via_json = _rates_through_engine(ours, "counter")
    np.testing.assert_allclose(via_otlp, via_json)
    # 1/s while rising by 60 a minute; the reset step counts the new value (30) as the increase.
    np.testing.assert_allclose(via_otlp, [1.0, 1.0, 1.0, 0.5, 1.0, 1.0])


def test_delta_and_non_monotonic_sums():
    req = request(
        pb.Metric(name="bytes", unit="By", sum=pb.Sum(aggregation_temporality=DELTA, is_monotonic=True,
                                                      data_points=[number(T0 + 30, 600, start=T0)])),
        pb.Metric(name="inflight", sum=pb.Sum(aggregation_temporality=CUM, is_monotonic=False,
                                              data_points=[number(T0, 5)])))
    d = decode(req, resource_labels=())
    assert d.errors == []
    got = dict(zip(d.points.keys, d.points.value.tolist(), strict=True))
    assert got == {"bytes": 20.0, "inflight": 5.0}  # 600 By over its own 30 s; a gauge
    assert d.points.notes["bytes"].unit == "By/s" and d.points.notes["bytes"].kind == "gauge"
    assert "inflight" not in d.points.notes  # a plain gauge without a unit needs no note


def _hist(t, count, total, start=T0 - 60, **attrs):
    return pb.HistogramDataPoint(time_unix_nano=int(t * S), start_time_unix_nano=int(start * S),
                                 count=count, sum=total, bucket_counts=[count], explicit_bounds=[],
                                 attributes=[kv(k, v) for k, v in attrs.items()])


def test_cumulative_histogram_count_sum_counters_and_interval_mean():
    # Histogram semantics (OTel metrics data model): count and sum accumulate since start_time;
    # the mean of the observations between two points is d(sum)/d(count).
    points = [_hist(T0, 10, 5.0), _hist(T0 + 60, 30, 25.0), _hist(T0 + 120, 30, 25.0),
              _hist(T0 + 180, 4, 8.0, start=T0 + 150)]  # restarted: a new start time
    req = request(pb.Metric(name="latency", unit="s", histogram=pb.Histogram(
        aggregation_temporality=CUM, data_points=points)))
    d = OtlpDecoder(()).decode(req.SerializeToString())
    assert d.errors == [] and d.records == 4
    by = {}
    for k, t, v in zip(d.points.keys, d.points.time.tolist(), d.points.value.tolist(), strict=True):
        by.setdefault(k, []).append((t - T0, v))
    assert by["latency_count"] == [(0, 10), (60, 30), (120, 30), (180, 4)]
    assert by["latency_sum"] == [(0, 5.0), (60, 25.0), (120, 25.0), (180, 8.0)]
    # first point: no previous one; third: no new observations; fourth: after the restart
    assert by["latency_mean"] == [(60, 1.0), (180, 2.0)]
    notes = d.points.notes
    assert (notes["latency_count"].kind, notes["latency_count"].unit) == ("counter", "1/s")
    assert (notes["latency_sum"].kind, notes["latency_sum"].unit) == ("counter", "s/s")
    assert (notes["latency_mean"].kind, notes["latency_mean"].unit) == ("gauge", "s")


def test_delta_histogram_and_exponential_histogram():
    delta = pb.Metric(name="size", unit="By", histogram=pb.Histogram(
        aggregation_temporality=DELTA, data_points=[_hist(T0 + 10, 5, 50.0, start=T0)]))
    expo = pb.Metric(name="wait", unit="ms", exponential_histogram=pb.ExponentialHistogram(
        aggregation_temporality=DELTA, data_points=[pb.ExponentialHistogramDataPoint(
            time_unix_nano=(T0 + 20) * S, start_time_unix_nano=T0 * S, count=40, sum=200.0, scale=2,
            positive=pb.ExponentialHistogramDataPoint.Buckets(offset=0, bucket_counts=[40]))]))
    d = decode(request(delta, expo), resource_labels=())
    assert d.errors == []
    got = dict(zip(d.points.keys, d.points.value.tolist(), strict=True))
    assert got == {"size_count": 0.5, "size_sum": 5.0, "size_mean": 10.0,
                   "wait_count": 2.0, "wait_sum": 10.0, "wait_mean": 5.0}


def test_summary_one_series_per_quantile():
    q = pb.SummaryDataPoint.ValueAtQuantile
    req = request(pb.Metric(name="rpc", unit="ms", summary=pb.Summary(data_points=[pb.SummaryDataPoint(
        time_unix_nano=T0 * S, count=100, sum=1234.0,
        quantile_values=[q(quantile=0.5, value=10.0), q(quantile=0.99, value=80.0), q(quantile=1.0, value=95.0)])])))
    d = decode(req, resource_labels=())
    got = dict(zip(d.points.keys, d.points.value.tolist(), strict=True))
    assert got == {'rpc{quantile="0.5"}': 10.0, 'rpc{quantile="0.99"}': 80.0, 'rpc{quantile="1"}': 95.0,
                   "rpc_count": 100.0, "rpc_sum": 1234.0}


def test_otlp_json_matches_protobuf_and_follows_the_otlp_json_rules():
    # OTLP/JSON (OpenTelemetry protocol specification, "JSON Protobuf Encoding"): lowerCamelCase
    # keys, 64-bit integers as strings, enums as integers, trace/span ids hex (not base64).
    # MessageToJson gives the proto3 JSON mapping, which agrees for everything but the ids.
    req = request(pb.Metric(name="requests", unit="1", sum=pb.Sum(
        aggregation_temporality=CUM, is_monotonic=True,
        data_points=[number(T0, 5, start=T0 - 60, route="/a"), number(T0 + 60, 9, start=T0 - 60, route="/a")])))
    text = json_format.MessageToJson(req)
    assert '"timeUnixNano": "1709294400000000000"' in text and '"asInt": "5"' in text
    from_json = decode_otlp_json(text.encode())
    from_proto = decode(req)
    assert from_json.errors == [] and from_json.points.keys == from_proto.points.keys
    assert from_json.points.value.tolist() == from_proto.points.value.tolist() == [5.0, 9.0]
    doc = orjson.loads(text)
    dp = doc["resourceMetrics"][0]["scopeMetrics"][0]["metrics"][0]["sum"]["dataPoints"][0]
    doc["resourceMetrics"][0]["scopeMetrics"][0]["metrics"][0]["sum"]["aggregationTemporality"] = 2
    dp["exemplars"] = [{"timeUnixNano": "1709294400000000000", "asDouble": 1.0,
                        "traceId": "5b8efff798038103d269b633813fc60c", "spanId": "eee19b7ec3c1b174"}]
    d = decode_otlp_json(orjson.dumps(doc))
    assert d.errors == [] and d.points.value.tolist() == [5.0, 9.0]


@pytest.mark.parametrize("metric,reason", [
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[pb.NumberDataPoint(time_unix_nano=T0 * S)])),
     "no value"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[pb.NumberDataPoint(as_double=1.0)])),
     "missing time_unix_nano"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[number(T0, math.nan)])), "NaN"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[number(T0, math.inf)])), "infinite"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[
        pb.NumberDataPoint(time_unix_nano=2**64 - 1, as_double=1.0)])), "in the future"),  # year 2554
    (pb.Metric(name="s", sum=pb.Sum(data_points=[number(T0, 1.0)])), "neither delta nor cumulative"),
    (pb.Metric(name="s", sum=pb.Sum(aggregation_temporality=DELTA, data_points=[number(T0, 1.0)])),
     "without a start_time"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[pb.NumberDataPoint(
        time_unix_nano=T0 * S, as_double=1.0, attributes=[KeyValue(key="tags", value=AnyValue(
            array_value=ArrayValue(values=[AnyValue(string_value="a")])))])])), "array values"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[number(T0, 1.0, x=math.nan)])), "not a usable label"),
    (pb.Metric(name="g", gauge=pb.Gauge(data_points=[pb.NumberDataPoint(
        time_unix_nano=T0 * S, as_double=1.0, attributes=[kv("a", "1"), kv("a", "2")])])), "given twice"),
    (pb.Metric(name="nothing"), "without data"),
    (pb.Metric(name="q", summary=pb.Summary(data_points=[pb.SummaryDataPoint(
        time_unix_nano=T0 * S, quantile_values=[pb.SummaryDataPoint.ValueAtQuantile(quantile=7, value=1)])])),
     "outside 0..1"),
])
def test_malformed_points_are_errors_with_reasons(metric, reason):
    good = pb.Metric(name="ok", gauge=pb.Gauge(data_points=[number(T0, 1.0)]))
    d = decode(request(metric, good), prefix="otlp/0@5", rules=TimeRules(now=T0 + 60))
    assert d.points.keys == ['ok{host.name="web-1",service.name="checkout"}']  # the rest survives
    assert len(d.errors) == 1 and reason in d.errors[0].reason, d.errors
    assert d.errors[0].position.startswith("otlp/0@5 metric")


def test_future_times_and_no_recorded_value():
    p = number(T0, 1.0)
    p.flags = pb.DATA_POINT_FLAGS_NO_RECORDED_VALUE_MASK
    d = decode(request(pb.Metric(name="g", gauge=pb.Gauge(data_points=[p, number(T0 + 86400, 2.0)]))),
               rules=TimeRules(now=T0, max_future=3600))
    assert len(d.points) == 0 and d.records == 2
    assert [e.reason for e in d.errors] == ["time is 86400 s in the future (more than max_future=3600 s)"]


@pytest.mark.parametrize("payload,json,reason", [
    (b"\xff\xff\xff", False, "not an OTLP ExportMetricsServiceRequest"),
    (b"{", True, "invalid JSON"),
    (b"[1, 2]", True, "expected an OTLP/JSON object"),
    (b'{"resourceMetrics": 5}', True, "not an OTLP/JSON"),
    (b'{"resourceMetrics": [{"scopeMetrics": [{"metrics": [{"name": "g", "gauge": {"dataPoints": '
     b'[{"timeUnixNano": "x", "asDouble": 1}]}}]}]}]}', True, "not an OTLP/JSON"),
    (b"[" * 5000 + b"]" * 5000, True, "invalid JSON"),
])
def test_unreadable_messages(payload, json, reason):
    d = OtlpDecoder(json=json).decode(payload)
    assert len(d.points) == 0 and len(d.errors) == 1 and reason in d.errors[0].reason


def test_non_string_attribute_values_become_text_or_are_refused():
    req = request(pb.Metric(name="g", gauge=pb.Gauge(data_points=[number(T0, 1.0, code=200, ok=True, r=0.5)])),
                  resource={})
    assert decode(req).points.keys == ['g{code="200",ok="true",r="0.5"}']


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=400))
def test_arbitrary_bytes_never_raise(data):
    for json in (False, True):
        d = OtlpDecoder(json=json).decode(data)
        assert np.isfinite(d.points.value).all()


_any_value = st.one_of(st.text(max_size=5).map(lambda s: AnyValue(string_value=s)),
                       st.integers(-2**63, 2**63 - 1).map(lambda i: AnyValue(int_value=i)),
                       st.floats().map(lambda f: AnyValue(double_value=f)),
                       st.booleans().map(lambda b: AnyValue(bool_value=b)),
                       st.binary(max_size=4).map(lambda b: AnyValue(bytes_value=b)),
                       st.just(AnyValue()))
_attrs = st.lists(st.builds(KeyValue, key=st.text(max_size=4), value=_any_value), max_size=3)
_u64 = st.integers(0, 2**64 - 1)
_number_point = st.builds(
    lambda t, s, v, a, f: pb.NumberDataPoint(time_unix_nano=t, start_time_unix_nano=s, attributes=a, flags=f,
                                             **({"as_double": v} if isinstance(v, float) else {"as_int": v})),
    _u64, _u64, st.one_of(st.floats(), st.integers(-2**63, 2**63 - 1)), _attrs, st.integers(0, 3))
_hist_point = st.builds(lambda t, s, c, total, a: pb.HistogramDataPoint(
    time_unix_nano=t, start_time_unix_nano=s, count=c, sum=total, attributes=a),
    _u64, _u64, _u64, st.floats(), _attrs)
_temporality = st.integers(0, 3)
_metric = st.one_of(
    st.builds(lambda n, p: pb.Metric(name=n, gauge=pb.Gauge(data_points=p)), st.text(max_size=6),
              st.lists(_number_point, max_size=3)),
    st.builds(lambda n, p, tm, mono: pb.Metric(name=n, sum=pb.Sum(data_points=p, aggregation_temporality=tm,
                                                                  is_monotonic=mono)),
              st.text(max_size=6), st.lists(_number_point, max_size=3), _temporality, st.booleans()),
    st.builds(lambda n, p, tm: pb.Metric(name=n, histogram=pb.Histogram(data_points=p,
                                                                       aggregation_temporality=tm)),
              st.text(max_size=6), st.lists(_hist_point, max_size=3), _temporality),
    st.builds(lambda n: pb.Metric(name=n), st.text(max_size=6)))


@settings(max_examples=200, deadline=None)
@given(st.lists(_metric, max_size=4), _attrs)
def test_arbitrary_protobuf_requests_never_raise(metrics, resource_attrs):
    req = ExportMetricsServiceRequest(resource_metrics=[pb.ResourceMetrics(
        resource=Resource(attributes=resource_attrs), scope_metrics=[pb.ScopeMetrics(metrics=metrics)])])
    dec = OtlpDecoder(("", *(kv.key for kv in resource_attrs)))
    for data, d in ((b := req.SerializeToString(), dec.decode(b)),
                    (j := json_format.MessageToJson(req).encode(), OtlpDecoder(json=True).decode(j))):
        assert np.isfinite(d.points.value).all() and np.isfinite(d.points.time).all(), data
        assert d.records >= len(d.errors)


def test_reader_keeps_histogram_state_across_messages_and_reads_otlp_json_lines():
    reader = MessageReader(InputConfig(format="otlp_proto", resource_labels=()))
    msgs = [request(pb.Metric(name="h", histogram=pb.Histogram(aggregation_temporality=CUM, data_points=[
        _hist(T0 + 60 * i, 10 * (i + 1), 20.0 * (i + 1))]))).SerializeToString() for i in range(3)]
    batch, bad, records = reader.decode_messages(msgs, lambda i: f"t/0@{i}")
    assert bad == [] and records == 3
    means = [v for k, v in zip(batch.keys, batch.value.tolist(), strict=True) if k == "h_mean"]
    assert means == [2.0, 2.0]
    lines = b"\n".join(json_format.MessageToJson(request(pb.Metric(name="g", gauge=pb.Gauge(
        data_points=[number(T0 + i, float(i))]))), indent=None).encode() for i in range(3))
    jr = MessageReader(InputConfig(format="otlp_json"))
    d = jr.decode(lines + b"\nnot json\n", prefix="file.otlp.json", rules=TimeRules(), builder=PointBuilder())
    assert d.records == 4 and [e.position for e in d.errors] == ["file.otlp.json line 4 message"]
    assert format_for_path("x.otlp.json") == "otlp_json" and format_for_path("dump.pb") == "otlp_proto"
