"""Warm-start speed from files: points per second from reading a JSON-lines history to durable
checkpoints (decode, engine, snapshot, fsync), with no broker (fixed partition offsets).

Data: a fictional fleet of ``--series`` gauges with a daily shape and noise, one point per
``--step`` seconds over ``--days`` days. Prints the figures; not a test.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import orjson

from streamdet.config import parse_config
from streamdet.daemon.state_store import LocalStateStore
from streamdet.warm import warm_from_files


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=200)
    ap.add_argument("--days", type=float, default=14)
    ap.add_argument("--step", type=float, default=300)
    ap.add_argument("--partitions", type=int, default=4)
    args = ap.parse_args()
    rng = np.random.default_rng(7)
    t0 = 1_767_225_600.0  # 2026-01-01
    times = t0 + np.arange(0, args.days * 86400, args.step)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "history.jsonl"
        started = time.perf_counter()
        with open(path, "wb") as fh:
            for t in times:
                daily = 50 + 20 * np.sin(2 * np.pi * (t % 86400) / 86400)
                values = daily + rng.normal(0, 3, args.series)
                fh.write(b"".join(orjson.dumps({"metric": "bench_gauge", "labels": {"unit": f"u{i}"},
                                                "time": float(t), "value": float(v)}) + b"\n"
                                  for i, v in enumerate(values)))
        written = time.perf_counter() - started
        cfg = parse_config({"rules": [{"name": "g", "step": f"{int(args.step)}s"}]})
        store = LocalStateStore(Path(d) / "state")
        res = warm_from_files(cfg, [path], store=store, topic="metrics",
                              offsets=dict.fromkeys(range(args.partitions), 0), now=time.time() + 1e9)
        size = path.stat().st_size
    print(f"history: {args.series} series x {len(times)} points = {res.points:,} points, "
          f"{size / 1e6:.1f} MB JSON lines (written in {written:.1f} s)")
    print(f"warm start: {res.seconds:.2f} s -> {res.points_per_second:,.0f} points/s "
          f"({args.partitions} partitions, checkpoints included)")


if __name__ == "__main__":
    main()
