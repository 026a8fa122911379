"""Command line: ``streamdet run``, ``replay``, ``evaluate``, ``check``, ``tail``, ``shadow report``,
``warm`` and ``demo``."""

from __future__ import annotations

import argparse
import dataclasses
import logging
import math
import os
import sys
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from streamdet.config import FORMATS, Config, ConfigError, load_config, parse_config, parse_duration


def _load(path: str | None) -> Config:
    return load_config(path) if path else parse_config({})


def cmd_check(args: argparse.Namespace) -> int:
    """Validate the file as ``run`` would read it: STREAMDET_* variables applied, every daemon
    section checked (ports, state directory, librdkafka properties). Secrets are never printed."""
    from streamdet.daemon.settings import load_with_environment
    from streamdet.shadow.settings import parse_shadow

    quiet = logging.NullHandler()  # the config warnings are printed below, not logged twice
    logging.getLogger("streamdet.config").addHandler(quiet)
    try:
        cfg, settings = load_with_environment(args.config)
        parse_shadow(cfg)
    except ConfigError as exc:
        print(f"{args.config}: {len(exc.problems)} problem(s)", file=sys.stderr)
        for p in exc.problems:
            print(f"  {p}", file=sys.stderr)
        return 2
    finally:
        logging.getLogger("streamdet.config").removeHandler(quiet)
    env = sorted(k for k in os.environ if k.startswith("STREAMDET_"))
    note = f"; with {', '.join(env)} from the environment" if env else ""
    print(f"{args.config}: OK ({len(cfg.rules)} rule(s): {', '.join(r.name for r in cfg.rules)}{note})")
    for w in cfg.warnings:
        print(f"  warning: {w}")
    return _check_state(cfg, settings, args.state) if args.state else 0


def _check_state(cfg: Config, settings, directory: str) -> int:
    """Restore every checkpoint in ``directory`` against ``cfg`` and print what ``run`` would do
    with it (the restore report); 2 if ``run`` would refuse one."""
    from streamdet.core.engine import Engine, SnapshotError
    from streamdet.daemon.state_store import LocalStateStore, StateError

    files = sorted(Path(directory).glob("*.ckpt"))
    if not files:
        print(f"{directory}: no checkpoints")
        return 0
    store = LocalStateStore(directory)
    code = 0
    for path in files:
        topic, _, partition = path.stem.rpartition("-")
        try:
            ckpt = store.load(topic, int(partition))
            engine = Engine.restore(cfg, ckpt.snapshot) if ckpt else None
        except (ValueError, SnapshotError, StateError) as exc:
            print(f"{path}: cannot restore: {exc}", file=sys.stderr)
            code = 2
            continue
        if engine is None or engine.restore_report is None:
            continue
        report = engine.restore_report
        print(f"{path}: {report.series_kept} series kept")
        for line in report.lines():
            print(f"  {line}")
        if report.changes and settings.on_rule_change == "error":
            print("  run would refuse this checkpoint (state.on_rule_change: error); accept with "
                  "--accept-state-changes", file=sys.stderr)
            code = 2
    return code


# `streamdet replay` exit codes (documented in the README).
REPLAY_OK = 0
REPLAY_USAGE = 2  # bad config, unknown format, unreadable input, unusable output path
REPLAY_EMPTY = 3  # an input file holds no records at all
REPLAY_ALL_BAD = 4  # an input file has records but not one usable point (e.g. a CSV without `value`)


def _output_problems(args: argparse.Namespace) -> list[str]:
    """What would stop the events or plots from being written, found before any work is done."""
    problems = []
    if args.events and args.events != "-":
        events = Path(args.events)
        parent = events.parent if str(events.parent) else Path(".")
        if events.is_dir():
            problems.append(f"--events {args.events}: is a directory; give a file name")
        elif not parent.is_dir():
            problems.append(f"--events {args.events}: directory {str(parent)!r} does not exist")
        elif not os.access(parent, os.W_OK):
            problems.append(f"--events {args.events}: directory {str(parent)!r} is not writable")
    if args.plot:
        plot = Path(args.plot)
        if plot.exists() and not plot.is_dir():
            problems.append(f"--plot {args.plot}: exists and is not a directory")
        else:
            existing = plot
            while not existing.exists():
                existing = existing.parent if existing != existing.parent else Path(".")
            if not existing.is_dir():
                problems.append(f"--plot {args.plot}: cannot create it under {str(existing)!r}, "
                                "which is not a directory")
            elif not os.access(existing, os.W_OK):
                problems.append(f"--plot {args.plot}: {str(existing)!r} is not writable")
    for flag in ("since", "until"):  # plot window
        if getattr(args, flag, None) is not None:
            if not args.plot:
                problems.append(f"--{flag} applies to plots only: add --plot DIR")
            try:
                _plot_time(getattr(args, flag), 0.0)
            except ValueError as exc:
                problems.append(f"--{flag}: {exc}")
    return problems


