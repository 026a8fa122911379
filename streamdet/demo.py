"""`streamdet demo`: a fictional tea shop's metrics through a real (local) broker and the daemon.

Scenario (invented for the demo only): *Larkspur Tea Co.* sells loose-leaf tea online. Three
weeks of history at 5-minute steps, then a live day with three incidents:

* ``orders_per_minute`` (daily and weekly cycle, quieter weekends) collapses for 40 minutes at
  11:00 on the live day -- an hour that is normally busy;
* ``checkout_latency_seconds`` drifts upwards over the afternoon (a slow leak);
* ``packing_queue_depth`` doubles at 06:00 for good (a second packing shift started): it
  breaches, then after ``relearn_after`` (2 h) the band moves to the new level and it closes.

Four ``cpu_utilisation`` host series stay healthy. A fleet of 30 ``tea-api`` hosts
(``requests_per_second``), launched at 00:00 on the live day, shares the shop's daily cycle; from
09:30 to 12:00 host ``tea-api-17`` does a quarter of its peers' work. Its temporal band is still
learning (a day of warm-up), but the rule's peer group judges it against the other 29 from the
first step: one outlier, named, and nothing from the other hosts. The demo starts the bundled broker on
127.0.0.1 (unless ``--bootstrap-servers`` is given), produces the scenario, runs the daemon,
prints each event as it arrives, and writes PNG plots to ``--out``. With ``--format otlp_proto``
(or ``otlp_json``) the scenario travels as OTLP requests, as an OpenTelemetry Collector's Kafka
exporter would put it on the topic.
"""

from __future__ import annotations

import sys
import threading
import time
import uuid
from collections import Counter
from pathlib import Path

import numpy as np
import orjson

from streamdet.local_broker import start_broker

STEP = 300.0
HISTORY_DAYS = 21
LIVE_HOURS = 20
FLEET_METRIC = "requests_per_second"
FLEET_SERVICE = "tea-api"
FLEET_SIZE = 30
SLOW_HOST = "tea-api-17"
SLOW_HOURS = (9.5, 12.0)  # live-day hours in which SLOW_HOST does SLOW_SHARE of the work
SLOW_SHARE = 0.25


