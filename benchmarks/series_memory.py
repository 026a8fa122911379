"""Memory per active series, as the daemon holds them: RSS growth per series at 10k / 100k series.

Each size runs in a fresh process: N series with realistic labels (six labels, keys of ~140
characters) arrive as one-point JSON messages through the daemon's decoder and key cache
(``decode_json_messages``, ``KeyCache`` sized by ``cache_limit``) into one ``Engine``, for a few
steps. Prints RSS growth per series, the engine's array state per series, and the key cache's
entries; then the same with ``max_series`` at a tenth of N (the refused series must cost
nothing that stays). Run: ``python benchmarks/series_memory.py [--series 10000,100000]``.
Not a test: it measures and prints.
"""

from __future__ import annotations

import argparse
import gc
import os
import subprocess
import sys

import orjson


def rss_bytes() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def messages(n: int, step: int) -> list[bytes]:
    t = 1.7e9 + 60.0 * step
    return [orjson.dumps({"metric": "http_server_requests_seconds_count", "time": t + (i % 50),
                          "value": float(i % 97 + step),
                          "labels": {"cluster": f"eu-west-{i % 3}", "container": "checkout-api",
                                     "instance": f"10.{(i >> 16) & 255}.{(i >> 8) & 255}.{i & 255}:9102",
                                     "method": ("GET", "POST", "PUT")[i % 3], "namespace": "shop-prod",
                                     "pod": f"checkout-api-7d9f8c6b5-{i:07x}"}})
            for i in range(n)]


def child(n: int, max_series: int, steps: int) -> None:
    from streamdet.codecs.json import decode_json_messages
    from streamdet.config import parse_config
    from streamdet.core import points
    from streamdet.core.engine import Engine

    eng = Engine(parse_config({"rules": [{"name": "all", "step": "60s"}],
                               "series": {"max_series": max_series}}))
    bounded = hasattr(points, "cache_limit")  # False on builds before the bounded caches
    cache = points.KeyCache(points.cache_limit(max_series)) if bounded else points.KeyCache()
    batches = [messages(n, s) for s in range(steps)]
    before = rss_bytes()
    for msgs in batches:
        for lo in range(0, n, 20_000):  # the daemon's default batch size
            batch, _bad, _ = decode_json_messages(msgs[lo:lo + 20_000], str, cache=cache)
            eng.ingest(batch)
            if bounded:
                cache.settle(eng.table.knows)
    gc.collect()
    grown = rss_bytes() - before
    active = eng.stats()["series_active"]
    print(f"{n:>8,} series in, max_series {max_series:>7,}: {active:>7,} active, RSS +{grown / 2**20:6.1f} MiB "
          f"= {grown / active:6,.0f} B per active series (arrays {eng.state_bytes_per_series():,} B); "
          f"key cache {len(cache.raw):,} raw / {len(cache.meta):,} keys "
          f"(limit {getattr(cache, 'limit', 500_000):,})", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--series", default="10000,100000")
    ap.add_argument("--steps", type=int, default=3)
    ap.add_argument("--child", nargs=3, type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(*args.child)
        return
    for n in [int(x) for x in args.series.split(",")]:
        for cap in (n, n // 10):
            subprocess.run([sys.executable, __file__, "--child", str(n), str(cap), str(args.steps)],
                           check=True)


if __name__ == "__main__":
    main()
