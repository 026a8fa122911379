"""Decoders: documented forms, the bad-record rules, and never raising on arbitrary bytes."""

import json
from datetime import UTC, datetime

import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamdet.codecs import TimeRules, decode_csv, decode_influx, decode_json, format_for_path
from streamdet.codecs.common import RecordError, check_series, epoch_to_seconds, parse_time
from streamdet.codecs.json import decode_json_messages
from streamdet.core.points import PointBuilder, normalise_labels, series_key

T0 = datetime(2024, 3, 1, 12, 0, tzinfo=UTC).timestamp()


def test_json_object_array_and_prometheus_form():
    d = decode_json(b'[{"metric": "req", "labels": {"host": "a"}, "time": "2024-03-01T12:00:00Z",'
                    b' "value": 5}, {"labels": {"__name__": "req", "host": "b"},'
                    b' "time": 1709294400, "value": "7.5"}]')
    assert d.errors == []
    assert d.points.keys == ['req{host="a"}', 'req{host="b"}']
    assert d.points.time.tolist() == [T0, T0]
    assert d.points.value.tolist() == [5.0, 7.5]
    assert d.points.series['req{host="b"}'] == ("req", (("host", "b"),))


@pytest.mark.parametrize("raw", ["2024-03-01T12:00:00Z", "2024-03-01 12:00:00", "2024-03-01T13:00:00+01:00",
                                 1709294400, 1709294400000, 1709294400000000, 1709294400000000000,
                                 "1709294400"])
def test_time_forms(raw):
    # Naive ISO times are UTC; epoch units are told apart by magnitude (README rule).
    assert parse_time(raw) == pytest.approx(T0)


def test_epoch_rule_boundaries():
    assert epoch_to_seconds(99_999_999_999) == 99_999_999_999  # just under 1e11: seconds
    assert epoch_to_seconds(1e11) == 1e8  # 1e11 and above: milliseconds


@pytest.mark.parametrize("record,reason", [
    (b'{"metric": "m", "time": 60, "value": "abc"}', "not numeric"),
    (b'{"metric": "m", "time": 60}', "missing field 'value'"),
    (b'{"time": 60, "value": 1}', "missing field 'metric'"),
    (b'{"metric": "m", "value": 1}', "missing field 'time'"),
    (b'{"metric": "m", "time": "yesterday", "value": 1}', "not ISO 8601"),
    (b'{"metric": "m", "time": 60, "value": "-inf"}', "infinite"),
    (b'{"metric": "m", "time": 60, "value": true}', "boolean"),
    (b'{"metric": "m", "time": 60, "value": "NaN"}', "NaN"),
    (b'{"metric": "m", "time": 60, "value": 1', "invalid JSON"),
])
def test_json_bad_records_are_reported_not_raised(record, reason):
    d = decode_json(record, prefix="topic/0@12")
    assert len(d.points) == 0
    assert len(d.errors) == 1
    assert reason in d.errors[0].reason
    assert d.errors[0].position.startswith("topic/0@12")


def test_future_times_refused_relative_to_supplied_now():
    rules = TimeRules(now=T0, max_future=3600)
    d = decode_json(b'{"metric": "m", "time": %d, "value": 1}\n{"metric": "m", "time": %d, "value": 2}'
                    % (T0 + 60, T0 + 86400), rules=rules)
    assert d.points.value.tolist() == [1.0]
    assert "future" in d.errors[0].reason and d.errors[0].position == "line 2"


def test_bad_record_in_the_middle_keeps_the_rest():
    lines = b"\n".join([b'{"metric": "m", "time": 60, "value": 1}', b'{"metric": "m", "time": 120, "value": "x"}',
                        b'{"metric": "m", "time": 180, "value": 3}'])
    d = decode_json(lines)
    assert d.points.value.tolist() == [1.0, 3.0]
    assert [e.position for e in d.errors] == ["line 2"]
    assert d.records == 3


# Line protocol. Examples follow the published line-protocol reference (escaping rules and
# field types), reproduced from memory.
def test_influx_basic_fields_types_and_precision():
    d = decode_influx(b"weather,location=us-midwest temperature=82,humid=71i,ok=true,note=\"hot\" "
                      b"1465839830100400200")
    assert d.errors == []
    by_key = dict(zip(d.points.keys, d.points.value.tolist(), strict=True))
    assert by_key == {'weather_temperature{location="us-midwest"}': 82.0,
                      'weather_humid{location="us-midwest"}': 71.0,
                      'weather_ok{location="us-midwest"}': 1.0}
    assert d.points.time[0] == pytest.approx(1465839830.1004002)
    s = decode_influx(b"cpu value=1 1465839830", precision="s")
    assert s.points.time.tolist() == [1465839830.0]


