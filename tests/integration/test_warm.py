"""Warm start against the local broker: the partition of each series key is the one librdkafka
picks itself, and warm-then-live gives exactly what all-live gives (bands and events), also across
a daemon restart. Data: river's WaterFlow dataset, one copy per site."""

from __future__ import annotations

import numpy as np
import orjson
import pytest
from confluent_kafka import Producer

from streamdet.cli import main
from streamdet.codecs.common import parse_time
from streamdet.config import parse_config
from streamdet.core.points import normalise_labels, series_key
from streamdet.core.snapshot import decode_snapshot
from streamdet.daemon.state_store import LocalStateStore
from streamdet.events import parse_cloudevent
from streamdet.warm import crc32_partition, murmur2_partition, warm_from_files
from tests.integration.kafka import unique
from tests.integration.streams import DAEMON_RULES, waterflow_points, without_wall_clock
from tests.integration.test_daemon import Running, make_daemon, wait_for

pytestmark = pytest.mark.broker


def keyed(points):
    """(key, value) messages keyed by series key, the key warm start assumes."""
    return [(series_key(p["metric"], normalise_labels(p["labels"])).encode(), orjson.dumps(p)) for p in points]


@pytest.mark.parametrize("name, ours", [("consistent_random", crc32_partition),
                                        ("murmur2_random", murmur2_partition)])
def test_partitioner_matches_librdkafkas_choice(broker, name, ours):
    topic = unique("parts")
    broker.create_topics(topic, partitions=7)
    keys = [series_key("http_requests", normalise_labels({"host": f"web-{i}", "code": str(200 + i % 5)})).encode()
            for i in range(120)]
    p = Producer({"bootstrap.servers": broker.bootstrap, "partitioner": name, "linger.ms": 5})
    chosen = {}

    def delivered(err, msg):
        assert err is None
        chosen[msg.key()] = msg.partition()

    for k in keys:
        p.produce(topic, key=k, value=b"{}", on_delivery=delivered)
    assert p.flush(30) == 0
    assert {k: ours(k, 7) for k in keys} == chosen
    assert len(set(chosen.values())) > 3  # the keys really spread


def engine_state(path):
    """Header (minus counters of work done) and arrays of a checkpoint's engine snapshot."""
    ckpt = LocalStateStore(path.parent).load(*path.stem.rsplit("-", 1)[:1], int(path.stem.rsplit("-", 1)[1]))
    snap = decode_snapshot(ckpt.snapshot)
    header = dict(snap.header)
    header["keys"], header["meta"] = snap.keys, snap.meta
    return ckpt.next_offset, header, {k: np.array(v) for k, v in snap.arrays.items()}


def run_until(broker, tmp_path, topics, count, **kw):
    daemon, metrics = make_daemon(broker, tmp_path, topics, **kw)
    get = metrics.registry.get_sample_value
    with Running(daemon):
        assert wait_for(lambda: get("streamdet_points_accepted_total") == count)
    return daemon


def test_warm_then_live_equals_all_live_across_a_restart(broker, tmp_path):
    points = waterflow_points(sites=3)
    split = 3 * 500  # 500 hours of history, the rest live
    history, live = points[:split], points[split:]
    # all live
    a = broker.daemon_topics(partitions=2)
    broker.produce(a[0], keyed(points))
    run_until(broker, tmp_path / "a", a, len(points))
    all_live = [parse_cloudevent(m.value()) for m in broker.read_all(a[1], expect=24)]
    assert len(all_live) == 24  # four breaches per site, opened and closed
    # warm from a file, then live in two runs with a restart between
    b = broker.daemon_topics(partitions=2)
    (tmp_path / "history.jsonl").write_bytes(b"\n".join(orjson.dumps(p) for p in history))
    cfg_file = tmp_path / "cfg.yaml"
    cfg_file.write_text(orjson.dumps({**DAEMON_RULES, "kafka": {
        "bootstrap_servers": broker.bootstrap, "input_topics": [b[0]]},
        "state": {"dir": str(tmp_path / "b" / "state")}}).decode())
    assert main(["warm", "--config", str(cfg_file), "--from", str(tmp_path / "history.jsonl")]) == 0
    half = len(live) // 2
    broker.produce(b[0], keyed(live[:half]))
    first = run_until(broker, tmp_path / "b", b, half)
    broker.produce(b[0], keyed(live[half:]))
    run_until(broker, tmp_path / "b", b, len(live) - half, extra={"group_id": first.settings.group_id})
    warm_live = [parse_cloudevent(m.value()) for m in broker.read_all(b[1], idle=2.0)]  # all of them
    # events: all-live's events decided in the live part are exactly warm-then-live's events
    cut = history[-1]["time"]
    expected = sorted(d["id"] for d in all_live if parse_time(d["time"]) > cut)
    assert sorted(d["id"] for d in warm_live) == expected and len(expected) == 6
    by_id = {d["id"]: without_wall_clock(d) for d in all_live}
    assert all(without_wall_clock(d) == by_id[d["id"]] for d in warm_live)
    # bands: every array of every partition's engine state is identical
    for p in (0, 1):
        off_a, head_a, arr_a = engine_state(tmp_path / "a" / "state" / f"{a[0]}-{p}.ckpt")
        _off_b, head_b, arr_b = engine_state(tmp_path / "b" / "state" / f"{b[0]}-{p}.ckpt")
        assert head_a["keys"] == head_b["keys"] and head_a["clock"] == head_b["clock"]
        assert arr_a.keys() == arr_b.keys()
        for k in arr_a:
            np.testing.assert_array_equal(arr_a[k], arr_b[k], err_msg=f"partition {p}: {k}")
        assert off_a > 0


