"""Memory stays bounded by ``series.max_series``: key caches, refused series, unmatched keys.

The figures here are counts of cache entries and traced Python allocations (tracemalloc), not
RSS, so they do not depend on the allocator or on what else the process holds.
"""

from __future__ import annotations

import tracemalloc

import orjson
from prometheus_client import CollectorRegistry

from streamdet.codecs.json import decode_json_messages
from streamdet.config import parse_config
from streamdet.core import series as series_module
from streamdet.core.engine import Engine
from streamdet.core.points import KeyCache, cache_limit
from streamdet.daemon.consumer import Daemon, PartitionState
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import DaemonSettings


class _Message:
    """The parts of a confluent_kafka.Message the daemon's batch loop reads."""

    def __init__(self, value: bytes, offset: int) -> None:
        self._value, self._offset = value, offset

    def error(self):
        return None

    def topic(self) -> str:
        return "metrics"

    def partition(self) -> int:
        return 0

    def offset(self) -> int:
        return self._offset

    def value(self) -> bytes:
        return self._value

    def key(self):
        return None


class _Sink:
    def __init__(self) -> None:
        self.events, self.dead = [], []

    def send(self, events, _now) -> None:
        self.events.extend(events)

    def dead_letter(self, *args) -> None:
        self.dead.append(args)

    def poll(self) -> None:
        pass


class _NoStore:
    def load(self, *_):
        return None

    def save(self, *_):
        raise AssertionError("no checkpoint expected")

    def discard(self, *_):
        pass


def _big_label_message(i: int, t: float) -> bytes:
    # Three label values of 1,000 characters: inside the codec limits (1,024 per value, 4,096 per key).
    labels = {"request": f"{i:08d}" + "r" * 992, "trace": "t" * 1000, "zone": f"z{i % 7}" + "z" * 998}
    return orjson.dumps({"metric": "upload_bytes", "labels": labels, "time": t, "value": float(i % 13)})


def _daemon(max_series: int) -> tuple[Daemon, PartitionState]:
    cfg = parse_config({"rules": [{"name": "all", "step": "60s"}], "series": {"max_series": max_series}})
    daemon = Daemon(cfg, DaemonSettings(), metrics=Metrics(CollectorRegistry()), store=_NoStore())
    daemon.sink = _Sink()
    part = PartitionState(Engine(cfg))
    daemon.parts[("metrics", 0)] = part
    return daemon, part


def test_series_refused_for_max_series_are_not_kept_in_the_key_cache():
    """Many distinct series with large labels under a small cap: the daemon's key cache and
    the traced memory stay at the size of the cap, not of the stream."""
    daemon, part = _daemon(max_series=50)
    offset = 0

    def feed(first: int, count: int) -> None:
        nonlocal offset
        msgs = [_Message(_big_label_message(i, 1.7e9 + i % 50), offset + j)
                for j, i in enumerate(range(first, first + count))]
        offset += count
        daemon._process(msgs)

    feed(0, 500)  # the 50 admitted series and warm-up of every structure
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        for first in range(500, 4000, 500):
            feed(first, 500)
        grown = tracemalloc.get_traced_memory()[0] - before
    finally:
        tracemalloc.stop()
    eng = part.engine
    assert eng.stats()["series_active"] == 50
    assert eng.counters["points_series_limit"] == 4000 - 50
    # (keys this long take the checked decode path, which caches key -> labels only)
    assert len(part.key_cache.raw) <= 50 and len(part.key_cache.meta) == 50
    assert part.key_cache.limit == cache_limit(50)
    # 3,500 refused series of ~3 KB keys (and the same again in labels) would be > 20 MB if cached.
    assert grown < 2_000_000, f"traced memory grew by {grown:,} bytes"


def test_key_cache_keeps_admitted_series_and_is_cleared_over_its_limit():
    cfg = parse_config({"rules": [{"name": "all", "step": "60s"}], "series": {"max_series": 3}})
    eng = Engine(cfg)
    cache = KeyCache(limit=4)

    def ingest(names, t):
        msgs = [orjson.dumps({"metric": "m", "labels": {"host": n}, "time": t, "value": 1.0})
                for n in names]
        batch, bad, _ = decode_json_messages(msgs, str, cache=cache)
        assert bad == []
        eng.ingest(batch)
        return cache.settle(eng.table.knows)

    assert ingest(["a", "b", "c", "d", "e"], 60.0) == 2  # d and e refused for max_series
    assert sorted(cache.meta) == ['m{host="a"}', 'm{host="b"}', 'm{host="c"}']
    assert ingest(["a", "b", "c", "d"], 120.0) == 1  # d refused again; the cached three are hits
    assert len(cache.raw) == 3
    # The same series with its labels in another order is another raw identity (same key).
    msgs = [orjson.dumps({"metric": "m", "labels": {"host": "a", "x": ""}, "time": 180.0, "value": 1.0}),
            orjson.dumps({"metric": "m", "labels": {"x": "", "host": "b"}, "time": 180.0, "value": 1.0})]
    batch, _, _ = decode_json_messages(msgs, str, cache=cache)
    eng.ingest(batch)
    cache.settle(eng.table.knows)
    assert len(cache.raw) == 5 > cache.limit
    ingest(["a"], 240.0)  # the next batch starts by clearing the over-full cache
    assert list(cache.raw.values()) == ['m{host="a"}'] and list(cache.meta) == ['m{host="a"}']


def test_remembered_unmatched_keys_are_bounded_by_characters(monkeypatch):
    monkeypatch.setattr(series_module, "UNMATCHED_CHARS", 10_000)
    eng = Engine(parse_config({"rules": [{"name": "cpu", "match": {"metric": "cpu*"}}]}))
    keys = [f"disk_{i:04d}_" + "x" * 990 for i in range(100)]
    from tests.helpers import batch

    eng.ingest(batch(keys, [0.0] * 100, [1.0] * 100))
    assert eng.counters["points_no_rule"] == 100
    assert eng.table.unmatched_chars <= 10_000 + 1000
    assert len(eng.table.unmatched) <= 11
