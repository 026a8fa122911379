"""A mute posted over HTTP silences a series in the running daemon (local broker).

river.datasets.WaterFlow (hourly) opens breaches when replayed without a mute (the reference run
below); with a mute over the whole span posted on the health port first, the daemon sends none,
counts the muted steps, lists the mute, and keeps it in the checkpoint.
"""

from __future__ import annotations

import json
import urllib.request
from dataclasses import replace

import pytest

from streamdet.core.engine import Engine
from tests.integration.streams import as_messages, waterflow_points
from tests.integration.test_daemon import Running, make_daemon, replay_events, wait_for

pytestmark = pytest.mark.broker


def post(port, body):
    req = urllib.request.Request(f"http://127.0.0.1:{port}/mutes", data=json.dumps(body).encode(),
                                 headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=5) as r:
        return r.status, json.loads(r.read())


def test_a_mute_posted_over_http_silences_a_series(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=2)
    expected = replay_events(points)
    assert {e.labels["site"] for e in expected if e.type.endswith("opened")} == {"s0", "s1"}
    times = [p["time"] for p in points]
    daemon, metrics = make_daemon(broker, tmp_path, topics)
    daemon.settings = replace(daemon.settings, mutes_api=True)  # make_daemon sets `health` itself
    get = metrics.registry.get_sample_value
    with Running(daemon):
        assert wait_for(lambda: daemon.health_port is not None)
        status, body = post(daemon.health_port, {
            "id": "flow-works", "match": {"metric": "waterflow", "labels": {"site": "s0"}},
            "start": min(times) - 3600, "end": max(times) + 86400, "comment": "pump replacement"})
        assert status == 201 and body["id"] == "flow-works"
        broker.produce(topics[0], as_messages(points))
        assert wait_for(lambda: get("streamdet_points_accepted_total") == len(points))
        want = [e.id for e in expected if e.labels["site"] == "s1"]
        got = broker.read_all(topics[1], expect=len(want))
        assert wait_for(lambda: (get("streamdet_mutes_active") or 0) == 1, timeout=10)
        with urllib.request.urlopen(f"http://127.0.0.1:{daemon.health_port}/mutes", timeout=5) as r:
            assert [m["id"] for m in json.loads(r.read())["mutes"]] == ["flow-works"]
    ids = [json.loads(m.value())["id"] for m in got]
    assert sorted(ids) == sorted(want)  # site s1 unchanged; nothing from the muted site s0
    assert get("streamdet_steps_muted_total") > 0
    ckpt = daemon.store.load(topics[0], 0)
    assert [m.id for m in Engine.restore(daemon.config, ckpt.snapshot).mutes.api_entries()] == ["flow-works"]