def test_warm_refuses_to_overwrite_and_counts_bad_records(broker, tmp_path, capsys):
    topics = broker.daemon_topics(partitions=2)
    f = tmp_path / "h.jsonl"
    pts = waterflow_points(sites=1)[:200]
    f.write_bytes(b"\n".join(orjson.dumps(p) for p in pts) + b'\n{"metric": "waterflow", "value": "x"}\nnope\n')
    cfg = parse_config({**DAEMON_RULES})
    store = LocalStateStore(tmp_path / "state")
    result = warm_from_files(cfg, [f], store=store, topic=topics[0], offsets={0: 0, 1: 5})
    assert result.points == 200 and len(result.errors) == 2 and result.points_per_second > 0
    assert {p: off for p, (_n, off) in result.partitions.items()} == {0: 0, 1: 5}
    assert sum(n for n, _off in result.partitions.values()) == 1
    cfg_file = tmp_path / "cfg.yaml"
    cfg_file.write_text(orjson.dumps({"kafka": {"bootstrap_servers": broker.bootstrap,
                                                "input_topics": [topics[0]]},
                                      "state": {"dir": str(tmp_path / "state")}}).decode())
    assert main(["warm", "--config", str(cfg_file), "--from", str(f)]) == 2
    assert "--force" in capsys.readouterr().err
    assert main(["warm", "--config", str(cfg_file), "--from", str(tmp_path / "missing.csv")]) == 2
    cfg_file.write_text(orjson.dumps({"kafka": {"bootstrap_servers": broker.bootstrap,
                                                "input_topics": [unique("absent")]},
                                      "state": {"dir": str(tmp_path / "s2")}}).decode())
    assert main(["warm", "--config", str(cfg_file), "--from", str(f)]) == 2


def test_warm_from_the_input_topic_equals_warm_from_files(broker, tmp_path):
    topics = broker.daemon_topics(partitions=2)
    history = waterflow_points(sites=3)[:3 * 300]
    broker.produce(topics[0], [*keyed(history), (b"x", b"not json")])
    f = tmp_path / "h.jsonl"
    f.write_bytes(b"\n".join(orjson.dumps(p) for p in history))
    cfg_file = tmp_path / "cfg.yaml"
    for name, source in (("topic", ["--from-topic", topics[0], "--since", "1h"]), ("files", ["--from", str(f)])):
        cfg_file.write_text(orjson.dumps({**DAEMON_RULES, "kafka": {
            "bootstrap_servers": broker.bootstrap, "input_topics": [topics[0]]},
            "state": {"dir": str(tmp_path / name)}}).decode())
        assert main(["warm", "--config", str(cfg_file), *source]) == 0
    total = 0
    for p in (0, 1):
        off_t, head_t, arr_t = engine_state(tmp_path / "topic" / f"{topics[0]}-{p}.ckpt")
        _off_f, head_f, arr_f = engine_state(tmp_path / "files" / f"{topics[0]}-{p}.ckpt")
        # (the files' offsets are the broker's listed end offsets, which the bundled test broker
        # gets wrong; the topic's are where reading stopped)
        assert head_t["keys"] == head_f["keys"]
        for k in arr_t:
            np.testing.assert_array_equal(arr_t[k], arr_f[k], err_msg=f"partition {p}: {k}")
        total += off_t
    assert total == len(history) + 1  # live consumption starts after the bad message too
