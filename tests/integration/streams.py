"""Input streams for the daemon tests, built from datasets that river ships (outside data)."""

from __future__ import annotations

import orjson
from river import datasets

from streamdet.core.points import PointBatch


def waterflow_points(sites: int = 1):
    """river.datasets.WaterFlow (hourly), one copy per ``site`` label, interleaved in time order."""
    rows = [(x["Time"].timestamp(), float(v)) for x, v in datasets.WaterFlow()]
    out = []
    for t, v in rows:
        for s in range(sites):
            out.append({"metric": "waterflow", "labels": {"site": f"s{s}"}, "time": t, "value": v})
    return out


def as_messages(points, per_message: int = 1) -> list[tuple[bytes, bytes]]:
    """(key, value) pairs keyed by series, so each series stays in one partition."""
    msgs = []
    for i in range(0, len(points), per_message):
        chunk = points[i:i + per_message]
        key = orjson.dumps([chunk[0]["metric"], chunk[0]["labels"]])
        msgs.append((key, orjson.dumps(chunk if per_message > 1 else chunk[0])))
    return msgs


def as_batch(points) -> PointBatch:
    from streamdet.core.points import PointBuilder, normalise_labels

    b = PointBuilder()
    for p in points:
        b.add(p["metric"], normalise_labels(p["labels"]), p["time"], p["value"])
    return b.build()


DAEMON_RULES = {"rules": [{"name": "flow", "step": "auto"}]}


def without_wall_clock(doc: dict) -> dict:
    """An event document without the wall-clock detection time the daemon's sink stamps
    (replay leaves it null): everything decided from the data must be identical."""
    doc["data"].pop("detected_at", None)
    doc["data"].pop("detection_delay_seconds", None)
    return doc
