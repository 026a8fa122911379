"""Command line: ``streamdet run``, ``replay``, ``evaluate``, ``check`` and ``demo``."""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Sequence

from streamdet.config import Config, ConfigError, load_config, parse_config


def _load(path: str | None) -> Config:
    return load_config(path) if path else parse_config({})


def cmd_check(args: argparse.Namespace) -> int:
    from streamdet.daemon.settings import parse_settings

    try:
        cfg = load_config(args.config)
        parse_settings(cfg)
    except ConfigError as exc:
        print(f"{args.config}: {len(exc.problems)} problem(s)", file=sys.stderr)
        for p in exc.problems:
            print(f"  {p}", file=sys.stderr)
        return 2
    print(f"{args.config}: OK ({len(cfg.rules)} rule(s): {', '.join(r.name for r in cfg.rules)})")
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    from streamdet.plots import plot_series
    from streamdet.replay import ProgressBar, format_summary, replay, write_events

    try:
        cfg = _load(args.config)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    try:
        result = replay(args.inputs, cfg, fmt=args.format, record_steps=bool(args.plot),
                        now=time.time(), progress=ProgressBar())
    except (OSError, ValueError) as exc:
        print(f"streamdet replay: {exc}", file=sys.stderr)
        return 2
    if args.events == "-":
        write_events(result.events, sys.stdout.buffer)
        sys.stdout.flush()
    elif args.events:
        with open(args.events, "wb") as fh:
            write_events(result.events, fh)
    print(format_summary(result), file=sys.stderr if args.events == "-" else sys.stdout)
    if args.plot:
        paths = plot_series(result.engine, result.events, args.plot)
        print(f"plots: {len(paths)} PNG file(s) in {args.plot}",
              file=sys.stderr if args.events == "-" else sys.stdout)
    return 0


def cmd_evaluate(args: argparse.Namespace) -> int:
    import orjson

    from streamdet.config import parse_duration
    from streamdet.evaluate import (
        LabelsError,
        SweepError,
        evaluate,
        json_document,
        load_labels,
        read_config_raw,
        report,
        warn,
    )

    try:
        raw = read_config_raw(args.config)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    try:
        slack = parse_duration(args.slack)
        if slack < 0:
            raise ValueError(f"must be >= 0, got {args.slack!r}")
    except ValueError as exc:
        print(f"streamdet evaluate: --slack: {exc}", file=sys.stderr)
        return 2
    if args.jobs is not None and args.jobs < 1:
        print(f"streamdet evaluate: --jobs: must be >= 1, got {args.jobs}", file=sys.stderr)
        return 2
    if args.target_false_per_day is not None and not args.target_false_per_day >= 0:
        print("streamdet evaluate: --target-false-per-day: must be a number >= 0", file=sys.stderr)
        return 2
    try:
        labels = load_labels(args.labels)
        ev = evaluate(args.inputs, raw, labels, slack=slack, sweep=args.sweep or (),
                      jobs=args.jobs or (os.cpu_count() or 1), fmt=args.format, now=time.time())
    except (LabelsError, SweepError) as exc:
        print(f"streamdet evaluate: {exc}", file=sys.stderr)
        return 2
    except (OSError, ValueError) as exc:
        print(f"streamdet evaluate: {exc}", file=sys.stderr)
        return 2
    if ev.unmatched_labels:
        warn(f"{args.labels}: {len(ev.unmatched_labels)} name(s) match no series or input file: "
             + ", ".join(ev.unmatched_labels))
    if ev.errors:
        warn(f"{len(ev.errors)} bad record(s) skipped; first: {ev.errors[0]}")
    text, chosen = report(ev, target=args.target_false_per_day)
    print(text)
    if args.json:
        with open(args.json, "wb") as fh:
            fh.write(orjson.dumps(json_document(ev, chosen), option=orjson.OPT_INDENT_2))
    return 0