def _duration_text(seconds: float) -> str:
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60)):
        if seconds >= size and seconds % size == 0:
            return f"{seconds / size:g}{unit}"
    return f"{seconds:g}s"


def _spacing_warnings(points, cfg: Config, *, min_gaps: int = 5, examples: int = 3) -> list[str]:
    """Series whose typical spacing between points does not fit their rule's ``step``.

    Sparser than the step (5-minute data under ``step: 60s``) leaves most steps empty: warm-up
    takes that many times longer and breaches report late ``started`` times. Denser but not a
    whole number of points per step makes sums and counts jump from step to step.
    """
    import numpy as np

    if len(points) < 2:
        return []
    index = {k: i for i, k in enumerate(points.series)}
    codes = np.fromiter((index[k] for k in points.keys), dtype=np.int64, count=len(points))
    order = np.lexsort((points.time, codes))
    c, t = codes[order], points.time[order]
    gaps = np.diff(t)
    keep = (c[1:] == c[:-1]) & (gaps > 0)
    c, gaps = c[1:][keep], gaps[keep]
    if not len(c):
        return []
    starts = np.flatnonzero(np.r_[True, c[1:] != c[:-1]])
    keys = list(points.series)
    groups: dict[tuple[str, float, float, str], list[str]] = {}
    for lo, hi in zip(starts, [*starts[1:], len(c)], strict=True):
        if hi - lo < min_gaps:
            continue
        key = keys[c[lo]]
        metric, labels = points.series[key]
        ri = cfg.rule_for(metric, dict(labels))
        if ri is None or cfg.rules[ri].step is None:
            continue
        step, spacing = cfg.rules[ri].step, float(np.median(gaps[lo:hi]))
        ratio = step / spacing
        if spacing > step * 1.1:
            kind = "sparse"
        elif abs(ratio - round(ratio)) > 0.1:
            kind = "uneven"
        else:
            continue
        groups.setdefault((cfg.rules[ri].name, step, round(spacing, 3), kind), []).append(key)
    out = []
    for (rule, step, spacing, kind), series in sorted(groups.items()):
        some = ", ".join(series[:examples]) + (", ..." if len(series) > examples else "")
        what = (f"{len(series)} series of rule {rule!r} ({some}) have a point every "
                f"{_duration_text(spacing)} but the rule's step is {_duration_text(step)}")
        if kind == "sparse":
            empty = 1 - step / spacing
            why = (f"about {empty:.0%} of steps are empty, so warm-up takes {spacing / step:.3g}x longer "
                   "and breaches report late 'started' times")
        else:
            why = "steps get an uneven number of points, so sums and counts jump from step to step"
        out.append(f"warning: {what}: {why}; set `step: auto` or `step: {_duration_text(spacing)}` "
                   "in the rule")
    return out


