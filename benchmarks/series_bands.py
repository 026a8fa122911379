"""Series bands: memory per series of the recent-step ring and the band endpoint's latency.

One series with 48 h of 1-minute steps (``engine.recent_steps: 2880``) served by the health
server on 127.0.0.1; prints bytes per series (with and without the ring) and the latency of
``/series/{key}/band.svg`` and ``band.json`` (median and worst of 50 requests each).
Run: ``python benchmarks/series_bands.py``. Not a test: it measures and prints.
"""

from __future__ import annotations

import statistics
import time
import urllib.request
from urllib.parse import quote

import numpy as np
from prometheus_client import CollectorRegistry

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.daemon.health import HealthServer, Metrics
from streamdet.daemon.series_api import series_app


def main() -> None:
    key = 'latency_ms{route="/checkout",zone="b"}'
    n = 48 * 60
    eng = Engine(parse_config({"rules": [{"step": "1m", "warmup": "2h"}], "engine": {"recent_steps": n}}))
    rng = np.random.default_rng(0)
    t = 1.7e9 - 1.7e9 % 60 + np.arange(n + 1) * 60.0
    y = 120 + 30 * np.sin(2 * np.pi * t / 86400) + rng.normal(0, 4, n + 1)
    eng.ingest(PointBatch([key] * (n + 1), t, y, {key: ("latency_ms", ())}))
    off = Engine(parse_config({"engine": {"recent_steps": 0}})).state_bytes_per_series()
    for steps in (288, 576, 2880):
        with_ring = Engine(parse_config({"engine": {"recent_steps": steps}})).state_bytes_per_series()
        print(f"memory: recent_steps {steps:5d}: {with_ring:,} bytes of arrays per series "
              f"({with_ring - off:,} for the ring; {off:,} without it)")
    app = series_app(lambda: [eng])
    server = HealthServer(Metrics(CollectorRegistry()), lambda: (True, "ok"), "127.0.0.1", 0,
                          {"/series": app, "/series/": app}).start()
    try:
        for fmt in ("svg", "json"):
            url = f"http://127.0.0.1:{server.port}/series/{quote(key, safe='')}/band.{fmt}?hours=48"
            times, size = [], 0
            for _ in range(50):
                start = time.perf_counter()
                with urllib.request.urlopen(url, timeout=10) as r:
                    size = len(r.read())
                times.append(time.perf_counter() - start)
            print(f"latency: band.{fmt} of {n} steps ({size:,} bytes): median "
                  f"{statistics.median(times) * 1e3:.1f} ms, worst {max(times) * 1e3:.1f} ms")
    finally:
        server.stop()


if __name__ == "__main__":
    main()
