"""Telegraf JSON, mapped JSON, per-topic input settings, and what formats declare about a series
(counter kind, unit) surviving the engine's snapshots and reaching events."""

import json
import math

import numpy as np
import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamdet.codecs import TimeRules, decode_influx, decode_json, decode_telegraf
from streamdet.codecs.json import decode_mapped_json
from streamdet.codecs.readers import MessageReader
from streamdet.config import ConfigError, InputConfig, JsonMapping, parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch, SeriesNote
from streamdet.daemon.settings import parse_settings

T0 = 1_709_294_400

# ----------------------------------------------------------------- Telegraf JSON

# Telegraf's JSON serializer documents this shape (plugins/serializers/json README, "Standard
# form" and "Batch format"): {"fields", "name", "tags", "timestamp"}, timestamp in
# json_timestamp_units (default 1s).
TELEGRAF_DOC = {"fields": {"field_1": 30, "field_2": 4, "n_images": 660}, "name": "docker",
                "tags": {"host": "raynor"}, "timestamp": 1458229140}


def test_telegraf_documented_example():
    d = decode_telegraf(orjson.dumps(TELEGRAF_DOC))
    assert d.errors == [] and d.records == 1
    assert sorted(d.points.keys) == ['docker_field_1{host="raynor"}', 'docker_field_2{host="raynor"}',
                                     'docker_n_images{host="raynor"}']
    assert set(d.points.time.tolist()) == {1458229140.0}
    batch = decode_telegraf(orjson.dumps({"metrics": [TELEGRAF_DOC, {**TELEGRAF_DOC, "tags": {}}]}))
    assert batch.errors == [] and batch.records == 2 and len(batch.points) == 6


def _series_and_events(batch: PointBatch):
    cfg = parse_config({"rules": [{"name": "all", "step": "60s", "warmup": "20 steps"}]})
    eng = Engine(cfg)
    order = np.argsort(batch.time, kind="stable")
    events = eng.ingest(batch.take(order)) + eng.finish()
    return sorted(eng.table.index), [(e.type, e.series, e.step_start, e.observed) for e in events]


def test_telegraf_json_equals_line_protocol_for_the_same_metrics():
    # The same metrics sent as line protocol (Influx line-protocol reference: measurement,tags
    # fields timestamp; booleans, integers with i, strings quoted) and as Telegraf JSON give the
    # same series, points and events.
    rng = np.random.default_rng(7)
    lines, docs = [], []
    for i in range(200):
        t = T0 + 60 * i
        for host in ("a", "b"):
            load = 5.0 + rng.normal() + (30.0 if (host == "a" and 150 <= i < 160) else 0.0)
            up = i % 7 != 0
            lines.append(f'cpu,host={host},dc=x load={load!r},procs={100 + i % 5}i,up={str(up).lower()},'
                         f'state="ok" {t}')
            docs.append({"name": "cpu", "tags": {"host": host, "dc": "x"},
                         "fields": {"load": load, "procs": 100 + i % 5, "up": up, "state": "ok"},
                         "timestamp": t * 1000})
    lp = decode_influx("\n".join(lines).encode(), precision="s")
    tj = MessageReader(InputConfig(format="telegraf_json", telegraf_units="ms")).decode_messages(
        [orjson.dumps({"metrics": docs[j:j + 50]}) for j in range(0, len(docs), 50)], str)[0]
    assert lp.errors == []
    assert lp.points.keys == tj.keys
    np.testing.assert_array_equal(lp.points.time, tj.time)
    np.testing.assert_array_equal(lp.points.value, tj.value)
    series_lp, events_lp = _series_and_events(lp.points)
    series_tj, events_tj = _series_and_events(tj)
    assert series_lp == series_tj and events_lp == events_tj
    assert any(s == 'cpu_load{dc="x",host="a"}' for _t, s, *_ in events_lp)  # the burst is caught


@pytest.mark.parametrize("doc,reason", [
    ({"tags": {}, "fields": {"x": 1}, "timestamp": 60}, "missing field 'name'"),
    ({"name": "m", "tags": {}, "timestamp": 60}, "missing field 'fields'"),
    ({"name": "m", "fields": {"x": "text"}, "timestamp": 60}, "no numeric field"),
    ({"name": "m", "fields": {"x": [1]}, "timestamp": 60}, "got list"),
    ({"name": "m", "fields": {"x": 1}, "tags": {"h": 5}, "timestamp": 60}, "must be a string"),
    ({"name": "m", "fields": {"x": 1}, "tags": {"h": ""}, "timestamp": 60}, "empty name or value"),
    ({"name": "m", "fields": {"x": 1}, "timestamp": "soon"}, "not ISO 8601"),
    ({"name": "m", "fields": {"x": 1}, "timestamp": 10**30}, "outside the years"),
    ({"name": "m", "fields": {"x": 1}, "timestamp": True}, "must be an integer"),
    ({"name": "m", "fields": {"x": 1}}, "missing field 'timestamp'"),
    ({"name": "m" * 300, "fields": {"x": 1}, "timestamp": 60}, "too long"),
    ({"metrics": 5}, "'metrics' must be a list"),
    ([1, 2], "expected a JSON object"),
])
def test_telegraf_bad_records(doc, reason):
    d = decode_telegraf(json.dumps(doc).encode(), prefix="tg/0@1")
    assert len(d.points) == 0 and len(d.errors) == 1 and reason in d.errors[0].reason, d.errors
    assert d.errors[0].position.startswith("tg/0@1")