def scenario(now: float, seed: int = 42, fleet: bool = True) -> list[dict]:
    """Points in time order, ending just before ``now``; ``fleet=False`` leaves out the
    ``tea-api`` hosts."""
    rng = np.random.default_rng(seed)
    end = np.floor(now / 86400) * 86400 - 86400 + LIVE_HOURS * 3600  # live day: yesterday 00:00 UTC
    start = end - (HISTORY_DAYS * 24 + LIVE_HOURS) * 3600
    t = np.arange(start, end, STEP)
    live = t >= end - LIVE_HOURS * 3600
    day0 = end - LIVE_HOURS * 3600
    hour = (t % 86400) / 3600
    weekday = ((t // 86400).astype(int) + 3) % 7  # 0 = Monday
    weekend = weekday >= 5
    daily = np.clip(np.sin((hour - 7) / 14 * np.pi), 0, None)  # busy 07:00-21:00
    orders = 20 + 60 * daily * np.where(weekend, 0.6, 1.0) + rng.normal(0, 3, t.size)
    dip = live & (t >= day0 + 11 * 3600) & (t < day0 + 11 * 3600 + 2400)
    orders = np.where(dip, orders * 0.3, orders)
    latency = 0.25 + 0.05 * daily + rng.normal(0, 0.01, t.size)
    drift = live & (t >= day0 + 13 * 3600)
    latency = latency + np.where(drift, (t - (day0 + 13 * 3600)) / 3600 * 0.08, 0.0)
    queue = 120 + 30 * daily + rng.normal(0, 5, t.size)
    queue = np.where(live & (t >= day0 + 6 * 3600), queue + 150, queue)
    series = [("orders_per_minute", {"shop": "larkspur-web"}, orders),
              ("checkout_latency_seconds", {"service": "checkout"}, latency),
              ("packing_queue_depth", {"site": "warehouse-1"}, queue)]
    for i in range(4):
        series.append(("cpu_utilisation", {"host": f"web-{i + 1}"},
                       0.35 + 0.1 * daily + rng.normal(0, 0.02, t.size)))
    hosts = fleet_series(t, live, day0, daily, np.random.default_rng(seed + 1)) if fleet else []
    jitter = np.random.default_rng(seed + 2)  # own generators: the other series are as before
    points = []
    for j in range(t.size):
        for metric, labels, values in series:
            points.append({"metric": metric, "labels": labels, "time": float(t[j] + rng.uniform(0, 60)),
                           "value": round(float(values[j]), 4)})
        if live[j]:
            for labels, values in hosts:
                points.append({"metric": FLEET_METRIC, "labels": labels,
                               "time": float(t[j] + jitter.uniform(0, 60)),
                               "value": round(float(values[j]), 3)})
    return points


def fleet_series(t: np.ndarray, live: np.ndarray, day0: float, daily: np.ndarray,
                 rng: np.random.Generator) -> list[tuple[dict, np.ndarray]]:
    """The ``tea-api`` hosts behind one balancer: alike work (5 % noise around the shop's daily
    cycle); ``SLOW_HOST`` falls behind during ``SLOW_HOURS``. Values before ``day0`` are unused."""
    rps = 40 + 160 * daily
    slow = live & (t >= day0 + SLOW_HOURS[0] * 3600) & (t < day0 + SLOW_HOURS[1] * 3600)
    out = []
    for i in range(FLEET_SIZE):
        host = f"{FLEET_SERVICE}-{i + 1:02d}"
        values = rps * rng.normal(1.0, 0.05, t.size)
        if host == SLOW_HOST:
            values = np.where(slow, values * SLOW_SHARE, values)
        out.append(({"service": FLEET_SERVICE, "host": host}, values))
    return out


DEMO_RULES = {
    "rules": [
        {"name": "orders", "match": {"metric": "orders_per_minute"}, "step": "5m", "direction": "drop"},
        {"name": "latency", "match": {"metric": "*_seconds"}, "step": "5m", "direction": "rise",
         "clear": {"steps": 6}},
        {"name": "tea-api-fleet", "match": {"metric": FLEET_METRIC}, "step": "5m",
         "peers": {"group_by": ["service"]}},
        {"name": "everything-else", "step": "5m"},
    ]
}


def messages(points: list[dict], fmt: str = "json") -> list[tuple[bytes, bytes]]:
    """(key, value) messages: one JSON point each, or (``otlp_proto`` / ``otlp_json``) one
    ExportMetricsServiceRequest per step holding every series' point of that step, as a
    Collector's Kafka exporter sends a batch (one message key: the requests stay in order)."""
    if fmt == "json":
        return [(message_key(pt), orjson.dumps(pt)) for pt in points]
    from streamdet.codecs.otlp import encode_gauges

    steps: dict[float, list[dict]] = {}
    for pt in points:
        steps.setdefault(pt["time"] // STEP, []).append(pt)
    return [(b"larkspur-shop", encode_gauges(chunk, json=fmt == "otlp_json", units=UNITS,
                                             resource={"service.name": "larkspur-shop"}))
            for chunk in steps.values()]


def message_key(pt: dict) -> bytes:
    """Kafka key of a JSON point: the series, except that the fleet is keyed by its group label
    (``service``), so the whole peer group lands on one partition and is judged together."""
    if pt["metric"] == FLEET_METRIC:
        return orjson.dumps([pt["metric"], pt["labels"]["service"]])
    return orjson.dumps([pt["metric"], pt["labels"]])


UNITS = {"checkout_latency_seconds": "s", "cpu_utilisation": "1", "orders_per_minute": "{order}/min",
         "packing_queue_depth": "{parcel}", FLEET_METRIC: "{request}/s"}


def produce(bootstrap: str, topic: str, points: list[dict], fmt: str = "json") -> None:
    import logging

    from confluent_kafka import Producer

    p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20, "enable.idempotence": True,
                  "logger": logging.getLogger("streamdet.librdkafka")})
    for key, value in messages(points, fmt):
        while True:
            try:
                p.produce(topic, key=key, value=value)
                break
            except BufferError:
                p.poll(0.1)
    if p.flush(30):
        raise RuntimeError("could not deliver the demo points")


def run_demo(out: str = "demo-out", bootstrap: str | None = None, produce_only: bool = False,
             timeout: float = 90.0, fmt: str = "json") -> int:
    import logging

    from confluent_kafka import Consumer
    from confluent_kafka.admin import AdminClient, NewTopic
    from prometheus_client import CollectorRegistry

    from streamdet.config import parse_config
    from streamdet.daemon.consumer import Daemon
    from streamdet.daemon.health import Metrics
    from streamdet.daemon.settings import parse_settings
    from streamdet.events import OPENED, BreachEvent  # noqa: F401

    broker = None
    if bootstrap is None:
        print("starting the bundled Kafka-compatible broker on 127.0.0.1 ...")
        broker, bootstrap = start_broker()
    run_id = uuid.uuid4().hex[:6]
    topics = {"in": f"larkspur-metrics-{run_id}", "out": f"larkspur-breaches-{run_id}",
              "dlq": f"larkspur-dead-letters-{run_id}"}
    try:
        admin = AdminClient({"bootstrap.servers": bootstrap,
                             "logger": logging.getLogger("streamdet.librdkafka")})
        for f in admin.create_topics([NewTopic(topics["in"], 3, 1), NewTopic(topics["out"], 1, 1),
                                      NewTopic(topics["dlq"], 1, 1)]).values():
            f.result(15)
        points = scenario(time.time())
        print(f"producing {len(points):,} points ({fmt}): {HISTORY_DAYS} days of history and a live "
              f"day of Larkspur Tea Co. metrics (5-minute steps) ...")
        produce(bootstrap, topics["in"], points, fmt)
        if produce_only:
            return 0
        cfg = parse_config({**DEMO_RULES, "input": {"format": fmt, "otlp": {"resource_labels": []}},
                            "kafka": {
            "bootstrap_servers": bootstrap, "group_id": f"demo-{run_id}", "input_topics": [topics["in"]],
            "output_topic": topics["out"], "dead_letter_topic": topics["dlq"], "session_timeout": "6s",
            "checkpoint_interval": "2s"},
            "state": {"dir": str(Path(out) / "state")}, "health": {"address": "127.0.0.1:0"}})
        metrics = Metrics(CollectorRegistry())
        daemon = Daemon(cfg, parse_settings(cfg), metrics=metrics)
        thread = threading.Thread(target=daemon.run, kwargs={"install_signals": False}, daemon=True)
        thread.start()
        reader = Consumer({"bootstrap.servers": bootstrap, "group.id": f"demo-reader-{run_id}",
                           "logger": logging.getLogger("streamdet.librdkafka"),
                           "auto.offset.reset": "earliest", "session.timeout.ms": 6000})
        reader.subscribe([topics["out"]])
        print("daemon running; breach and peer-outlier events as they arrive on the output topic:\n")
        seen: Counter[str] = Counter()
        deadline = time.monotonic() + timeout
        idle_since = None
        try:
            while time.monotonic() < deadline:
                for m in reader.consume(100, 0.3):
                    if m.error():
                        continue
                    doc = orjson.loads(m.value())
                    seen[doc["type"]] += 1
                    print("  " + describe(doc))
                done = metrics.registry.get_sample_value("streamdet_points_accepted_total") or 0
                late = metrics.registry.get_sample_value("streamdet_points_late_total") or 0
                if done + late >= len(points):
                    idle_since = idle_since or time.monotonic()
                    if time.monotonic() - idle_since > 3:
                        break
        finally:
            reader.close()
            daemon.stop()
            thread.join(15)
        get = metrics.registry.get_sample_value
        print(f"\nsummary: {int(get('streamdet_records_in_total') or 0):,} records in, "
              f"{int(get('streamdet_points_accepted_total') or 0):,} points accepted, "
              f"{seen['streamdet.breach.opened']} breaches opened, {seen['streamdet.breach.closed']} closed, "
              f"{seen['streamdet.outlier.opened']} peer outlier(s) opened")
        print(f"peer groups: {int(get('streamdet_peer_groups_judged_total') or 0):,} group steps judged "
              f"({int(get('streamdet_peer_members_judged_total') or 0):,} member steps), "
              f"{int(get('streamdet_outliers_open') or 0)} outlier(s) open at the end, "
              f"{int(get('streamdet_peer_groups_split') or 0)} group(s) split over partitions")
        written = write_plots(points, cfg, out, fmt)
        print(f"plots: {len(written)} PNG file(s) in {out}/")
        return 0
    finally:
        if broker is not None:
            broker.kill()
            broker.wait(5)


def describe(doc: dict) -> str:
    d = doc["data"]
    if doc["type"].startswith("streamdet.outlier."):
        if doc["type"].endswith("opened"):
            return (f"{doc['time']}  OUTLIER {doc['subject']:<46} {d['direction']:<5} its group "
                    f"{d['group']} ({d['members_judged']} members): observed {d['observed']:.4g}, "
                    f"group median {d['group_median']:.4g} (M {d['score']:+.1f})")
        return (f"{doc['time']}  BACK    {doc['subject']:<46} among its peers after "
                f"{d['duration_seconds'] / 60:.0f} min, worst M {d['worst_score']:+.1f}")
    if doc["type"].endswith("opened"):
        unit = f" {d['unit']}" if d.get("unit") else ""
        return (f"{doc['time']}  OPENED  {doc['subject']:<46} {d['direction']:<5} "
                f"observed {d['observed']:.4g}{unit}  expected {d['expected']:.4g}  "
                f"band [{d['lower']:.4g}, {d['upper']:.4g}]")
    return (f"{doc['time']}  CLOSED  {doc['subject']:<46} after {d['duration_seconds'] / 60:.0f} min,"
            f" worst score {d['worst_score']:+.1f} ({d['reason']})")


def write_plots(points: list[dict], cfg, out: str, fmt: str = "json") -> list[Path]:
    """Plots from a replay of the same messages (the same engine, hence the same events; OTLP
    units label the axes)."""
    from streamdet.codecs.readers import MessageReader
    from streamdet.core.engine import Engine
    from streamdet.group_plots import plot_groups
    from streamdet.plots import plot_series

    batch, _bad, _n = MessageReader(cfg.input).decode_messages([v for _k, v in messages(points, fmt)], str)
    eng = Engine(cfg, record_steps=True)
    events = eng.ingest(batch)
    last = max(p["time"] for p in points)
    since = last - 2 * 86400
    return plot_series(eng, events, out, since=since) + plot_groups(eng, events, out, since=since)


def main(argv: list[str] | None = None) -> int:
    import argparse

    ap = argparse.ArgumentParser(prog="streamdet demo", description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="demo-out")
    ap.add_argument("--bootstrap-servers")
    ap.add_argument("--produce-only", action="store_true")
    ap.add_argument("--format", choices=("json", "otlp_proto", "otlp_json"), default="json")
    args = ap.parse_args(argv)
    return run_demo(args.out, args.bootstrap_servers, args.produce_only, fmt=args.format)


if __name__ == "__main__":
    sys.exit(main())


# ---------------------------------------------------------------- `streamdet demo --shadow`
# Warm start from the scenario's three weeks, then the live day in shadow mode beside a handful of
# made-up existing alerts (Larkspur's on-call rules, invented like the rest of the scenario).

SHADOW_ALERTS = [  # (alert name, labels, start hour, end hour) on the live day
    ("OrdersLow", {"shop": "larkspur-web"}, 11.2, 11.8),          # the dip: seen by both
    ("CheckoutSlow", {"service": "checkout"}, 15.5, 19.5),        # the drift: seen by both
    ("HostCpuHigh", {"host": "web-2"}, 8.0, 8.5),                 # streamdet sees nothing: only theirs
]                                                                 # the packing queue: only ours


def _alert_payload(day0: float) -> dict:
    from streamdet.events import rfc3339

    alerts = [{"status": "resolved", "labels": {"alertname": name, **labels}, "annotations": {},
               "startsAt": rfc3339(day0 + a * 3600), "endsAt": rfc3339(day0 + b * 3600),
               "generatorURL": "", "fingerprint": f"larkspur-{i}"}
              for i, (name, labels, a, b) in enumerate(SHADOW_ALERTS)]
    return {"version": "4", "receiver": "streamdet-shadow", "status": "resolved", "alerts": alerts,
            "groupLabels": {}, "commonLabels": {}, "externalURL": "http://127.0.0.1:9093",
            "groupKey": "{}:{}", "truncatedAlerts": 0}


def run_shadow_demo(out: str = "demo-out", bootstrap: str | None = None, timeout: float = 90.0) -> int:
    import logging
    import urllib.request

    from confluent_kafka import Producer
    from confluent_kafka.admin import AdminClient, NewTopic
    from prometheus_client import CollectorRegistry

    from streamdet.config import parse_config
    from streamdet.core.points import PointBuilder, normalise_labels, series_key
    from streamdet.daemon.consumer import Daemon
    from streamdet.daemon.health import Metrics
    from streamdet.daemon.settings import parse_settings
    from streamdet.daemon.state_store import LocalStateStore
    from streamdet.shadow.report import format_report, html_page, values_by_series
    from streamdet.warm import warm_from_files

    outdir = Path(out)
    outdir.mkdir(parents=True, exist_ok=True)
    broker = None
    if bootstrap is None:
        print("starting the bundled Kafka-compatible broker on 127.0.0.1 ...")
        broker, bootstrap = start_broker()
    run_id = uuid.uuid4().hex[:6]
    topic = f"larkspur-metrics-{run_id}"
    try:
        admin = AdminClient({"bootstrap.servers": bootstrap,
                             "logger": logging.getLogger("streamdet.librdkafka")})
        for f in admin.create_topics([NewTopic(topic, 1, 1)]).values():
            f.result(15)
        now = time.time()
        points = scenario(now, fleet=False)  # the shadow comparison is about single series
        day0 = np.floor(now / 86400) * 86400 - 86400
        history = [p for p in points if p["time"] < day0]
        live = [p for p in points if p["time"] >= day0]
        (outdir / "history.jsonl").write_bytes(b"\n".join(orjson.dumps(p) for p in history) + b"\n")
        state = outdir / f"shadow-state-{run_id}"
        cfg = parse_config({**DEMO_RULES, "kafka": {
            "bootstrap_servers": bootstrap, "group_id": f"demo-shadow-{run_id}", "input_topics": [topic],
            "session_timeout": "6s", "checkpoint_interval": "2s", "dead_letter_topic": None},
            "state": {"dir": str(state)}, "health": {"address": "127.0.0.1:0"},
            "shadow": {"summary_interval": "1h", "match": {"labels": ["shop", "service", "site", "host"]}}})
        print(f"warm start: {len(history):,} points of history ({HISTORY_DAYS} days) ...")
        res = warm_from_files(cfg, [outdir / "history.jsonl"], store=LocalStateStore(state), topic=topic,
                              offsets={0: 0}, now=now)
        print(f"  {res.points:,} points in {res.seconds:.1f} s ({res.points_per_second:,.0f} points/s), "
              "no events; state written for the daemon")
        p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 20,
                      "logger": logging.getLogger("streamdet.librdkafka")})
        for pt in live:  # keyed by series key: the key warm start assumes
            p.produce(topic, key=series_key(pt["metric"], normalise_labels(pt["labels"])).encode(),
                      value=orjson.dumps(pt))
            p.poll(0)
        if p.flush(30):
            raise RuntimeError("could not deliver the demo points")
        events_file = outdir / f"shadow-events-{run_id}.jsonl"
        metrics = Metrics(CollectorRegistry())
        daemon = Daemon(cfg, parse_settings(cfg), metrics=metrics, events_file=str(events_file), shadow=True)
        thread = threading.Thread(target=daemon.run, kwargs={"install_signals": False}, daemon=True)
        thread.start()
        print(f"live day in shadow mode: {len(live):,} points; events go to {events_file} "
              "marked \"shadow\": true")
        get = metrics.registry.get_sample_value
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            done = (get("streamdet_points_accepted_total") or 0) + (get("streamdet_points_late_total") or 0)
            if done >= len(live) and daemon.health_port is not None:
                break
            time.sleep(0.3)
        body = orjson.dumps(_alert_payload(day0))
        req = urllib.request.Request(f"http://127.0.0.1:{daemon.health_port}/alerts", data=body,
                                     headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=5) as r:
            print(f"existing alerts posted to the webhook receiver: HTTP {r.status}")
        daemon.stop()
        thread.join(15)
        book = daemon.shadow.book  # the daemon's last tick taught it every series of the engines
        comparison = book.compare(since=day0, horizon=max(p["time"] for p in live))
        print()
        print(format_report(comparison))
        b = PointBuilder()
        for pt in points:
            if pt["time"] >= day0:
                b.add(pt["metric"], normalise_labels(pt["labels"]), pt["time"], pt["value"])
        page = outdir / "shadow-report.html"
        page.write_text(html_page(comparison, values_by_series(b.build())), encoding="utf-8")
        print(f"\nHTML timeline: {page}")
        return 0
    finally:
        if broker is not None:
            broker.kill()
            broker.wait(5)