def test_influx_escaping():
    d = decode_influx(b'my\\ measure\\,ment,tag\\ key=tag\\,value,t2=a\\=b field\\=k="str \\" q",v=1.5 60000000000')
    assert d.errors == []
    assert d.points.keys == ['my measure,ment_v{t2="a=b",tag key="tag,value"}']
    assert d.points.value.tolist() == [1.5]


@pytest.mark.parametrize("line,reason", [
    (b"cpu", "expected"),
    (b"cpu value=abc 60", "not a number"),
    (b"cpu value= 60", "empty field value"),
    (b"cpu note=\"only strings\" 60", "no numeric field"),
    (b"cpu value=1 sixty", "not an integer"),
    (b"cpu value=1", "missing timestamp"),
    (b"cpu,host value=1 60", "not key=value"),
    (b'cpu s="open 60', "unterminated"),
])
def test_influx_bad_lines(line, reason):
    d = decode_influx(line + b"\ncpu value=2 120000000000\n")
    assert reason in d.errors[0].reason
    assert d.errors[0].position == "line 1"
    assert d.points.value.tolist() == [2.0]


def test_csv_with_labels_metric_and_bad_rows():
    d = decode_csv(b"time,value,host,metric\n2024-03-01 12:00:00,5,a,load\n2024-03-01 12:01:00,x,a,load\n"
                   b"2024-03-01 12:02:00,6,b,\n", metric="fallback")
    assert d.points.keys == ['load{host="a"}']
    assert [e.position for e in d.errors] == ["line 3", "line 4"]
    assert decode_csv(b"when,value\n1,2\n").errors[0].reason.startswith("header lacks")


def test_format_for_path():
    assert format_for_path("a/b.csv") == "csv"
    assert format_for_path("x.jsonl") == "json"
    assert format_for_path("x.lp") == "influx"
    with pytest.raises(ValueError, match="cannot tell"):
        format_for_path("x.bin")


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=400))
def test_decoders_never_raise_on_arbitrary_bytes(data):
    for decode in (decode_json, decode_influx, decode_csv):
        out = decode(data)
        assert len(out.points) + len(out.errors) >= 0


@settings(max_examples=200, deadline=None)
@given(st.text(alphabet='ab ,=\\"0123456789.ie-tf\n', max_size=120))
def test_influx_never_raises_on_line_like_text(text):
    out = decode_influx(text.encode())
    assert all(e.position.startswith("line") for e in out.errors)


# ---------------------------------------------------------------- poison records (issue 7, item 1)

@pytest.mark.parametrize("labels,kind", [('{"h": {"x": 1}}', "an object"), ('{"h": [1, 2]}', "a list"),
                                         ('{"h": null}', "null"), ('{"h": true}', "a boolean")])
def test_label_values_that_are_not_strings_are_refused_with_a_reason(labels, kind):
    # Before: an object or list label value raised TypeError (unhashable) in the key cache.
    record = b'{"metric": "g", "labels": %s, "time": 60, "value": 1}' % labels.encode()
    for decoded in (decode_json(record, prefix="t/0@5"),
                    decode_json_messages([record], lambda i: "t/0@5")[1][0][1]):
        assert len(decoded.points) == 0
        assert decoded.errors[0].position == "t/0@5 record"
        assert decoded.errors[0].reason == f"label 'h': value is {kind}; label values must be strings or numbers"


def test_numeric_label_values_become_strings_on_both_paths():
    record = b'{"metric": "g", "labels": {"shard": 7, "w": 0.5}, "time": 60, "value": 1}'
    batch, bad, _ = decode_json_messages([record], str)
    assert bad == [] and batch.keys == ['g{shard="7",w="0.5"}']
    assert decode_json(record).points.keys == ['g{shard="7",w="0.5"}']


@pytest.mark.parametrize("record,reason", [
    ({"metric": "m" * 257}, "too long: metric name of 257 characters (limit 256)"),
    ({"labels": {"k" * 257: "v"}}, "too long: label name of 257 characters (limit 256)"),
    ({"labels": {"host": "v" * 1025}}, "too long: label 'host' has a value of 1025 characters (limit 1024)"),
    ({"labels": {f"l{i}": "v" * 1000 for i in range(5)}}, "too long: series key of 5032 characters (limit 4096)"),
])
def test_length_limits_on_names_values_and_keys(record, reason):
    doc = {"metric": "m", "time": 60, "value": 1, **record}
    data = orjson.dumps(doc)
    for decoded in (decode_json(data), decode_json_messages([data], str)[1][0][1]):
        assert len(decoded.points) == 0 and decoded.errors[0].reason.startswith(reason)
    at_limit = orjson.dumps({"metric": "m" * 256, "labels": {"k" * 256: "v" * 1024}, "time": 60, "value": 1})
    assert len(decode_json_messages([at_limit], str)[0]) == 1