def cmd_replay(args: argparse.Namespace) -> int:
    """Exit codes: 0 done, 2 usage or config problem, 3 an input is empty, 4 an input has no
    usable record. Output paths and formats are checked before any input is read."""
    from streamdet.codecs import format_for_path
    from streamdet.core.points import PointBatch
    from streamdet.plots import plot_series
    from streamdet.replay import ProgressBar, format_summary, read_inputs, replay, write_events

    try:
        cfg = _load(args.config)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return REPLAY_USAGE
    problems = _output_problems(args)
    for path in args.inputs:
        try:
            if args.format is None:
                format_for_path(path)
        except ValueError as exc:
            problems.append(str(exc))
    if problems:
        for p in problems:
            print(f"streamdet replay: {p}", file=sys.stderr)
        return REPLAY_USAGE
    now = time.time()
    batches, errors, records, empty, unusable = [], [], 0, [], []
    for path in args.inputs:
        try:
            points, errs, n = read_inputs([path], cfg, fmt=args.format, now=now)
        except OSError as exc:
            print(f"streamdet replay: {path}: cannot read ({exc.strerror or exc})", file=sys.stderr)
            return REPLAY_USAGE
        if n == 0:
            empty.append(path)
        elif len(points) == 0:
            unusable.append((path, n, errs))
        batches.append(points)
        errors.extend(errs)
        records += n
    if empty or unusable:
        for path in empty:
            print(f"streamdet replay: {path}: no records (empty file?)", file=sys.stderr)
        for path, n, errs in unusable:
            print(f"streamdet replay: {path}: none of its {n:,} record(s) is usable; first: {errs[0]}",
                  file=sys.stderr)
        return REPLAY_ALL_BAD if unusable else REPLAY_EMPTY
    inputs = (PointBatch.concat(batches), errors, records)
    for line in _spacing_warnings(inputs[0], cfg):
        print(line, file=sys.stderr)
    try:
        result = replay(args.inputs, cfg, fmt=args.format, record_steps=bool(args.plot),
                        now=now, progress=ProgressBar(), inputs=inputs)
    except (OSError, ValueError) as exc:
        print(f"streamdet replay: {exc}", file=sys.stderr)
        return REPLAY_USAGE
    if args.events == "-":
        write_events(result.events, sys.stdout.buffer, config=cfg)
        sys.stdout.flush()
    elif args.events:
        with open(args.events, "wb") as fh:
            write_events(result.events, fh, config=cfg)
    if args.alertmanager:
        _post_replay_alerts(args.alertmanager, cfg, result.events)
    print(format_summary(result), file=sys.stderr if args.events == "-" else sys.stdout)
    if args.plot:
        last = float(result.engine.clock) if math.isfinite(result.engine.clock) else 0.0
        since, until = (_plot_time(args.since, last), _plot_time(args.until, last))  # checked above
        paths = plot_series(result.engine, result.events, args.plot, since=since, until=until)
        print(f"plots: {len(paths)} PNG file(s) and index.html in {args.plot}",
              file=sys.stderr if args.events == "-" else sys.stdout)
    if args.plot:  # --- peer groups that had an outlier (issue 8)
        from streamdet.group_plots import plot_groups

        groups = plot_groups(result.engine, result.events, args.plot)
        if groups:
            print(f"plots: {len(groups)} PNG file(s) of peer groups with an outlier (group-*.png) in "
                  f"{args.plot}", file=sys.stderr if args.events == "-" else sys.stdout)
    return REPLAY_OK


# --- series bands and plots (issue 10): --since/--until for plots, `streamdet show`
def _plot_time(text: str | None, end: float) -> float | None:
    """``--since``/``--until``: an ISO 8601 time (UTC unless it names an offset) or a duration
    back from the end of the data (``2d``: the last two days). Raises ValueError."""
    if text is None:
        return None
    try:
        return end - parse_duration(text)
    except (ValueError, TypeError):
        pass
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"{text!r} is neither a time (2024-05-01T12:00Z) nor a duration (2d)") from None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.timestamp()


def cmd_show(args: argparse.Namespace) -> int:
    """The band of one series from history files: an SVG (or a PNG) of its last ``--hours``."""
    from streamdet.band_svg import band_svg
    from streamdet.core.recent import RecentBand
    from streamdet.plots import breaches_by_series, plot_series, safe_name
    from streamdet.replay import replay

    def fail(msg: str) -> int:
        print(f"streamdet show: {msg}", file=sys.stderr)
        return 2

    try:
        cfg = _load(args.config)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    out = Path(args.out or f"{safe_name(args.series)}.svg")
    if out.suffix.lower() not in (".svg", ".png"):
        return fail(f"--out {out}: must end in .svg or .png")
    if not (args.hours > 0 and math.isfinite(args.hours)):
        return fail(f"--hours: must be a positive number, got {args.hours}")
    try:
        result = replay(args.inputs, cfg, fmt=args.format, record_steps=True)
    except (OSError, ValueError) as exc:
        return fail(str(exc))
    eng = result.engine
    row = eng.table.index.get(args.series)
    if row is None:
        near = sorted(k for k in eng.table.index if args.series in k)[:5]
        return fail(f"no series {args.series!r} in the input"
                    + (f"; did you mean one of {near}?" if near else ""))
    cols = eng.log.columns()
    sel = cols["row"] == row
    if not sel.any():
        return fail(f"{args.series!r} has no closed step yet")
    step = float(eng.table.step[row])
    since = float(cols["start"][sel][-1]) + step - args.hours * 3600.0
    sel &= cols["start"] >= since
    if out.suffix.lower() == ".png":
        tmp = out.parent / f".{out.stem}.tmp"
        paths = plot_series(eng, result.events, tmp, keys=[args.series], since=since, index=False)
        paths[0].replace(out)
        tmp.rmdir()
    else:
        band = RecentBand(args.series, cols["start"][sel], *(cols[n][sel] for n in
                                                              ("observed", "expected", "lower", "upper")),
                          np.zeros(int(sel.sum()), np.int8), step, eng.table.units.get(row))
        end = float(cols["start"].max()) + step
        band.breaches = [(b.start, math.inf if b.still_open else b.end, 1 if b.direction == "above" else -1)
                         for b in breaches_by_series(result.events, end).get(args.series, [])]
        out.write_text(band_svg(band), encoding="utf-8")
    print(f"{out}: {args.series}, {int(sel.sum())} step(s), "
          f"{len(breaches_by_series(result.events, 0).get(args.series, []))} breach(es) in the input")
    return 0
