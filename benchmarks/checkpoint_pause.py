"""How long a checkpoint stops the consume loop, at 200,000 series: before and after.

Before: the loop itself snapshots the engine and writes the checkpoint file (fsync, rename), as
``Daemon.checkpoint`` did on every interval. After: the loop takes a cut (``frozen_copy``, what
``Daemon._begin_checkpoint`` does per changed partition) and a ``CheckpointWriter`` thread
snapshots and writes it while the loop goes on ingesting batches; the benchmark reports the cut's
pause, batch times while the writer runs (a thread competes for the GIL; a forked child for the
cores, and the first batches after a fork pay copy-on-write page faults), and the time until the
checkpoint is durable. No broker: the loop is the engine ingest the daemon runs.
Run: ``python benchmarks/checkpoint_pause.py [--series 200000 --block 20000]``. Not a test.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.daemon.checkpointer import CheckpointWriter
from streamdet.daemon.state_store import Checkpoint, LocalStateStore


class Feed:
    """Batches of one step for a block of series, block after block, step after step."""

    def __init__(self, n_series: int, block: int, seed: int = 0) -> None:
        self.rng = np.random.default_rng(seed)
        self.keys = [f'requests{{host="h{i:06d}"}}' for i in range(n_series)]
        self.series = {k: ("requests", (("host", k[15:-2]),)) for k in self.keys}
        self.base = self.rng.uniform(10, 1000, n_series)
        self.block, self.n, self.i = block, n_series, 0

    def next(self) -> PointBatch:
        blocks = -(-self.n // self.block)
        step, b = divmod(self.i, blocks)
        self.i += 1
        lo, hi = b * self.block, min(self.n, (b + 1) * self.block)
        t = 1.7e9 + step * 60.0 + self.rng.uniform(0, 59, hi - lo)
        y = self.base[lo:hi] + self.rng.normal(0, 1, hi - lo)
        return PointBatch(self.keys[lo:hi], t, y, {k: self.series[k] for k in self.keys[lo:hi]})


def ms(x: float) -> str:
    return f"{x * 1000:,.0f} ms"


def after(eng: Engine, feed: Feed, store: LocalStateStore, use_fork: bool, before: float,
          max_seconds: float) -> None:
    """A cut on the loop thread, the rest in the background while batches go on."""
    mode = "forked child" if use_fork else "thread over a pickle copy"
    writer = CheckpointWriter(store, use_fork=use_fork)
    cut = writer.start({("bench", 0): feed.i}, 0, {("bench", 0): eng})
    writer.release()  # no producer here: the cut's events count as acknowledged
    during = []
    deadline = time.monotonic() + max_seconds
    done = None
    while done is None and time.monotonic() < deadline:
        t = time.perf_counter()
        eng.ingest(feed.next())
        during.append(time.perf_counter() - t)
        done = writer.finished()
    durable = time.monotonic() - cut.started
    if done is None:
        writer.abandon()
    restored = Engine.restore(eng.config, store.load("bench", 0).snapshot)
    assert store.load("bench", 0).next_offset == cut.offsets[("bench", 0)]
    assert restored.stats()["series_active"] == eng.stats()["series_active"]
    longest = max(cut.pause, max(during))
    print(f"after ({mode}): loop paused {ms(cut.pause)} for the cut; {len(during)} batches while the "
          f"writer ran (p50 {ms(statistics.median(during))}, max {ms(max(during))}, the first "
          f"{ms(during[0])}); durable after "
          f"{durable:,.1f} s" + ("" if done is not None else " (not finished: bound reached)"))
    print(f"  longest stop of the loop: before {ms(before)}, after {ms(longest)} "
          f"({before / longest:,.1f}x shorter)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", type=int, default=200_000)
    ap.add_argument("--block", type=int, default=20_000, help="points per ingested batch")
    ap.add_argument("--steps", type=int, default=5, help="steps of every series before measuring")
    ap.add_argument("--max-seconds", type=float, default=60.0, help="bound on the background run")
    args = ap.parse_args()

    feed = Feed(args.series, args.block)
    eng = Engine(parse_config({"rules": [{"name": "bench", "step": "60s", "warmup": "30 steps"}]}))
    blocks = -(-args.series // args.block)
    for _ in range(args.steps * blocks):
        eng.ingest(feed.next())
    base = []
    for _ in range(2 * blocks):
        t = time.perf_counter()
        eng.ingest(feed.next())
        base.append(time.perf_counter() - t)
    print(f"{args.series:,} series, batches of {args.block:,} points; "
          f"batch without checkpoint p50 {ms(statistics.median(base))}, max {ms(max(base))}")

    with tempfile.TemporaryDirectory() as tmp:
        store = LocalStateStore(tmp)
        # Before: snapshot and durable write on the loop thread.
        t = time.perf_counter()
        snap = eng.snapshot()
        t_snap = time.perf_counter() - t
        store.save(Checkpoint("bench", 0, 1, snap))
        before = time.perf_counter() - t
        size = store.path("bench", 0).stat().st_size
        del snap
        print(f"before: loop paused {ms(before)} per checkpoint (snapshot {ms(t_snap)}, "
              f"write+fsync {ms(before - t_snap)}; file {size / 1e6:,.0f} MB)")

        for use_fork in (True, False):
            after(eng, feed, store, use_fork, before, args.max_seconds)
    print(f"peak RSS {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:,.0f} MiB")


if __name__ == "__main__":
    main()
