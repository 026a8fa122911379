"""Engine-only throughput and state size, and the same workload through river for comparison.

Prints: points/s through ``Engine.ingest`` for 10,000 series at 1-minute steps (points already
decoded, one step of every series per batch, as the daemon sees them), array state bytes per
series, and river's PredictiveAnomalyDetection over HoltWinters (one model per series) on a
subset, with the per-point ratio. Run: ``python benchmarks/engine_throughput.py [--steps N]``.
Not a test: it measures and prints.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch


def engine_run(n_series: int, n_steps: int, seed: int = 0, recent_steps: int | None = None,
               mute: str = "none") -> tuple[float, int, Engine]:
    rng = np.random.default_rng(seed)
    keys = [f'requests{{host="h{i:05d}"}}' for i in range(n_series)]
    series = {k: ("requests", (("host", k[15:-2]),)) for k in keys}
    base = rng.uniform(10, 1000, n_series)
    # --mute: "none" (no table), "idle" (one mute of another service over the whole run: the
    # matcher runs once per series, no step is muted) or "half" (half the hosts muted, learn false)
    mutes = {"none": [],
             "idle": [{"match": {"labels": {"service": "other"}}, "start": 0, "end": 4e9}],
             "half": [{"match": {"labels": {"host": {"regex": "h[0-9]{4}[02468]"}}},
                       "start": 0, "end": 4e9}]}[mute]
    raw: dict = {"rules": [{"name": "bench", "step": "60s", "warmup": "30 steps"}], "mutes": mutes}
    if recent_steps is not None:  # engine.recent_steps (the series-band ring); None: the default
        raw["engine"] = {"recent_steps": recent_steps}
    eng = Engine(parse_config(raw))
    # Aligned to a step: every batch holds exactly one step of every series. (An unaligned start
    # spreads each batch over two steps; under one clock per engine that made two thirds of the
    # points late, so the old figures measured mostly dropped points.)
    t0 = 1.7e9 - 1.7e9 % 60
    elapsed = 0.0
    for s in range(n_steps):
        t = np.full(n_series, t0 + s * 60.0) + rng.uniform(0, 59, n_series)
        y = base * (1 + 0.2 * np.sin(2 * np.pi * s / 1440)) + rng.normal(0, 1, n_series)
        batch = PointBatch(keys, t, y, series)
        start = time.perf_counter()
        eng.ingest(batch)
        elapsed += time.perf_counter() - start
    return elapsed, n_series * n_steps, eng


def river_run(n_series: int, n_steps: int, seed: int = 0) -> tuple[float, int]:
    from river import anomaly, time_series

    rng = np.random.default_rng(seed)
    models = [anomaly.PredictiveAnomalyDetection(
        time_series.HoltWinters(alpha=0.3, beta=0.1, gamma=0.6, seasonality=60), horizon=1, n_std=3.0,
        warmup_period=30) for _ in range(n_series)]
    base = rng.uniform(10, 1000, n_series)
    start = time.perf_counter()
    for s in range(n_steps):
        y = (base * (1 + 0.2 * np.sin(2 * np.pi * s / 1440)) + rng.normal(0, 1, n_series)).tolist()
        for m, v in zip(models, y, strict=True):
            if s >= 60:  # HoltWinters needs one season before it can forecast
                m.score_one(None, v)
            m.learn_one(None, v)
    return time.perf_counter() - start, n_series * n_steps


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=300)
    ap.add_argument("--river-series", type=int, default=200)
    ap.add_argument("--river-steps", type=int, default=600)
    ap.add_argument("--recent-steps", type=int, default=None,
                    help="engine.recent_steps (0: no series-band ring; default: the config default)")
    ap.add_argument("--mute", choices=("none", "idle", "half"), default="none")
    args = ap.parse_args()
    secs, points, eng = engine_run(args.series, args.steps, recent_steps=args.recent_steps, mute=args.mute)
    ours = points / secs
    print(f"engine: {points:,} points over {args.series:,} series in {secs:.2f} s "
          f"= {ours:,.0f} points/s ({1e9 / ours:.0f} ns/point)")
    print(f"late:   {eng.counters['points_late']:,} points dropped as late "
          f"({eng.counters['steps_closed']:,} steps closed, {eng.counters['steps_muted']:,} muted)")
    print(f"state:  {eng.state_bytes_per_series()} bytes of arrays per series "
          f"({eng.stats()['series_active']:,} series active)")
    print(f"rss:    {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB peak")
    rsecs, rpoints = river_run(args.river_series, args.river_steps)
    theirs = rpoints / rsecs
    print(f"river:  {rpoints:,} points over {args.river_series} series in {rsecs:.2f} s "
          f"= {theirs:,.0f} points/s ({1e6 / theirs:.1f} us/point)")
    print(f"ratio:  streamdet is {ours / theirs:.1f}x river per point")


if __name__ == "__main__":
    main()
