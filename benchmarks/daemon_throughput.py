"""Daemon throughput against the local broker, compared with a bare consume + decode loop.

Prints, in one run: points/s of (a) a bare confluent-kafka consume + decode loop and
(b) the daemon over the same topic, their ratio, the p50/p99 delay from a step's close to its
event's delivery acknowledgement, peak RSS, and RSS with 100,000 active series (engine only).

``--format json`` (default): one JSON point per message, bare loop = consume + ``orjson.loads``.
``--format otlp_proto``: OTLP protobuf requests of ``--points-per-request`` (100) gauge points,
as a Collector's Kafka exporter sends them; the bare loop is consume + protobuf parse, and a
second bare loop also reads every point's time, value and attributes (the least any consumer
does to get the points out). Several formats in one run: ``--format json otlp_proto``.
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
from streamdet.codecs.otlp import ExportMetricsServiceRequest, encode_gauges
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.consumer import Daemon
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import parse_settings
from tests.integration.kafka import Broker

BATCH = 20000


def rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def produce(bootstrap: str, topic: str, n_series: int, n_steps: int, spike_every: int,
            fmt: str = "json", per_request: int = 100) -> tuple[int, int]:
    """Points of ``n_series`` series over ``n_steps`` one-minute steps; (points, messages)."""
    p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 50, "batch.num.messages": 10000,
                  "queue.buffering.max.messages": 500000})
    rng = np.random.default_rng(0)
    t0 = time.time() - n_steps * 60 - 120
    n = messages = 0

    def send(key: bytes, value: bytes) -> None:
        while True:
            try:
                p.produce(topic, key=key, value=value)
                return
            except BufferError:
                p.poll(0.05)

    for s in range(n_steps):
        vals = rng.normal(100, 1, n_series)
        if s > n_steps // 2:  # a burst of breaches late in the run, to measure delivery delay
            vals[::spike_every] += 50
        docs = [{"metric": "bench", "labels": {"host": f"h{i}"}, "time": t0 + s * 60 + 1, "value": float(vals[i])}
                for i in range(n_series)]
        if fmt == "json":
            for i, doc in enumerate(docs):
                send(f"h{i}".encode(), orjson.dumps(doc))
            messages += len(docs)
        else:  # the same hosts share a request every step, so a series stays on one partition
            for c in range(0, n_series, per_request):
                send(f"c{c}".encode(), encode_gauges(docs[c:c + per_request]))
                messages += 1
        n += len(docs)
    assert p.flush(60) == 0
    return n, messages


def _parse_otlp(data: bytes) -> int:
    req = ExportMetricsServiceRequest()
    req.ParseFromString(data)
    return sum(len(m.gauge.data_points) for rm in req.resource_metrics for sm in rm.scope_metrics
               for m in sm.metrics)


def _read_otlp(data: bytes) -> int:
    req = ExportMetricsServiceRequest()
    req.ParseFromString(data)
    n = 0
    for rm in req.resource_metrics:
        for sm in rm.scope_metrics:
            for m in sm.metrics:
                name = m.name
                for dp in m.gauge.data_points:
                    _ = (name, dp.time_unix_nano, dp.as_double,
                         tuple((kv.key, kv.value.string_value) for kv in dp.attributes))
                    n += 1
    return n


def _read_json(data: bytes) -> int:
    orjson.loads(data)
    return 1


BARE_DECODERS = {"json": _read_json, "otlp_parse": _parse_otlp, "otlp_read": _read_otlp}


def bare_loop(bootstrap: str, topic: str, total: int, decode=_read_json, max_seconds: float = 600.0) -> float:
    """Points/s of consume + ``decode`` (which returns the points in a message) over the topic."""
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": f"bare-{uuid.uuid4()}",
                  "auto.offset.reset": "earliest", "enable.auto.commit": False, "session.timeout.ms": 6000})
    c.subscribe([topic])
    got = 0
    start = None
    deadline = time.monotonic() + max_seconds
    while got < total:
        if time.monotonic() > deadline:
            c.close()
            raise RuntimeError(f"bare loop: {got:,} of {total:,} points after {max_seconds:g} s")
        msgs = c.consume(5000, 1.0)
        if msgs and start is None:
            start = time.perf_counter()
        for m in msgs:
            if m.error() is None:
                got += decode(m.value())
    secs = time.perf_counter() - start
    c.close()
    return total / secs


def daemon_run(bootstrap: str, topic: str, total: int, state_dir: str, fmt: str = "json",
               max_seconds: float = 600.0, batch_size: int = BATCH) -> tuple[float, Metrics]:
    """Points/s of the daemon over the topic, counted from the end of its first batch (the points
    of that batch are left out of the rate, so it covers the same work it times)."""
    cfg = parse_config({"rules": [{"name": "b", "step": "60s", "warmup": "10 steps"}],
                        "input": {"format": fmt},
                        "kafka": {"bootstrap_servers": bootstrap, "group_id": f"d-{uuid.uuid4()}",
                                  "input_topics": [topic], "output_topic": f"{topic}-out",
                                  "dead_letter_topic": None, "session_timeout": "6s",
                                  "checkpoint_interval": "5s", "batch_size": batch_size},
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
    first = get("streamdet_records_in_total")
    while (get("streamdet_records_in_total") or 0) < total:
        if time.perf_counter() - start > max_seconds:
            d.stop()
            th.join(30)
            raise RuntimeError(f"daemon: {get('streamdet_records_in_total'):,.0f} of {total:,} points "
                               f"after {max_seconds:g} s")
        time.sleep(0.05)
    secs = time.perf_counter() - start
    bad = sum(x.value for fam in metrics.registry.collect() for x in fam.samples
              if x.name == "streamdet_records_bad_total")
    if bad:
        print(f"  ({bad:.0f} records refused)")
    time.sleep(2)
    d.stop()
    th.join(30)
    if first >= total:
        print("  (every point was in the daemon's first batch: no rate; give more --series or --steps)")
        return float("nan"), metrics
    return (total - first) / secs, metrics


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


def run_format(broker: Broker, fmt: str, args: argparse.Namespace) -> dict[str, float]:
    """Produce, run the bare loop(s) and the daemon for one input format; print and return figures."""
    import tempfile

    topic = f"bench-{uuid.uuid4().hex[:6]}"
    broker.create_topics(topic, f"{topic}-out")
    total, messages = produce(broker.bootstrap, topic, args.series, args.steps, spike_every=50,
                              fmt=fmt, per_request=args.points_per_request)
    # the same number of points per consume call for every format
    batch = BATCH if fmt == "json" else max(1, BATCH // args.points_per_request)
    print(f"\n[{fmt}] produced {total:,} points in {messages:,} messages over {args.series:,} series "
          f"(daemon batch size {batch:,} messages, about {batch * total // messages:,} points)")
    bares = {"json": [("consume + orjson.loads", "json")],
             "otlp_proto": [("consume + protobuf parse", "otlp_parse"),
                            ("consume + parse + read every point", "otlp_read")]}[fmt]
    figures: dict[str, float] = {}
    for label, name in bares:
        figures[name] = bare_loop(broker.bootstrap, topic, total, BARE_DECODERS[name], args.max_seconds)
        print(f"bare {label}: {figures[name]:,.0f} points/s")
    with tempfile.TemporaryDirectory() as state:
        ours, metrics = daemon_run(broker.bootstrap, topic, total, state, fmt, args.max_seconds, batch)
    figures["daemon"] = ours
    print(f"daemon: {ours:,.0f} points/s  (ratio " + ", ".join(
        f"{ours / figures[name]:.2f} of bare {label}" for label, name in bares) + ")")
    p50 = quantile_from_histogram(metrics, "streamdet_step_close_to_delivery_seconds", 0.5)
    p99 = quantile_from_histogram(metrics, "streamdet_step_close_to_delivery_seconds", 0.99)
    n_events = sum(metrics.registry.get_sample_value("streamdet_events_out_total", {"type": t}) or 0
                   for t in ("streamdet.breach.opened", "streamdet.breach.closed"))
    print(f"step close -> delivery ack: p50 <= {p50} s, p99 <= {p99} s (histogram bucket bounds, "
          f"{n_events:.0f} events)")
    hist = [(float(x.labels["le"]), int(x.value)) for fam in metrics.registry.collect() for x in fam.samples
            if x.name == "streamdet_step_close_to_delivery_seconds_bucket"]
    print("  cumulative counts by bucket:", ", ".join(f"<={le:g}s: {n}" for le, n in sorted(hist)))
    return figures


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=30)
    ap.add_argument("--format", nargs="+", choices=("json", "otlp_proto"), default=["json"],
                    help="input format(s), each on its own topic of the same broker")
    ap.add_argument("--points-per-request", type=int, default=100, help="OTLP points per message")
    ap.add_argument("--max-seconds", type=float, default=600.0, help="bound on each measured loop")
    ap.add_argument("--no-rss", action="store_true", help="skip the 100,000-series RSS figure")
    args = ap.parse_args()
    broker = Broker().start()
    results = {}
    try:
        for fmt in args.format:
            results[fmt] = run_format(broker, fmt, args)
        print(f"\npeak RSS (this process, daemon + benchmark): {rss_mib():.0f} MiB")
    finally:
        broker.stop()
    if len(results) > 1:
        print("summary: " + "; ".join(
            f"{fmt}: daemon {f['daemon']:,.0f} points/s, ratio "
            + ", ".join(f"{f['daemon'] / v:.2f} vs {k}" for k, v in f.items() if k != "daemon")
            for fmt, f in results.items()))
    if args.no_rss:
        return
    mib, active = rss_with_series(100_000)
    eng = Engine(parse_config({}))
    print(f"100,000 active series (engine only): peak RSS {mib:.0f} MiB for {active:,} series; "
          f"{eng.state_bytes_per_series()} bytes of array state per series")


if __name__ == "__main__":
    main()