def _partition(text: str) -> tuple[str, int]:
    topic, sep, part = text.rpartition(":")
    if not sep or not topic or not part.isdigit():
        raise argparse.ArgumentTypeError(f"expected TOPIC:PARTITION, got {text!r}")
    return topic, int(part)


def cmd_run(args: argparse.Namespace) -> int:
    from prometheus_client import CollectorRegistry

    from streamdet.daemon.consumer import Daemon
    from streamdet.daemon.health import Metrics
    from streamdet.daemon.logs import setup_logging
    from streamdet.daemon.settings import load_with_environment

    try:
        cfg, settings = load_with_environment(args.config)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    setup_logging(args.log_format or settings.log_format, settings.log_level)
    daemon = Daemon(cfg, settings, metrics=Metrics(CollectorRegistry()), events_file=args.events_file,
                    fresh_partitions=args.fresh_partition or ())
    return daemon.run()


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="streamdet", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("replay", help="run the detector over history files in time order")
    p.add_argument("inputs", nargs="+", help="CSV, JSON lines (.jsonl) or line-protocol (.lp) files")
    p.add_argument("--config", "-c", help="YAML config (default: built-in defaults)")
    p.add_argument("--events", "-e", help="write events as CloudEvents JSON lines here ('-' = stdout)")
    p.add_argument("--plot", metavar="DIR", help="write a PNG per series that breached into DIR")
    p.add_argument("--format", choices=("csv", "json", "influx"),
                   help="input format (default: from each file's extension)")
    p.set_defaults(func=cmd_replay)
    r = sub.add_parser("run", help="run the Kafka daemon until SIGTERM")
    r.add_argument("--config", "-c", help="YAML config; STREAMDET_* environment variables override it")
    r.add_argument("--events-file", help="write events as JSON lines here instead of the output topic")
    r.add_argument("--fresh-partition", action="append", type=_partition, metavar="TOPIC:PARTITION",
                   help="discard that partition's checkpoint and start it fresh (repeatable)")
    r.add_argument("--log-format", choices=("text", "json"), help="log format (default: logging.format)")
    r.set_defaults(func=cmd_run)
    d = sub.add_parser("demo", help="a fictional shop's metrics through a local broker and the daemon")
    d.add_argument("--out", default="demo-out", help="where plots and demo state go")
    d.add_argument("--bootstrap-servers", help="use this Kafka instead of starting the bundled broker")
    d.add_argument("--produce-only", action="store_true", help="only produce the scenario's points")
    d.set_defaults(func=lambda a: __import__("streamdet.demo", fromlist=["run_demo"]).run_demo(
        a.out, a.bootstrap_servers, a.produce_only))
    v = sub.add_parser("evaluate", help="score breaches against labelled incident windows; sweep settings")
    v.add_argument("inputs", nargs="+", help="CSV, JSON lines (.jsonl) or line-protocol (.lp) files")
    v.add_argument("--labels", "-l", required=True,
                   help='JSON {"series key or file name": [[start, end], ...]}')
    v.add_argument("--config", "-c", required=True, help="YAML config")
    v.add_argument("--slack", default="15m", help="an opening this long before a window counts (15m)")
    v.add_argument("--json", metavar="OUT", help="write the figures as JSON here")
    v.add_argument("--sweep", nargs="+", action="extend", metavar="KEY=V1,V2",
                   help="rule settings to try in every combination, e.g. width=2,3 confirm.steps=3,5")
    v.add_argument("--target-false-per-day", type=float, metavar="X",
                   help="pick the combination with most detections at or under X false per series-day")
    v.add_argument("--jobs", "-j", type=int, help="worker processes (default: CPU count)")
    v.add_argument("--format", choices=("csv", "json", "influx"),
                   help="input format (default: from each file's extension)")
    v.set_defaults(func=cmd_evaluate)
    c = sub.add_parser("check", help="validate a config file (exit code 2 on errors)")
    c.add_argument("config")
    c.set_defaults(func=cmd_check)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
