"""Rebalance pause with the Kafka state store: a partition and its learned state move to another daemon.

Two daemons in one consumer group (threads of this process, ``state.store: kafka``), one input
partition holding ``--series`` series x ``--steps`` steps. The first owns the partition; the
second idles. The first is then stopped (revoke: events flushed, snapshot chunked into the state
topic, offsets committed); a few new points are produced once it has left; the pause is from the
stop to the first batch the new owner processes (its ``points_accepted`` moving), split into the
old owner's checkpoint and leave, the group's reassignment, and the new owner's restore (reading
the state topic to the end of the partition, checking the checksum, ``Engine.restore``). Also
prints the state-topic bytes of one checkpoint and what that writes per minute at a checkpoint
interval. Both daemons share this process's two cores and the GIL, and the broker is the bundled
one (memory only), so read the figures as an upper bound for a pair of real instances.
Run: ``python benchmarks/rebalance_pause.py [--series 100000 --steps 3]``. Not a test.
"""

from __future__ import annotations

import argparse
import resource
import sys
import threading
import time
import uuid
from pathlib import Path

import orjson
from confluent_kafka import Producer
from prometheus_client import CollectorRegistry

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from streamdet.config import parse_config
from streamdet.daemon.consumer import Daemon
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import parse_settings
from tests.integration.kafka import Broker

PER_MESSAGE = 100  # points per JSON-array message, so set-up spends its time in the engine


def produce(bootstrap: str, topic: str, n_series: int, steps: range, t0: float, only: int | None = None) -> int:
    p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20, "queue.buffering.max.messages": 500000})
    n = 0
    count = n_series if only is None else only
    for s in steps:
        t = t0 + s * 60 + 1
        for lo in range(0, count, PER_MESSAGE):
            docs = [{"metric": "bench", "labels": {"host": f"h{i:06d}", "dc": "north"}, "time": t,
                     "value": 100.0 + (i % 17) + (s % 3)} for i in range(lo, min(count, lo + PER_MESSAGE))]
            while True:
                try:
                    p.produce(topic, value=orjson.dumps(docs), partition=0)
                    break
                except BufferError:
                    p.poll(0.05)
            n += len(docs)
    assert p.flush(120) == 0
    return n


def make(bootstrap: str, topic: str, group: str, state_topic: str, interval: float) -> tuple[Daemon, Metrics]:
    cfg = parse_config({"rules": [{"name": "b", "step": "60s"}],
                        "kafka": {"bootstrap_servers": bootstrap, "group_id": group, "input_topics": [topic],
                                  "output_topic": f"{topic}-out", "dead_letter_topic": None,
                                  "session_timeout": "6s", "checkpoint_interval": f"{interval}s",
                                  "poll_timeout": "0.2s"},
                        "state": {"store": "kafka", "topic": state_topic, "dir": f"/tmp/rebalance-{group}"},
                        "health": {"address": "127.0.0.1:0"}})
    metrics = Metrics(CollectorRegistry())
    return Daemon(cfg, parse_settings(cfg), metrics=metrics), metrics


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--steps", type=int, default=3)
    ap.add_argument("--interval", type=float, default=10.0, help="checkpoint interval for the per-minute figure")
    args = ap.parse_args()
    broker = Broker().start()
    try:
        topic = f"rb-{uuid.uuid4().hex[:6]}"
        broker.create_topics(topic)
        group, state_topic = f"g-{uuid.uuid4().hex[:6]}", f"{topic}-state"
        t0 = time.time() - (args.steps + 5) * 60
        began = time.monotonic()
        total = produce(broker.bootstrap, topic, args.series, range(args.steps), t0)
        print(f"produced {total:,} points ({args.series:,} series x {args.steps} steps) in "
              f"{time.monotonic() - began:.1f} s")
        # a long interval: the old owner checkpoints once, on revoke, so the figures are that write's
        a, ma = make(broker.bootstrap, topic, group, state_topic, 3600)
        b, mb = make(broker.bootstrap, topic, group, state_topic, 3600)
        ta = threading.Thread(target=a.run, kwargs={"install_signals": False}, daemon=True)
        ta.start()
        get_a, get_b = ma.registry.get_sample_value, mb.registry.get_sample_value
        deadline = time.monotonic() + 600
        while (get_a("streamdet_records_in_total") or 0) < total and time.monotonic() < deadline:
            time.sleep(0.2)
        print(f"old owner: {get_a('streamdet_records_in_total'):,.0f} points in, set-up "
              f"{time.monotonic() - began:.1f} s")
        loads: list[tuple[float, float]] = []
        load = b.store.load

        def timed_load(t: str, p: int):
            s = time.monotonic()
            got = load(t, p)
            loads.append((s, time.monotonic()))
            return got

        b.store.load = timed_load
        marks: dict[str, float] = {}

        def timed(name: str, fn):
            def call(*a, **kw):
                marks.setdefault(f"{name} start", time.monotonic())
                try:
                    return fn(*a, **kw)
                finally:
                    marks[f"{name} end"] = time.monotonic()
            return call

        a.store.save = timed("save", a.store.save)
        a.checkpoint = timed("checkpoint", a.checkpoint)
        tb = threading.Thread(target=b.run, kwargs={"install_signals": False}, daemon=True)
        tb.start()
        while (b.consumer is None or not b._connected) and time.monotonic() < deadline:
            time.sleep(0.2)
        time.sleep(8)  # the second instance has joined (and idles: one partition)
        written_before = a.store.bytes_written
        stop = time.monotonic()
        a.stop()
        ta.join(300)
        left = time.monotonic()
        written = a.store.bytes_written - written_before
        produce(broker.bootstrap, topic, args.series, range(args.steps, args.steps + 1), t0, only=1000)
        while not get_b("streamdet_points_accepted_total") and time.monotonic() < deadline:
            time.sleep(0.01)
        first = time.monotonic()
        restore = (loads[0][1] - loads[0][0]) if loads else float("nan")
        snap = b.parts[(topic, 0)].engine.snapshot() if (topic, 0) in b.parts else b""
        print(f"rebalance pause (old owner stopped -> first batch of the new owner): {first - stop:.1f} s")
        print(f"  old owner: checkpoint to the state topic and leave the group {left - stop:.1f} s "
              f"(loop exit {marks['checkpoint start'] - stop:.1f} s, snapshot "
              f"{marks['save start'] - marks['checkpoint start']:.1f} s, chunks and manifest written and "
              f"acknowledged {marks['save end'] - marks['save start']:.1f} s, sink and consumer closed "
              f"{left - marks['checkpoint end']:.1f} s)")
        if loads:
            print(f"  group reassignment until the new owner starts loading {loads[0][0] - left:.1f} s")
            print(f"  new owner: read the state topic, verify, restore {restore:.1f} s")
            print(f"  new owner: first batch after restore {first - loads[0][1]:.1f} s")
        print(f"series moved: {b.parts[(topic, 0)].engine.stats()['series_active']:,}; snapshot "
              f"{len(snap) / 1e6:.1f} MB ({len(snap) / max(1, args.series):,.0f} bytes per series)")
        per_min = written * 60 / args.interval
        print(f"state topic bytes of one checkpoint: {written / 1e6:.1f} MB (chunks + manifest + tombstones); "
              f"at a checkpoint every {args.interval:g} s: {per_min / 1e9:.2f} GB per minute per partition "
              f"of this size; every 60 s: {written / 1e9:.2f} GB per minute")
        print(f"peak RSS of this process (both daemons): "
              f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:,.0f} MiB")
        b.stop()
        tb.join(120)
    finally:
        broker.stop()


if __name__ == "__main__":
    main()
