"""Daemon throughput against the local broker, compared with a bare consume + decode loop.

Prints, in one run: points/s of (a) a bare confluent-kafka consume + orjson decode loop and
(b) the daemon over the same topic, their ratio, the p50/p99 delay from a step's close to its
event's delivery acknowledgement, peak RSS, and RSS with 100,000 active series (engine only).
Run: ``python benchmarks/daemon_throughput.py [--series 10000 --steps 30]``. Not a test.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import numpy as np
import orjson
from confluent_kafka import Consumer, Producer
from prometheus_client import CollectorRegistry

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.consumer import Daemon
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import parse_settings
from tests.integration.kafka import Broker

BATCH = 20000


def rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def produce(bootstrap: str, topic: str, n_series: int, n_steps: int, spike_every: int) -> int:
    p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 50, "batch.num.messages": 10000,
                  "queue.buffering.max.messages": 500000})
    rng = np.random.default_rng(0)
    t0 = time.time() - n_steps * 60 - 120
    n = 0
    for s in range(n_steps):
        vals = rng.normal(100, 1, n_series)
        if s > n_steps // 2:  # a burst of breaches late in the run, to measure delivery delay
            vals[::spike_every] += 50
        for i in range(n_series):
            doc = {"metric": "bench", "labels": {"host": f"h{i}"}, "time": t0 + s * 60 + 1, "value": float(vals[i])}
            while True:
                try:
                    p.produce(topic, key=f"h{i}".encode(), value=orjson.dumps(doc))
                    break
                except BufferError:
                    p.poll(0.05)
            n += 1
    assert p.flush(60) == 0
    return n


def bare_loop(bootstrap: str, topic: str, total: int) -> float:
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": f"bare-{uuid.uuid4()}",
                  "auto.offset.reset": "earliest", "enable.auto.commit": False, "session.timeout.ms": 6000})
    c.subscribe([topic])
    got = 0
    start = None
    while got < total:
        msgs = c.consume(5000, 1.0)
        if msgs and start is None:
            start = time.perf_counter()
        for m in msgs:
            if m.error() is None:
                orjson.loads(m.value())
                got += 1
    secs = time.perf_counter() - start
    c.close()
    return total / secs


def daemon_run(bootstrap: str, topic: str, total: int, state_dir: str) -> tuple[float, Metrics]:
    cfg = parse_config({"rules": [{"name": "b", "step": "60s", "warmup": "10 steps"}],
                        "kafka": {"bootstrap_servers": bootstrap, "group_id": f"d-{uuid.uuid4()}",
                                  "input_topics": [topic], "output_topic": f"{topic}-out",
                                  "dead_letter_topic": None, "session_timeout": "6s",
                                  "checkpoint_interval": "5s", "batch_size": BATCH},
                        "state": {"dir": state_dir}, "health": {"address": "127.0.0.1:0"}})
    metrics = Metrics(CollectorRegistry())
    d = Daemon(cfg, parse_settings(cfg), metrics=metrics)
    th = threading.Thread(target=d.run, kwargs={"install_signals": False}, daemon=True)
    th.start()
    get = metrics.registry.get_sample_value
    # Poll sparingly: collecting the registry holds the GIL and would slow the daemon down.
    while not get("streamdet_records_in_total"):
        time.sleep(0.005)
    start = time.perf_counter()
    while (get("streamdet_records_in_total") or 0) < total:
        time.sleep(0.05)
    secs = time.perf_counter() - start
    time.sleep(2)
    d.stop()
    th.join(30)
    return total / secs, metrics


def quantile_from_histogram(metrics: Metrics, name: str, q: float) -> float | None:
    buckets = []
    for fam in metrics.registry.collect():
        for s in fam.samples:
            if s.name == f"{name}_bucket":
                buckets.append((float(s.labels["le"]), s.value))
    buckets.sort()
    total = buckets[-1][1] if buckets else 0
    if not total:
        return None
    for le, count in buckets:
        if count >= q * total:
            return le
    return None


def rss_with_series(n: int) -> tuple[float, int]:
    code = (
        "import numpy as np, resource\n"
        "from streamdet.config import parse_config\nfrom streamdet.core.engine import Engine\n"
        "from streamdet.core.points import PointBatch\n"
        f"n={n}\nkeys=[f'bench{{{{host=\"h{{i}}\"}}}}' for i in range(n)]\n"
        "series={k: ('bench', (('host', k[12:-2]),)) for k in keys}\n"
        "e=Engine(parse_config({'rules':[{'name':'b','warmup':'5 steps'}]}))\n"
        "for s in range(20): e.ingest(PointBatch(keys, np.full(n, 1.7e9+s*60.0), np.random.normal(size=n), series))\n"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, e.stats()['series_active'])\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    kib, active = out.split()
    return int(kib) / 1024, int(active)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=30)
    args = ap.parse_args()
    broker = Broker().start()
    try:
        topic = f"bench-{uuid.uuid4().hex[:6]}"
        broker.create_topics(topic, f"{topic}-out")
        total = produce(broker.bootstrap, topic, args.series, args.steps, spike_every=50)
        print(f"produced {total:,} points over {args.series:,} series (daemon batch size {BATCH:,})")
        bare = bare_loop(broker.bootstrap, topic, total)
        print(f"bare consume + decode: {bare:,.0f} points/s")
        import tempfile

        with tempfile.TemporaryDirectory() as state:
            ours, metrics = daemon_run(broker.bootstrap, topic, total, state)
        print(f"daemon:                {ours:,.0f} points/s  (ratio {ours / bare:.2f} of the bare loop)")
        p50 = quantile_from_histogram(metrics, "streamdet_step_close_to_delivery_seconds", 0.5)
        p99 = quantile_from_histogram(metrics, "streamdet_step_close_to_delivery_seconds", 0.99)
        n_events = sum(metrics.registry.get_sample_value("streamdet_events_out_total", {"type": t}) or 0
                       for t in ("streamdet.breach.opened", "streamdet.breach.closed"))
        print(f"step close -> delivery ack: p50 <= {p50} s, p99 <= {p99} s (histogram bucket bounds, "
              f"{n_events:.0f} events)")
        hist = [(float(x.labels["le"]), int(x.value)) for fam in metrics.registry.collect() for x in fam.samples
                if x.name == "streamdet_step_close_to_delivery_seconds_bucket"]
        print("  cumulative counts by bucket:", ", ".join(f"<={le:g}s: {n}" for le, n in sorted(hist)))
        print(f"peak RSS (this process, daemon + benchmark): {rss_mib():.0f} MiB")
    finally:
        broker.stop()
    mib, active = rss_with_series(100_000)
    eng = Engine(parse_config({}))
    print(f"100,000 active series (engine only): peak RSS {mib:.0f} MiB for {active:,} series; "
          f"{eng.state_bytes_per_series()} bytes of array state per series")


if __name__ == "__main__":
    main()
