"""The daemon and per-series event time: a lagging producer, an early point, a refused one.

One partition carries two series of river's WaterFlow readings on 1-minute steps ending now,
one arriving 6 minutes behind the other. Series a also sends one point 50 minutes ahead of
the wall clock (within the default max_future of 1 h: accepted, for a only) and one 2 hours
ahead (refused, dead-lettered). The daemon must drop only a's own points behind its early
point, log them, and emit what the engine emits for the same arrival order.
"""

from __future__ import annotations

import logging
import time

import numpy as np
import orjson
import pytest

from streamdet.codecs import TimeRules
from streamdet.codecs.json import decode_json_messages
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.events import parse_cloudevent
from tests.integration.streams import without_wall_clock
from tests.integration.test_daemon import Running, make_daemon, wait_for
from tests.test_event_time import FLOW, N

pytestmark = pytest.mark.broker
RULES = {"rules": [{"name": "flow", "warmup": "60 steps"}]}


class Lines(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.lines: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.lines.append(record.getMessage())


def message(site: str, t: float, v: float) -> tuple[bytes, bytes]:
    doc = {"metric": "flow", "labels": {"site": site}, "time": float(t), "value": float(v)}
    return site.encode(), orjson.dumps(doc)


def engine_events(values: list[bytes]) -> list:
    batch, _bad, _n = decode_json_messages(values, str, rules=TimeRules(now=time.time()))
    eng = Engine(parse_config(RULES))
    return eng.ingest(batch)


def test_lagging_producer_and_early_points_in_one_partition(broker, tmp_path):
    now = time.time()
    start = now - now % 60 - 60 * N
    t = start + 60.0 * np.arange(N) + 13.0
    values = {"a": FLOW, "b": FLOW[::-1]}
    msgs = []
    for i in range(N + 6):
        if i < N:
            msgs.append(message("a", t[i], values["a"][i]))
        if i == 200:
            msgs.append(message("a", now + 7200, 1.0))  # beyond max_future: refused
        if i == 470:
            msgs.append(message("a", now + 3000, 1.0))  # 50 min ahead: accepted for a
        if i >= 6:
            msgs.append(message("b", t[i - 6], values["b"][i - 6]))
    topics = broker.daemon_topics()
    broker.produce(topics[0], msgs)
    expected = engine_events([m[1] for m in msgs])
    alone_b = engine_events([m[1] for m in msgs if m[0] == b"b"])
    assert len(alone_b) >= 2
    lines = Lines()
    logging.getLogger("streamdet.daemon").addHandler(lines)
    try:
        daemon, metrics = make_daemon(broker, tmp_path, topics, sections=RULES)
        get = metrics.registry.get_sample_value
        with Running(daemon):
            assert wait_for(lambda: (get("streamdet_points_accepted_total") or 0)
                            + (get("streamdet_points_late_total") or 0) == 2 * N + 1)
            out = broker.read_all(topics[1], expect=len(expected))
            dead = broker.read_all(topics[2], expect=1)
    finally:
        logging.getLogger("streamdet.daemon").removeHandler(lines)
    # a's minutes 471..479 are behind its own early point; nothing else is late
    assert get("streamdet_points_late_total") == 9
    assert get("streamdet_records_bad_total", {"reason": "future_time"}) == 1
    assert len(dead) == 1 and b"in the future" in dict(dead[0].headers())["streamdet-error"]
    docs = [parse_cloudevent(m.value()) for m in out]
    assert sorted(d["id"] for d in docs) == sorted(e.id for e in expected)
    by_id = {e.id: e for e in expected}
    assert all(without_wall_clock(d) == without_wall_clock(orjson.loads(by_id[d["id"]].to_json()))
               for d in docs)
    assert {e.id for e in alone_b} <= {d["id"] for d in docs}  # b as if it were alone
    late_lines = [x for x in lines.lines if "dropped point" in x]
    assert late_lines and 'flow{site="a"}: late point' in late_lines[0]
    assert "late after their series moved on" in late_lines[0]