# --- end series bands and plots


def _post_replay_alerts(url: str, cfg: Config, events) -> None:
    """Post a replay's events to Alertmanager (``--alertmanager URL``) and report the counts."""
    from prometheus_client import CollectorRegistry

    from streamdet.alerting.alertmanager import AlertmanagerSink, parse_alertmanager
    from streamdet.alerting.routing import Encoder
    from streamdet.config import _Section
    from streamdet.daemon.health import Metrics

    problems: list[str] = []
    settings = parse_alertmanager(_Section({"url": url}, "--alertmanager", problems))
    if problems or settings is None:
        print("streamdet replay: " + "; ".join(problems), file=sys.stderr)
        return
    settings = dataclasses.replace(settings, queue_size=max(settings.queue_size, len(events) + 1))
    metrics = Metrics(CollectorRegistry())
    sink = AlertmanagerSink(settings, encoder=Encoder(cfg), metrics=metrics).start()
    sink.submit(events)
    sink.close(timeout=15.0)
    get = metrics.registry.get_sample_value
    sent = {s: int(get("streamdet_alertmanager_alerts_sent_total", {"state": s}) or 0)
            for s in ("firing", "resolved")}
    failed = sum(int(get("streamdet_alertmanager_post_failures_total", {"reason": r}) or 0)
                 for r in ("connection", "timeout", "server_error", "http_error", "refused"))
    print(f"alertmanager: {sent['firing']} firing and {sent['resolved']} resolved alert(s) posted to "
          f"{settings.url}" + (f"; {failed} failed post(s), see the log" if failed else ""), file=sys.stderr)


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
    if args.accept_state_changes:
        settings = dataclasses.replace(settings, on_rule_change="drop")
    from streamdet.shadow.settings import parse_shadow

    try:
        parse_shadow(cfg)
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    daemon = Daemon(cfg, settings, metrics=Metrics(CollectorRegistry()), events_file=args.events_file,
                    fresh_partitions=args.fresh_partition or (), shadow=True if args.shadow else None)
    return daemon.run()