def test_length_limits_apply_to_line_protocol_and_csv():
    lp = decode_influx(b"cpu,host=" + b"a" * 2000 + b" v=1 60000000000\ncpu v=2 60000000000")
    assert lp.errors[0].reason.startswith("too long: label 'host'") and lp.points.value.tolist() == [2.0]
    csv = decode_csv(b"time,value,host\n60,1," + b"a" * 2000 + b"\n120,2,b\n")
    assert csv.errors[0].position == "line 2" and csv.points.value.tolist() == [2.0]


@pytest.mark.parametrize("line,reason", [
    (b"m f=" + b"9" * 400 + b"i 60000000000", "integer field value of 400 digits is out of range"),
    (b"m f=" + b"9" * 5000 + b"u 60000000000", "integer field value of 5000 digits is out of range"),
    (b"m f=1 " + b"9" * 400, "timestamp of 400 digits is out of range"),
    (b"m f=1e400 60000000000", "is out of range"),
    (b"m f=1_000 60000000000", "is not a number"),
    (b"m f=1 6_000", "is not an integer"),
    (b"m f=1 -" + b"9" * 21, "outside the years 1 to 9999"),
])
def test_line_protocol_numbers_out_of_range_are_refused(line, reason):
    # Before: a 400-digit integer field or timestamp raised OverflowError out of the decoder.
    d = decode_influx(line + b"\nm f=2 60000000000")
    assert reason in d.errors[0].reason and d.points.value.tolist() == [2.0]


def test_times_outside_the_calendar_are_refused():
    for raw in (b'"0001-01-01T00:00:00+14:00"', b"-62135596800", b'"1e300"', b'"9999-12-31T23:00:00"'):
        d = decode_json(b'{"metric": "m", "time": %s, "value": 1}' % raw)
        assert "outside the years 1 to 9999" in d.errors[0].reason
    # Historical series before 1970 are fine (a yearly river level from the year 622).
    old = decode_json(b'{"metric": "nile", "time": "0622-07-01", "value": 1157}')
    assert old.errors == [] and old.points.time[0] < -4e10


# ---------------------------------------------------------------- property tests (issue 7, item 2)

_json_scalars = (st.none() | st.booleans() | st.integers() | st.text(max_size=20)
                 | st.floats(allow_nan=False, allow_infinity=False))
_json_values = st.recursive(_json_scalars, lambda inner: st.lists(inner, max_size=4)
                            | st.dictionaries(st.text(max_size=8), inner, max_size=4), max_leaves=12)
# Objects that look like points, with any JSON value in any field, so the field checks are reached.
_points = st.fixed_dictionaries({}, optional={
    "metric": st.text(max_size=300) | _json_values, "labels": st.dictionaries(
        st.text(max_size=300), st.text(max_size=1100) | _json_values, max_size=5) | _json_values,
    "time": st.floats(0, 2e9) | st.integers() | _json_values, "value": _json_values,
    "timestamp": _json_values})


def _outcome(decoded):
    return list(decoded.points.keys), decoded.points.value.tolist(), [e.reason for e in decoded.errors]


@settings(max_examples=400, deadline=None)
@given(st.one_of(_json_values, _points, st.lists(_points, max_size=3)))
def test_arbitrary_json_never_raises_and_both_paths_agree(doc):
    data = json.dumps(doc, allow_nan=False).encode()
    single = decode_json(data)
    assert len(single.points) + len(single.errors) == single.records  # one point or one reason each
    batch, bad, records = decode_json_messages([data], lambda i: "")
    fast = bad[0][1].errors if bad else []
    assert (batch.keys, batch.value.tolist(), [e.reason for e in fast]) == _outcome(single)
    assert records == single.records
    for line in (data, data + b"\n" + data):
        decode_influx(line)
        decode_csv(b"time,value,metric\n" + line)


@settings(max_examples=300, deadline=None)
@given(st.text(max_size=40), st.text(max_size=20), st.text(max_size=40), st.text(max_size=40))
def test_series_key_never_raises_and_label_values_stay_distinct(metric, name, v1, v2):
    # The OpenMetrics text form escapes \\, " and newline in label values, so different values
    # give different keys (OpenMetrics 1.0, "Escaping" in the ABNF section).
    k1, k2 = series_key(metric, ((name, v1),)), series_key(metric, ((name, v2),))
    assert (k1 == k2) == (v1 == v2)
    b = PointBuilder()
    for v in (v1, v2):
        labels = normalise_labels({name: v})
        try:
            check_series(metric, labels)
        except RecordError:
            continue
        b.add(metric, labels, 60.0, 1.0)
    assert len(b.build()) <= 2
