"""Decoders: documented forms, the bad-record rules, and never raising on arbitrary bytes."""

from datetime import UTC, datetime

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamdet.codecs import TimeRules, decode_csv, decode_influx, decode_json, format_for_path
from streamdet.codecs.common import epoch_to_seconds, parse_time

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