def cmd_warm(args: argparse.Namespace) -> int:
    """Build each input partition's state from history; exit 0 done, 2 bad input or broker trouble."""
    from confluent_kafka import KafkaException

    from streamdet.config import parse_duration
    from streamdet.daemon.settings import load_with_environment
    from streamdet.daemon.state_store import LocalStateStore
    from streamdet.warm import topic_layout, warm_from_files, warm_from_topic

    def fail(msg: str) -> int:
        print(f"streamdet warm: {msg}", file=sys.stderr)
        return 2

    try:
        cfg, settings = load_with_environment(args.config)
    except ConfigError as exc:
        return fail(str(exc))
    if args.topic is None and len(settings.input_topics) != 1:
        return fail(f"kafka.input_topics has {len(settings.input_topics)} topics; say which with --topic")
    topic = args.topic or settings.input_topics[0]
    conf = {k: v for k, v in settings.consumer_properties().items() if k != "partition.assignment.strategy"}
    conf["group.id"] = f"{settings.group_id}-warm"
    now = time.time()
    store = LocalStateStore(settings.state_dir)
    try:
        layout = topic_layout(conf, topic)
        existing = [str(store.path(topic, p)) for p in layout if store.path(topic, p).exists()]
        if existing and not args.force:
            return fail(f"checkpoints exist ({', '.join(existing[:3])}); --force replaces them")
        if args.from_files:
            result = warm_from_files(cfg, args.from_files, store=store, topic=topic,
                                     offsets={p: high for p, (_low, high) in layout.items()},
                                     partitioner=args.partitioner, fmt=args.format, now=now)
        else:
            try:
                since = parse_duration(args.since)
            except ValueError as exc:
                return fail(f"--since: {exc}")
            result = warm_from_topic(cfg, conf, args.from_topic, store=store, topic=topic, since=since,
                                     now=now, partitioner=args.partitioner)
    except (RuntimeError, KafkaException) as exc:
        return fail(str(exc))
    except OSError as exc:
        return fail(f"{exc.filename or ''}: cannot read ({exc.strerror or exc})")
    for e in result.errors[:10]:
        print(f"warning: bad record {e}", file=sys.stderr)
    if len(result.errors) > 10:
        print(f"warning: ... {len(result.errors) - 10} more bad records", file=sys.stderr)
    print(f"warmed {result.points:,} points in {result.seconds:.2f} s "
          f"({result.points_per_second:,.0f} points/s); {len(result.errors)} bad record(s) skipped")
    for p, (series, offset) in sorted(result.partitions.items()):
        print(f"  {topic}:{p}  {series} series, live from offset {offset}  -> {store.path(topic, p)}")
    return 0


