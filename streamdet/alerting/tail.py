"""`streamdet tail`: follow breach events (the output topic or an events file) as readable lines.

One line per event in the demo's layout with the severity in front; on a terminal (and unless
``--no-color``) the line is coloured by severity. Anything that is not one of our CloudEvents is
reported on stderr with where it came from and skipped: tail never stops on a bad record.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Iterator
from typing import IO, Any

import orjson

from streamdet.events import parse_cloudevent

# ANSI SGR codes (ECMA-48): bold red, yellow, cyan; green for closed breaches.
COLOURS = {"critical": "\x1b[1;31m", "warning": "\x1b[33m", "info": "\x1b[36m"}
CLOSED_COLOUR = "\x1b[32m"
RESET = "\x1b[0m"


def _num(d: dict, key: str) -> str:
    shown = (d.get("display") or {}).get(key)
    if isinstance(shown, str):
        return shown
    value = d.get(key)
    return f"{value:.4g}" if isinstance(value, int | float) else "n/a"


def format_line(doc: dict[str, Any], color: bool = False) -> str:
    """The demo's one-line form of an event, severity first (coloured when ``color``)."""
    d = doc.get("data") or {}
    severity = str(d.get("severity") or doc.get("severity") or "-")
    subject = str(doc.get("subject", "?"))
    if str(doc.get("type", "")).endswith("opened"):
        line = (f"{doc.get('time', '?')}  {severity:<8} OPENED  {subject:<46} {d.get('direction', '?'):<5} "
                f"observed {_num(d, 'observed')}  expected {_num(d, 'expected')}  "
                f"band [{_num(d, 'lower')}, {_num(d, 'upper')}]")
        colour = COLOURS.get(severity, "")
    else:
        minutes = d.get("duration_seconds")
        worst = d.get("worst_score")
        line = (f"{doc.get('time', '?')}  {severity:<8} CLOSED  {subject:<46} after "
                f"{minutes / 60 if isinstance(minutes, int | float) else 0:.0f} min, worst score "
                f"{worst if isinstance(worst, int | float) else 0:+.1f} ({d.get('reason', '?')})")
        colour = CLOSED_COLOUR
    if d.get("detection_delay_seconds") is not None:
        line += f"  [detected {d['detection_delay_seconds']:.1f} s after the step]"
    return f"{colour}{line}{RESET}" if color and colour else line


def decode(raw: bytes, where: str) -> tuple[dict | None, str | None]:
    """An event document, or None and why not (naming ``where``)."""
    try:
        doc = parse_cloudevent(raw)
    except (orjson.JSONDecodeError, ValueError, TypeError) as exc:
        return None, f"{where}: not a streamdet event ({str(exc).splitlines()[0][:120]})"
    if not isinstance(doc.get("data", {}), dict):
        return None, f"{where}: not a streamdet event (data is not an object)"
    return doc, None


def file_records(stream: IO[bytes], name: str, follow: bool, idle_exit: float | None,
                 poll: float = 0.2) -> Iterator[tuple[bytes, str]]:
    """Lines of an events file; with ``follow`` keep waiting for appended lines (``tail -f``)."""
    n = 0
    pending = b""
    idle_since = time.monotonic()
    while True:
        chunk = stream.readline()
        if chunk:
            pending += chunk
            if not pending.endswith(b"\n") and follow:
                continue  # a line still being written
            n += 1
            line, pending = pending.strip(), b""
            idle_since = time.monotonic()
            if line:
                yield line, f"{name} line {n}"
            continue
        if pending and not follow:
            n += 1
            yield pending.strip(), f"{name} line {n}"
            pending = b""
        if not follow or (idle_exit is not None and time.monotonic() - idle_since > idle_exit):
            return
        time.sleep(poll)


def kafka_records(bootstrap: str, topic: str, from_beginning: bool, idle_exit: float | None,
                  client: dict | None = None) -> Iterator[tuple[bytes, str]]:
    """Messages of the output topic, read with a throw-away group (offsets never committed)."""
    import logging
    import uuid

    from confluent_kafka import Consumer

    c = Consumer({"bootstrap.servers": bootstrap, **(client or {}),
                  "group.id": f"streamdet-tail-{uuid.uuid4().hex[:8]}", "enable.auto.commit": False,
                  "auto.offset.reset": "earliest" if from_beginning else "latest",
                  "session.timeout.ms": 6000, "logger": logging.getLogger("streamdet.librdkafka")})
    c.subscribe([topic])
    idle_since = time.monotonic()
    try:
        while idle_exit is None or time.monotonic() - idle_since <= idle_exit:
            for m in c.consume(500, 0.3):
                if m.error() is not None:
                    continue
                idle_since = time.monotonic()
                yield m.value() or b"", f"{m.topic()}/{m.partition()}@{m.offset()}"
    finally:
        c.close()


def tail(records: Iterator[tuple[bytes, str]], out: IO[str], err: IO[str], *, color: bool,
         max_events: int | None = None) -> tuple[int, int]:
    """Print each event; report bad records on ``err``. Returns (events, bad records)."""
    shown = bad = 0
    for raw, where in records:
        doc, why = decode(raw, where)
        if doc is None:
            bad += 1
            print(f"streamdet tail: {why}", file=err)
            continue
        print(format_line(doc, color), file=out, flush=True)
        shown += 1
        if max_events is not None and shown >= max_events:
            break
    return shown, bad


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("file", nargs="?", help="events file (JSON lines; '-' = stdin); default: the output "
                                           "topic of --config")
    p.add_argument("--config", "-c", help="YAML config: kafka.bootstrap_servers and kafka.output_topic")
    p.add_argument("--bootstrap-servers", help="Kafka address (overrides the config)")
    p.add_argument("--topic", help="topic to follow (default: kafka.output_topic)")
    p.add_argument("--from-beginning", action="store_true", help="start at the topic's first event")
    p.add_argument("--follow", "-f", action="store_true", help="keep reading a file as it grows")
    p.add_argument("--no-color", action="store_true", help="never colour the lines")
    p.add_argument("--max-events", type=int, metavar="N", help="stop after N events")
    p.add_argument("--idle-exit", type=float, metavar="SECONDS",
                   help="stop after this long without a new record (default: run until Ctrl-C)")


def main(args: argparse.Namespace, out: IO[str] | None = None, err: IO[str] | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr
    color = not args.no_color and out.isatty()
    try:
        if args.file:
            if args.file == "-":
                records = file_records(sys.stdin.buffer, "stdin", args.follow, args.idle_exit)
                tail(records, out, err, color=color, max_events=args.max_events)
                return 0
            with open(args.file, "rb") as fh:
                tail(file_records(fh, args.file, args.follow, args.idle_exit), out, err, color=color,
                     max_events=args.max_events)
            return 0
        from streamdet.config import ConfigError
        from streamdet.daemon.settings import load_with_environment

        try:
            _cfg, settings = load_with_environment(args.config)
        except ConfigError as exc:
            print(str(exc), file=err)
            return 2
        topic = args.topic or settings.output_topic
        if not topic:
            print("streamdet tail: no topic: give --topic or kafka.output_topic", file=err)
            return 2
        records = kafka_records(args.bootstrap_servers or settings.bootstrap_servers, topic,
                                args.from_beginning, args.idle_exit, dict(settings.client))
        tail(records, out, err, color=color, max_events=args.max_events)
        return 0
    except OSError as exc:
        print(f"streamdet tail: {args.file}: cannot read ({exc.strerror or exc})", file=err)
        return 2
    except KeyboardInterrupt:
        return 0