def test_telegraf_units_and_rfc3339_and_bad_json():
    assert decode_telegraf(b'{"name": "m", "fields": {"x": 1}, "timestamp": 60000000000}',
                           units="ns").points.time.tolist() == [60.0]
    assert decode_telegraf(b'{"name": "m", "fields": {"x": 1}, "timestamp": "2024-03-01T12:00:00Z"}'
                           ).points.time.tolist() == [T0]
    for raw in (b"{" * 3000, b'{"name": "m", "fields": {"x": NaN}, "timestamp": 1}', b"\xff\xfe"):
        d = decode_telegraf(raw)
        assert len(d.points) == 0 and "invalid JSON" in d.errors[0].reason


@settings(max_examples=200, deadline=None)
@given(st.recursive(st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=5),
                    lambda c: st.lists(c, max_size=3) | st.dictionaries(
                        st.sampled_from(["name", "tags", "fields", "timestamp", "metrics", "x"]), c, max_size=4),
                    max_leaves=12))
def test_telegraf_arbitrary_json_never_raises(doc):
    d = decode_telegraf(json.dumps(doc).encode())  # stdlib: integers of any size
    assert np.isfinite(d.points.value).all() and d.records >= len(d.errors)


# ----------------------------------------------------------------- mapped JSON

MAPPING = JsonMapping(metric_key="name", labels_key="dims", time_key="ts", value_key="v", time_unit="ms",
                      label_keys=("host", "region"))


def test_mapped_json_reads_an_in_house_shape():
    msg = b'{"name": "orders", "dims": {"shop": "s1"}, "host": "h1", "region": 3, "ts": 1709294400000, "v": 4}'
    d = decode_mapped_json(msg, MAPPING)
    assert d.errors == []
    assert d.points.keys == ['orders{host="h1",region="3",shop="s1"}']
    assert d.points.time.tolist() == [T0] and d.points.value.tolist() == [4.0]
    # the same through the daemon's batch path
    batch, bad, n = MessageReader(InputConfig(json=MAPPING)).decode_messages([msg, msg], str)
    assert bad == [] and n == 2 and batch.keys == d.points.keys * 2


@pytest.mark.parametrize("record,reason", [
    (b'{"ts": 1, "v": 1}', "missing field 'name'"),
    (b'{"name": "m", "v": 1}', "missing field 'ts'"),
    (b'{"name": "m", "ts": 1}', "missing field 'v'"),
    (b'{"name": "m", "ts": 1, "v": 1, "dims": [1]}', "'dims' must be an object"),
    (b'{"name": "m", "ts": 1, "v": 1, "host": {"a": 1}}', "label key 'host'"),
    (b'{"name": "m", "ts": 1e300, "v": 1}', "outside the years"),
    (b'{"name": "m", "ts": 1, "v": "NaN"}', "NaN"),
    (b'{"name": 5, "ts": 1, "v": 1}', "non-empty string"),
])
def test_mapped_json_errors_name_the_producers_keys(record, reason):
    d = decode_mapped_json(record, MAPPING, prefix="p")
    assert len(d.points) == 0 and reason in d.errors[0].reason, d.errors


def test_default_mapping_is_the_plain_decoder():
    msg = b'{"metric": "q", "labels": {"a": "b"}, "time": 60, "value": 1}'
    assert decode_mapped_json(msg, JsonMapping()).points.keys == decode_json(msg).points.keys
    assert MessageReader(InputConfig()).decode_messages([msg], str)[0].keys == ['q{a="b"}']


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(st.sampled_from(["name", "dims", "ts", "v", "host", "region"]),
                       st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=4)
                       | st.dictionaries(st.text(max_size=3), st.text(max_size=3), max_size=2), max_size=6))
def test_mapped_json_arbitrary_objects_never_raise(obj):
    d = decode_mapped_json(json.dumps(obj).encode(), MAPPING)
    assert np.isfinite(d.points.value).all() and d.records == 1


# ----------------------------------------------------------------- config

