"""Replay history files through the engine in time order: events out, a summary, optional plots.

The same :class:`~streamdet.core.engine.Engine` as the daemon runs here, so a replay shows
exactly what the daemon would have emitted for the same points.
"""

from __future__ import annotations

import sys
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import IO

import numpy as np

from streamdet.codecs import DECODERS, TimeRules, format_for_path
from streamdet.codecs.readers import MessageReader
from streamdet.config import Config
from streamdet.core.engine import DroppedPoint, Engine
from streamdet.core.points import DecodeError, PointBatch
from streamdet.events import OPENED, BreachEvent

CHUNK = 50_000
DROPPED_SHOWN = 10  # dropped points (late, impossible time) described in the summary


@dataclass(slots=True)
class ReplayResult:
    engine: Engine
    events: list[BreachEvent]
    errors: list[DecodeError]
    records: int
    seconds: float
    breaches: Counter[str] = field(default_factory=Counter)
    dropped: list[DroppedPoint] = field(default_factory=list)  # the first few, described

    def summary(self) -> dict[str, object]:
        c = self.engine.counters
        stats = self.engine.stats()
        return {
            "records": self.records,
            "bad_records": len(self.errors),
            "points_accepted": c["points_accepted"],
            "points_late": c["points_late"],
            "points_late_series": c["points_late_series"],
            "points_late_grace": c["points_late_grace"],
            "points_bad_time": c["points_bad_time"],
            "points_no_rule": c["points_no_rule"],
            "points_series_limit": c["points_series_limit"],
            "series": stats["series_active"],
            "series_learning": stats["series_learning"],
            "breaches_opened": c["events_opened"],
            "breaches_open_at_end": stats["breaches_open"],
            "seconds": round(self.seconds, 3),
        }


def read_inputs(paths: Sequence[str | Path], config: Config, *, fmt: str | None = None,
                now: float | None = None) -> tuple[PointBatch, list[DecodeError], int]:
    """Decode every file; errors name the file and line. ``now`` bounds future times."""
    rules = TimeRules(now=now, max_future=config.input.max_future)
    batches, errors, records = [], [], 0
    readers: dict[str, MessageReader] = {}  # one per format, shared by the files in it
    for path in paths:
        p = Path(path)
        name = fmt or format_for_path(str(p))
        if name not in DECODERS:
            raise ValueError(f"unknown format {name!r}; valid: {', '.join(DECODERS)}")
        reader = readers.get(name)
        if reader is None:
            reader = readers[name] = MessageReader(replace(config.input, format=name))
        decoded = reader.decode(p.read_bytes(), prefix=str(p), rules=rules, metric=p.stem)
        batches.append(decoded.points)
        errors.extend(decoded.errors)
        records += decoded.records
    return PointBatch.concat(batches), errors, records


def replay(paths: Sequence[str | Path], config: Config, *, fmt: str | None = None,
           record_steps: bool = False, now: float | None = None,
           progress: Callable[[int, int], None] | None = None,
           inputs: tuple[PointBatch, list[DecodeError], int] | None = None) -> ReplayResult:
    """Run the engine over the files' points sorted by time (ties keep file order).

    ``inputs`` is what :func:`read_inputs` returned, for a caller that looked at it first.
    """
    started = time.perf_counter()
    points, errors, records = inputs if inputs is not None else read_inputs(paths, config, fmt=fmt, now=now)
    order = np.argsort(points.time, kind="stable")
    engine = Engine(config, record_steps=record_steps)
    events: list[BreachEvent] = []
    dropped: list[DroppedPoint] = []
    total = len(points)
    for lo in range(0, total, CHUNK):
        events.extend(engine.ingest(points.take(order[lo:lo + CHUNK])))
        dropped.extend(engine.dropped[:DROPPED_SHOWN - len(dropped)])
        if progress:
            progress(min(lo + CHUNK, total), total)
    events.extend(engine.finish())
    result = ReplayResult(engine, events, errors, records, time.perf_counter() - started)
    result.breaches = Counter(e.series for e in events if e.type == OPENED)
    result.dropped = dropped
    return result


def write_events(events: Sequence[BreachEvent], out: IO[bytes], source: str = "streamdet",
                 config: Config | None = None) -> None:
    """CloudEvents JSON lines with the rules' routing data; ``detected_at`` stays null (a replay
    detects nothing live: its wall-clock time would say nothing about delay)."""
    from streamdet.alerting.routing import Encoder

    encoder = Encoder(config, source)
    for e in events:
        out.write(encoder.to_json(e))
        out.write(b"\n")


class ProgressBar:
    """A one-line progress bar on a terminal; silent when the stream is not a TTY."""

    def __init__(self, stream: IO[str] | None = None, width: int = 30) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.width = width
        self.enabled = self.stream.isatty()

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled or total == 0:
            return
        filled = int(self.width * done / total)
        bar = "#" * filled + "." * (self.width - filled)
        self.stream.write(f"\r[{bar}] {done:,}/{total:,} points")
        if done >= total:
            self.stream.write("\n")
        self.stream.flush()


def format_summary(result: ReplayResult, *, top: int = 20, max_errors: int = 10) -> str:
    s = result.summary()
    lines = [
        f"records read      {s['records']:,}  (bad: {s['bad_records']:,})",
        f"points accepted   {s['points_accepted']:,}  (late: {s['points_late']:,}, "
        f"no rule: {s['points_no_rule']:,}, over series cap: {s['points_series_limit']:,}, "
        f"impossible time: {s['points_bad_time']:,})",
        f"series            {s['series']:,}  (still learning, no verdicts yet: "
        f"{s['series_learning']:,})",
        f"breaches opened   {s['breaches_opened']:,}  (open at the end: {s['breaches_open_at_end']:,})",
        f"time              {s['seconds']:.2f} s",
    ]
    if result.breaches:
        lines.append("breaches per series:")
        for key, n in result.breaches.most_common(top):
            lines.append(f"  {n:5d}  {key}")
        if len(result.breaches) > top:
            lines.append(f"  ... and {len(result.breaches) - top} more series")
    learning = [k for k in result.engine.table.index if result.engine.is_learning(k)]
    if learning:
        lines.append(f"learning series (too little history to judge): {', '.join(learning[:10])}"
                     + (" ..." if len(learning) > 10 else ""))
    if s["points_late"]:
        lines.append(f"late points: {s['points_late_series']:,} after their series had moved on, "
                     f"{s['points_late_grace']:,} after the partition's grace")
    if result.dropped:
        lines.append("dropped points (first ones):")
        lines.extend(f"  {d}" for d in result.dropped)
    if result.errors:
        lines.append("bad records (first ones):")
        lines.extend(f"  {e}" for e in result.errors[:max_errors])
    return "\n".join(lines)
