"""Wall time of a 16-combination sweep: all combinations in one engine vs one engine each.

Run: ``python benchmarks/sweep_speed.py [--series 500] [--days 28] [--jobs 1]``. Generates
series on the fly (5-minute steps, a daily cycle plus noise, the fictional "Larkspur Valley
Cycles" docks of benchmarks/corpus.py) and times ``streamdet.evaluate.run_all`` over
width=2,3,4,5 x confirm.steps=3,5 x clear.steps=3,6. Not a test: it measures and prints.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from streamdet.core.points import PointBatch
from streamdet.evaluate import combination_config, parse_sweep, prepare, run_all, sweep_config

SWEEP = ["width=2,3,4,5", "confirm.steps=3,5", "clear.steps=3,6"]
CONFIG = {"rules": [{"name": "docks", "step": "5m"}]}


def points(n_series: int, days: int, seed: int = 0) -> PointBatch:
    rng = np.random.default_rng(seed)
    n = days * 288
    t = 1.55e9 + np.arange(n) * 300.0
    base = rng.uniform(5, 50, n_series)
    y = base[None, :] * (1 + 0.4 * np.sin(2 * np.pi * t[:, None] / 86400)) + rng.normal(0, 1, (n, n_series))
    keys = [f'docks_free{{dock="d{i:04d}"}}' for i in range(n_series)]
    series = {k: ("docks_free", (("dock", f"d{i:04d}"),)) for i, k in enumerate(keys)}
    return PointBatch(keys * n, np.repeat(t, n_series), y.ravel(), series)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=500)
    ap.add_argument("--days", type=int, default=28)
    ap.add_argument("--jobs", type=int, default=1)
    args = ap.parse_args()
    pts = points(args.series, args.days)
    combos = parse_sweep(SWEEP)
    print(f"{args.series} series x {args.days} days of 5-minute steps = {len(pts):,} points; "
          f"{len(combos)} combinations; jobs={args.jobs}")
    start = time.perf_counter()
    swept = run_all(prepare(pts, combos), sweep_config(CONFIG, combos), args.jobs)
    one_engine = time.perf_counter() - start
    print(f"one engine, all combinations: {one_engine:8.1f} s  ({len(combos) * len(pts) / one_engine:,.0f} points/s)")
    start = time.perf_counter()
    plain = prepare(pts, parse_sweep([]))
    alone = []
    for c in combos:
        found = run_all(plain, combination_config(CONFIG, c), args.jobs)
        alone.extend((o, k, c.index, t, kind) for o, k, _i, t, kind in found)
    separate = time.perf_counter() - start
    print(f"one engine per combination:   {separate:8.1f} s  ({len(combos) * len(pts) / separate:,.0f} points/s)")
    print(f"ratio {separate / one_engine:.2f}x; same openings: {sorted(swept) == sorted(alone)} "
          f"({sum(1 for f in swept if f[0])} openings)")


if __name__ == "__main__":
    main()