def _demo(args: argparse.Namespace) -> int:
    from streamdet import demo

    if args.shadow:
        return demo.run_shadow_demo(args.out, args.bootstrap_servers)
    return demo.run_demo(args.out, args.bootstrap_servers, args.produce_only, fmt=args.format)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="streamdet", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("replay", help="run the detector over history files in time order",
                       epilog="exit codes: 0 done; 2 bad config, unknown format, unreadable input or "
                              "unusable --events/--plot path (checked before reading); 3 an input is "
                              "empty; 4 an input has no usable record (e.g. a CSV without `value`)")
    p.add_argument("inputs", nargs="+", help="CSV, JSON lines (.jsonl) or line-protocol (.lp) files")
    p.add_argument("--config", "-c", help="YAML config (default: built-in defaults)")
    p.add_argument("--events", "-e", help="write events as CloudEvents JSON lines here ('-' = stdout)")
    p.add_argument("--plot", metavar="DIR", help="write a PNG per series that breached into DIR, "
                   "and index.html listing them with their breaches")
    p.add_argument("--since", help="plots start here: a time (2024-05-01T00:00Z) or a duration back "
                   "from the end of the data (2d)")
    p.add_argument("--until", help="plots end here (same forms as --since)")
    p.add_argument("--format", choices=FORMATS,
                   help="input format (default: from each file's extension, .otlp.json and .pb for "
                        "OTLP; required for others, e.g. .txt or Telegraf JSON)")
    p.add_argument("--alertmanager", metavar="URL",
                   help="also post the events to this Alertmanager (firing and resolved alerts)")
    p.set_defaults(func=cmd_replay)
    sh_ = sub.add_parser("show", help="the band of one series from history files, as SVG or PNG")
    sh_.add_argument("series", help="the series key, e.g. 'requests{host=\"a\"}'")
    sh_.add_argument("--from", dest="inputs", nargs="+", required=True, metavar="FILE",
                     help="history files (as for replay)")
    sh_.add_argument("--config", "-c", help="YAML config (default: built-in defaults)")
    sh_.add_argument("--format", choices=FORMATS, help="input format (default: from the extension)")
    sh_.add_argument("--hours", type=float, default=48.0, help="how much of the end to show (48)")
    sh_.add_argument("--out", "-o", help="FILE.svg or FILE.png (default: the series' name .svg)")
    sh_.set_defaults(func=cmd_show)
    r = sub.add_parser("run", help="run the Kafka daemon until SIGTERM")
    r.add_argument("--config", "-c", help="YAML config; STREAMDET_* environment variables override it")
    r.add_argument("--events-file", help="write events as JSON lines here instead of the output topic")
    r.add_argument("--fresh-partition", action="append", type=_partition, metavar="TOPIC:PARTITION",
                   help="discard that partition's checkpoint and start it fresh (repeatable)")
    r.add_argument("--accept-state-changes", action="store_true",
                   help="restore checkpoints even if renamed or removed rules drop series, or a "
                        "changed step or kind resets their learning (state.on_rule_change: drop)")
    r.add_argument("--log-format", choices=("text", "json"), help="log format (default: logging.format)")
    r.add_argument("--shadow", action="store_true",
                   help="shadow mode: events to shadow.topic marked shadow=true, compared with "
                        "existing alerts")
    r.set_defaults(func=cmd_run)
    d = sub.add_parser("demo", help="a fictional shop's metrics through a local broker and the daemon")
    d.add_argument("--out", default="demo-out", help="where plots and demo state go")
    d.add_argument("--bootstrap-servers", help="use this Kafka instead of starting the bundled broker")
    d.add_argument("--produce-only", action="store_true", help="only produce the scenario's points")
    d.add_argument("--format", choices=("json", "otlp_proto", "otlp_json"), default="json",
                   help="how the scenario is put on the topic (OTLP: as the Collector's Kafka "
                        "exporter writes it)")
    d.add_argument("--shadow", action="store_true",
                   help="warm start from the history, then the live day in shadow mode beside made-up alerts")
    d.set_defaults(func=_demo)
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
    v.add_argument("--format", choices=FORMATS,
                   help="input format (default: from each file's extension)")
    v.set_defaults(func=cmd_evaluate)
    t = sub.add_parser("tail", help="follow breach events (output topic or events file) as readable lines")
    from streamdet.alerting import tail as tail_mod

    tail_mod.add_arguments(t)
    t.set_defaults(func=tail_mod.main)
    w = sub.add_parser("warm", help="build the daemon's state from history (no events), per input partition")
    w.add_argument("--config", "-c", required=True, help="YAML config (rules, kafka, state.dir)")
    src = w.add_mutually_exclusive_group(required=True)
    src.add_argument("--from", dest="from_files", nargs="+", metavar="FILE", help="history files")
    src.add_argument("--from-topic", metavar="TOPIC", help="history from this Kafka topic (with --since)")
    w.add_argument("--since", default="6w", help="with --from-topic: how far back to read (6w)")
    w.add_argument("--topic", help="the input topic to warm (default: the only kafka.input_topics entry)")
    w.add_argument("--partitioner", choices=("crc32", "murmur2"), default="crc32",
                   help="how producers pick partitions from the series key: crc32 (librdkafka's "
                        "default) or murmur2 (Java's default)")
    w.add_argument("--format", choices=("csv", "json", "influx"), help="format of the history files")
    w.add_argument("--force", action="store_true", help="replace existing checkpoints")
    w.set_defaults(func=cmd_warm)
    sh = sub.add_parser("shadow", help="compare streamdet with the alerts you already have")
    shsub = sh.add_subparsers(dest="shadow_command", required=True)
    rep = shsub.add_parser("report", help="tables per rule and series, and an HTML timeline page",
                           epilog="without --events/--alerts it reads the daemon's comparison state "
                                  "(shadow-comparison.json in state.dir); exit codes: 0 done, 2 bad input")
    rep.add_argument("--config", "-c", help="YAML config (shadow.match, shadow.slack, state.dir)")
    rep.add_argument("--since", default="7d", help="how far back from the end to compare (7d)")
    rep.add_argument("--until", help="end of the comparison (default: the latest time seen)")
    rep.add_argument("--events", nargs="+", metavar="FILE", help="streamdet events (CloudEvents JSON lines)")
    rep.add_argument("--alerts", nargs="+", metavar="FILE",
                     help="existing alerts: Alertmanager webhook payloads, one per line")
    rep.add_argument("--data", nargs="+", metavar="FILE", help="metric history, to draw the observed values")
    rep.add_argument("--format", choices=("csv", "json", "influx"), help="format of the --data files")
    rep.add_argument("--slack", help="override shadow.slack (15m)")
    rep.add_argument("--html", metavar="FILE", help="write the self-contained HTML page here")
    rep.set_defaults(func=lambda a: __import__("streamdet.shadow.report", fromlist=["run_report"])
                     .run_report(a))
    c = sub.add_parser("check", help="validate a config file (exit code 2 on errors)")
    c.add_argument("config")
    c.add_argument("--state", metavar="DIR", help="also restore the checkpoints in DIR against the "
                   "config and report series a changed rule would drop or reset")
    c.set_defaults(func=cmd_check)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
