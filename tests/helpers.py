"""Small helpers shared by the tests: run the engine over arrays of one or more series."""

from __future__ import annotations

import numpy as np

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch


def batch(keys, t, y) -> PointBatch:
    keys = [keys] * len(t) if isinstance(keys, str) else list(keys)
    return PointBatch(keys, np.asarray(t, float), np.asarray(y, float), {k: (k, ()) for k in set(keys)})


def run(cfg: dict, keys, t, y, *, chunk: int | None = None, record: bool = True):
    """Engine over the points in order (optionally in chunks); returns (engine, events)."""
    eng = Engine(parse_config(cfg), record_steps=record)
    b = batch(keys, t, y)
    events = []
    if chunk is None:
        events += eng.ingest(b)
    else:
        for lo in range(0, len(b), chunk):
            events += eng.ingest(b.take(np.arange(lo, min(lo + chunk, len(b)))))
    events += eng.finish()
    return eng, events


def step_log(eng: Engine, key: str) -> dict[str, np.ndarray]:
    cols = eng.log.columns()
    sel = cols["row"] == eng.table.index[key]
    return {k: v[sel] for k, v in cols.items()}