def test_per_topic_formats_and_plain_names(tmp_path):
    cfg = parse_config({"input": {"format": "influx", "json": {"metric_key": "n"}},
                        "state": {"dir": str(tmp_path)},
                        "kafka": {"input_topics": ["lp", {"topic": "otel", "format": "otlp_proto",
                                                          "otlp": {"resource_labels": ["service.name"]}},
                                                  {"topic": "app", "format": "json",
                                                   "json": {"time_unit": "ms"}}]}})
    s = parse_settings(cfg)
    assert s.input_topics == ("lp", "otel", "app")
    assert "lp" not in s.topic_inputs
    assert s.topic_inputs["otel"].resource_labels == ("service.name",)
    assert s.topic_inputs["app"].json.metric_key == "n"  # inherited from the input section
    assert s.topic_inputs["app"].json.time_unit == "ms"


@pytest.mark.parametrize("topics,problem", [
    ([{"topic": "a", "format": "csv"}], "input_topics[0].format: csv is for replay"),
    ([{"format": "json"}], "input_topics[0].topic"),
    ([{"topic": "a", "fromat": "json"}], "input_topics[0].fromat: unknown key"),
    (["a", {"topic": "a"}], "listed more than once"),
    ([5], "expected a topic name or a mapping"),
])
def test_per_topic_config_errors(tmp_path, topics, problem):
    cfg = parse_config({"state": {"dir": str(tmp_path)}, "kafka": {"input_topics": topics}})
    with pytest.raises(ConfigError) as exc:
        parse_settings(cfg)
    assert any(problem in p for p in exc.value.problems), exc.value.problems


def test_input_section_keys():
    cfg = parse_config({"input": {"format": "telegraf_json", "telegraf_units": "1ms",
                                  "otlp": {"resource_labels": []}}})
    assert cfg.input.telegraf_units == "ms" and cfg.input.resource_labels == ()
    with pytest.raises(ConfigError) as exc:
        parse_config({"input": {"telegraf_units": "2s", "json": {"time_key": "metric"}}})
    text = str(exc.value)
    assert "input.telegraf_units" in text and "input.json.(keys)" in text


# ----------------------------------------------------------------- declared kind and unit

def _counter_batch(values, start=0, unit="By/s"):
    keys = ["sent"] * len(values)
    t = np.array([T0 + 60 * (start + i) for i in range(len(values))], dtype=float)
    return PointBatch(keys, t, np.array(values, dtype=float), {"sent": ("sent", ())},
                      {"sent": SeriesNote(kind="counter", unit=unit)})


def test_declared_counter_and_unit_survive_a_snapshot_and_reach_events():
    cfg = parse_config({"rules": [{"name": "r", "step": "60s", "warmup": "30 steps"}]})
    eng = Engine(cfg, record_steps=True)
    rng = np.random.default_rng(3)
    inc = 60 * (10 + rng.normal(0, 0.5, 80))
    eng.ingest(_counter_batch(np.cumsum(inc)[:50].tolist()))
    restored = Engine.restore(cfg, eng.snapshot(), record_steps=True)
    row = restored.table.index["sent"]
    assert restored.table.counter[row] == 1 and restored.table.units[row] == "By/s"
    tail = np.cumsum(inc)[50:].copy()
    tail[20:] += np.cumsum(np.full(10, 60 * 50.0))  # rate jumps from ~10/s to ~60/s
    events = restored.ingest(_counter_batch(tail.tolist(), start=50)) + restored.finish()
    observed = restored.log.columns()["observed"]
    assert 9 < float(np.median(observed)) < 11  # rates, not the growing totals
    opened = [e for e in events if e.type == "streamdet.breach.opened"]
    assert opened and opened[0].unit == "By/s" and opened[0].data()["unit"] == "By/s"


def test_snapshot_without_the_counter_column_still_restores():
    # tests/data/snapshot_v1.bin was written before formats declared counters and units (see
    # tests/test_engine_state.py): it has no series.counter column and no units in its header.
    from pathlib import Path

    blob = (Path(__file__).parent / "data" / "snapshot_v1.bin").read_bytes()
    cfg = parse_config({"rules": [{"name": "checkout", "step": "60s", "warmup": "10 steps"}]})
    restored = Engine.restore(cfg, blob)
    n = restored.table.n
    assert n == 3 and not restored.table.counter[:n].any()
    assert not restored.table.any_counter and restored.table.units == {}


def test_nan_never_leaves_a_decoder():
    for raw in (b'{"metric": "m", "time": 60, "value": NaN}',):
        assert len(decode_json(raw).points) == 0
    assert math.isnan(float("nan"))  # (orjson refuses NaN literals: invalid JSON, counted)
    d = decode_telegraf(b'{"name": "m", "fields": {"x": 1e400}, "timestamp": 60}',
                        rules=TimeRules())
    assert len(d.points) == 0 and d.errors
