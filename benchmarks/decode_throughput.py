"""Decode throughput per input format, points per second, on the same points (prints; not a test).

The points: ``--series`` series (metric with two labels) x ``--steps`` steps. Our JSON, Influx
line protocol and Telegraf JSON go one point per message (as those producers usually send);
OTLP protobuf and OTLP/JSON go ``--per-request`` points per ExportMetricsServiceRequest, a
realistic Collector batch. Each format is decoded through the daemon's path
(``MessageReader.decode_messages``) in chunks of 20,000 messages, best of ``--repeat`` runs.

    python benchmarks/decode_throughput.py --series 1000 --steps 50
"""

from __future__ import annotations

import argparse
import time

import orjson

from streamdet.codecs.otlp import encode_gauges
from streamdet.codecs.readers import MessageReader
from streamdet.config import InputConfig

T0 = 1_709_294_400


def make_points(series: int, steps: int) -> list[dict]:
    return [{"metric": "http_requests", "labels": {"host": f"h{s % 50}", "route": f"/r{s}"},
             "time": float(T0 + 60 * k), "value": float((s * 7 + k) % 97)}
            for k in range(steps) for s in range(series)]


def messages(points: list[dict], fmt: str, per_request: int) -> list[bytes]:
    if fmt == "json":
        return [orjson.dumps(p) for p in points]
    if fmt == "influx":
        return [f"http,host={p['labels']['host']},route={p['labels']['route']} requests={p['value']} "
                f"{int(p['time'])}".encode() for p in points]
    if fmt == "telegraf_json":
        return [orjson.dumps({"name": "http", "tags": p["labels"], "fields": {"requests": p["value"]},
                              "timestamp": int(p["time"])}) for p in points]
    return [encode_gauges(points[i:i + per_request], json=fmt == "otlp_json",
                          resource={"service.name": "bench", "host.name": "b1"})
            for i in range(0, len(points), per_request)]


def measure(fmt: str, msgs: list[bytes], n_points: int, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        reader = MessageReader(InputConfig(format=fmt, influx_precision="s"))
        started = time.perf_counter()
        got = 0
        for i in range(0, len(msgs), 20_000):
            batch, bad, _ = reader.decode_messages(msgs[i:i + 20_000], str)
            assert not bad, bad[0][1].errors[0]
            got += len(batch)
        best = min(best, time.perf_counter() - started)
        assert got == n_points, (fmt, got, n_points)
    return n_points / best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=1000)
    ap.add_argument("--steps", type=int, default=50)
    ap.add_argument("--per-request", type=int, default=100)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    points = make_points(args.series, args.steps)
    print(f"{len(points):,} points, {args.series:,} series; OTLP: {args.per_request} points per request")
    print(f"{'format':<15} {'messages':>9} {'bytes/point':>12} {'points/s':>12}")
    for fmt in ("json", "influx", "telegraf_json", "otlp_proto", "otlp_json"):
        msgs = messages(points, fmt, args.per_request)
        rate = measure(fmt, msgs, len(points), args.repeat)
        size = sum(len(m) for m in msgs) / len(points)
        print(f"{fmt:<15} {len(msgs):>9,} {size:>12.1f} {rate:>12,.0f}")


if __name__ == "__main__":
    main()
