"""Snapshot and restore time and size at 10k / 100k / 200k series.

Builds an engine holding N series with realistic labels (six labels, keys of ~140 characters),
lets every series learn a few steps, then times: the copy part of a snapshot (on the daemon's
loop thread: ``Engine.snapshot_parts()``), the encode part (``encode_snapshot(parts)``, can run
in a background thread), the whole ``Engine.snapshot()``, and ``Engine.restore``. On a build
without the split API only the whole snapshot is timed. Each figure is the best wall / best CPU time of ``--repeat``.
Run: ``python benchmarks/snapshot_speed.py [--series 10000,100000,200000]``. Not a test.
"""

from __future__ import annotations

import argparse
import gc
import time

import numpy as np

from streamdet.config import parse_config
from streamdet.core import engine as engine_module
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch, series_key

CONFIG = {"rules": [{"name": "bench", "step": "60s", "warmup": "30 steps"}],
          "series": {"max_series": 1_000_000}}


def realistic_series(n: int) -> tuple[list[str], dict]:
    """Keys and (metric, labels) like a Kubernetes service's request metrics (fictional names)."""
    keys, meta = [], {}
    for i in range(n):
        labels = (("cluster", f"eu-west-{i % 3}"), ("container", "checkout-api"),
                  ("instance", f"10.{(i >> 16) & 255}.{(i >> 8) & 255}.{i & 255}:9102"),
                  ("method", ("GET", "POST", "PUT")[i % 3]),
                  ("namespace", "shop-prod"), ("pod", f"checkout-api-7d9f8c6b5-{i:07x}"))
        key = series_key("http_server_requests_seconds_count", labels)
        keys.append(key)
        meta[key] = ("http_server_requests_seconds_count", labels)
    return keys, meta


def build(n: int, steps: int) -> Engine:
    rng = np.random.default_rng(0)
    keys, meta = realistic_series(n)
    eng = Engine(parse_config(CONFIG))
    base = rng.uniform(10, 1000, n)
    for s in range(steps):
        t = 1.7e9 + s * 60.0 + rng.uniform(0, 59, n)
        eng.ingest(PointBatch(keys, t, base + rng.normal(0, 1, n), meta))
    return eng


def best(fn, repeat: int) -> tuple[str, object]:
    """Best wall and best CPU time of ``repeat`` runs (CPU time is steadier on a busy machine)."""
    wall, cpu, out = [], [], None
    for _ in range(repeat):
        out = None
        gc.collect()
        w0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        wall.append(time.perf_counter() - w0)
        cpu.append(time.process_time() - c0)
    return f"{min(wall) * 1e3:6.0f}/{min(cpu) * 1e3:<6.0f}", out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", default="10000,100000,200000")
    ap.add_argument("--steps", type=int, default=5)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    split = hasattr(Engine, "snapshot_parts")
    config = parse_config(CONFIG)
    print(f"snapshot version {engine_module.SNAPSHOT_VERSION}; split API: {split}; "
          "times in ms as wall/cpu, best of each")
    for n in [int(x) for x in args.series.split(",")]:
        eng = build(n, args.steps)
        line = f"{n:>8,} series:"
        if split:
            copy_s, parts = best(eng.snapshot_parts, args.repeat)
            encode_s, _ = best(lambda p=parts: engine_module.encode_snapshot(p), args.repeat)
            line += f" copy {copy_s} encode {encode_s}"
            del parts
        whole_s, blob = best(eng.snapshot, args.repeat)
        restore_s, back = best(lambda b=blob: Engine.restore(config, b), args.repeat)
        assert back.stats()["series_active"] == n
        print(f"{line} snapshot {whole_s} restore {restore_s} "
              f"{len(blob) / 1e6:6.1f} MB ({len(blob) / n:,.0f} B/series)", flush=True)
        del eng, blob, back


if __name__ == "__main__":
    main()
