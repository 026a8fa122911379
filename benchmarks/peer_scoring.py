"""Peer-group scoring speed: modified z-scores per step and DBSCAN over member windows. Prints.

    python benchmarks/peer_scoring.py [--repeat 20]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from streamdet.core.peers import modified_z, shape_outliers


def per_step(n_groups: int, members: int, repeat: int, rng: np.random.Generator) -> None:
    seg = np.repeat(np.arange(n_groups), members)
    seg = seg[rng.permutation(seg.shape[0])]  # members arrive in any order
    x = rng.lognormal(5, 0.3, seg.shape[0])
    modified_z(x, seg, n_groups)  # warm-up
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        modified_z(x, seg, n_groups)
        times.append(time.perf_counter() - t0)
    best, med = min(times), float(np.median(times))
    pts = seg.shape[0]
    print(f"modified z, {n_groups:,} groups x {members:,} members ({pts:,} points): "
          f"{med * 1e3:.2f} ms per step (best {best * 1e3:.2f}), {pts / med / 1e6:.2f} M points/s")


def dbscan_time(members: int, window: int, repeat: int, rng: np.random.Generator) -> None:
    t = np.arange(window)
    w = 100 + 30 * np.sin(2 * np.pi * t / window) + rng.normal(0, 3, (members, window))
    w[:5] += 40
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        r = shape_outliers(w, 4)
        times.append(time.perf_counter() - t0)
    print(f"DBSCAN shape outliers, {members:,} members x {window}-step windows: "
          f"{np.median(times) * 1e3:.0f} ms (best {min(times) * 1e3:.0f}); "
          f"clusters {r.cluster_sizes[:3]}, outside {int(r.outside.sum())}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=20)
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    per_step(1000, 50, args.repeat, rng)
    per_step(1, 5000, args.repeat, rng)
    dbscan_time(2000, 60, max(3, args.repeat // 5), rng)


if __name__ == "__main__":
    main()
