"""`streamdet shadow report`: the comparison as tables and as one self-contained HTML page.

Inputs are either the daemon's comparison state (``shadow-comparison.json`` in ``state.dir``) or
files: streamdet's events (CloudEvents JSON lines) and existing alerts (webhook payloads, one per
line), optionally with the metric history (any replay format) to draw the observed values. The
page is inline SVG and CSS only, no JavaScript: each series gets a timeline with the existing
alerts as amber bars on a lane above the values and streamdet's breaches as teal bars below.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import orjson

from streamdet.codecs.common import RecordError, parse_time
from streamdet.events import CLOSED, OPENED, rfc3339
from streamdet.shadow.book import Comparison, ShadowBook
from streamdet.shadow.compare import BOTH, Interval, Tally


def read_event_file(path: str | Path, book: ShadowBook) -> list[str]:
    """Opened and closed events of a CloudEvents JSON-lines file into the book; other types
    (summaries) are skipped; each bad line is reported with its number and reason."""
    errors = []
    with open(path, "rb") as fh:
        for n, line in enumerate(fh, 1):
            if not line.strip():
                continue
            where = f"{path}:{n}"
            try:
                doc = orjson.loads(line)
                if not isinstance(doc, dict):
                    raise ValueError("not a JSON object")
                if doc.get("type") not in (OPENED, CLOSED):
                    continue
                data = doc["data"]
                labels = data["labels"]
                if not isinstance(labels, dict):
                    raise ValueError("data.labels is not an object")
                book.add_event(type_=doc["type"], id_=str(doc["id"]), series=str(doc["subject"]),
                               metric=str(data["metric"]), labels={str(k): str(v) for k, v in labels.items()},
                               rule=str(data["rule"]), time=parse_time(doc["time"]),
                               started=parse_time(data["started"]), opened_id=data.get("opened_id"))
            except orjson.JSONDecodeError as exc:
                errors.append(f"{where}: not valid JSON ({exc})")
            except KeyError as exc:
                errors.append(f"{where}: missing field {exc.args[0]!r}")
            except (ValueError, TypeError, RecordError) as exc:
                errors.append(f"{where}: {exc}")
    return errors


# ---------------------------------------------------------------- text


def _minutes(seconds: float | None) -> str:
    return "-" if seconds is None else f"{seconds / 60:+.1f}"


def _row(name: str, t: Tally) -> list[str]:
    return [name, str(t.both), str(t.only_theirs), str(t.only_ours), _minutes(t.median_lead),
            f"{t.theirs_minutes:.0f}", f"{t.ours_minutes:.0f}"]


HEADER = ["", "both", "only theirs", "only ours", "median lead (min)", "their alert-min", "our alert-min"]


def _table(rows: list[list[str]]) -> str:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for k, r in enumerate(rows):
        lines.append("  ".join(c.ljust(w) if i == 0 else c.rjust(w)
                               for i, (c, w) in enumerate(zip(r, widths, strict=True))))
        if k == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def format_report(c: Comparison) -> str:
    """Per rule and per series: both / only theirs / only ours, median lead, alert-minutes."""
    since = rfc3339(c.since) if math.isfinite(c.since) else "the start"
    out = [f"shadow comparison from {since} to {rfc3339(c.horizon)} "
           "(lead: streamdet's start minus theirs; negative = streamdet earlier)", ""]
    out.append(_table([["rule", *HEADER[1:]]]
                      + [_row(r, t) for r, t in sorted(c.rules.items())] + [_row("all", c.total)]))
    out.append("")
    out.append(_table([["series", *HEADER[1:]]] + [_row(k, s.tally) for k, s in c.series.items()]))
    if c.unmatched:
        out.append("")
        out.append(f"{len(c.unmatched)} alert(s) match no known series (see shadow.match):")
        for a in c.unmatched[:20]:
            labels = ",".join(f"{k}={v}" for k, v in sorted(a.labels.items()))
            out.append(f"  {rfc3339(a.start)}  {labels}")
    return "\n".join(out)


# ---------------------------------------------------------------- HTML

_CSS = """
body{font:15px/1.45 Georgia,'Times New Roman',serif;margin:2rem auto;max-width:1000px;color:#1b2a41;
background:#fbf8f1}
h1{font-weight:normal;border-bottom:3px double #1b2a41;padding-bottom:.3rem}
h2{font:600 14px/1.3 'Courier New',monospace;margin:2rem 0 .3rem;color:#324a5f}
table{border-collapse:collapse;margin:.5rem 0 1rem}
td,th{padding:.2rem .7rem;border-bottom:1px solid #d8cfbd;text-align:right}
td:first-child,th:first-child{text-align:left;font-family:'Courier New',monospace}
.key span{display:inline-block;width:1.6em;height:.8em;margin:0 .3em 0 1em;vertical-align:middle}
svg{background:#fffdf8;border:1px solid #d8cfbd}
.theirs{fill:#d98e04}.ours{fill:#0f8b8d}.only{fill-opacity:.55;stroke-dasharray:3 2;stroke:#1b2a41}
.value{fill:none;stroke:#324a5f;stroke-width:1.2}.lane{font:11px 'Courier New',monospace;fill:#324a5f}
.axis{font:10px 'Courier New',monospace;fill:#6b7a8f}.tick{stroke:#e6dcc8}
"""

W, H = 960, 200
LEFT, RIGHT = 70, 10
THEIR_Y, OUR_Y, LANE_H = 8, 168, 18
PLOT_TOP, PLOT_BOTTOM = 34, 158
MAX_POINTS = 1500


def _bars(intervals: Sequence[Interval], kinds: Mapping[int, str], side: str, x, y: int,
          h: float) -> list[str]:
    out = []
    for iv in intervals:
        kind = kinds.get(id(iv), BOTH)
        x0, x1 = x(iv.start), x(iv.end_at(h))
        end = rfc3339(iv.end) if iv.end is not None else "still open"
        cls = f"bar {side}" + ("" if kind == BOTH else " only")
        out.append(f'<rect class="{cls}" data-kind="{kind}" data-start="{rfc3339(iv.start)}" '
                   f'x="{x0:.1f}" y="{y}" width="{max(x1 - x0, 2.0):.1f}" height="{LANE_H}">'
                   f"<title>{side}: {html.escape(iv.name)} {rfc3339(iv.start)} .. {end} ({kind})</title>"
                   "</rect>")
    return out


def series_svg(key: str, comparison: Comparison, values: tuple[np.ndarray, np.ndarray] | None) -> str:
    s = comparison.series[key]
    h = comparison.horizon
    theirs = [i for inc in s.incidents for i in inc.theirs]
    ours = [i for inc in s.incidents for i in inc.ours]
    kinds = {id(i): inc.kind for inc in s.incidents for i in (*inc.theirs, *inc.ours)}
    starts = [i.start for i in (*theirs, *ours)]
    lo = comparison.since if math.isfinite(comparison.since) else min(starts)
    t = v = None
    if values is not None and len(values[0]):
        keep = (values[0] >= lo) & (values[0] <= h)
        t, v = values[0][keep], values[1][keep]
        if len(t):
            lo = min(lo, float(t[0]))
    hi = max(h, lo + 1.0)

    def x(when: float) -> float:
        return LEFT + (min(max(when, lo), hi) - lo) / (hi - lo) * (W - LEFT - RIGHT)

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {H}" width="{W}" height="{H}" '
             f'role="img" aria-label="timeline of {html.escape(key)}">']
    for k in range(7):
        when = lo + (hi - lo) * k / 6
        xx = x(when)
        parts.append(f'<line class="tick" x1="{xx:.1f}" x2="{xx:.1f}" y1="{PLOT_TOP}" y2="{PLOT_BOTTOM}"/>')
        anchor = "start" if k == 0 else "end" if k == 6 else "middle"
        parts.append(f'<text class="axis" x="{xx:.1f}" y="{H - 1}" text-anchor="{anchor}">'
                     f"{rfc3339(when)[5:16].replace('T', ' ')}</text>")
    parts.append(f'<text class="lane" x="4" y="{THEIR_Y + 13}">theirs</text>')
    parts.append(f'<text class="lane" x="4" y="{OUR_Y + 13}">ours</text>')
    if t is not None and len(t):
        if len(t) > MAX_POINTS:
            idx = np.linspace(0, len(t) - 1, MAX_POINTS).astype(int)
            t, v = t[idx], v[idx]
        vmin, vmax = float(np.min(v)), float(np.max(v))
        span = vmax - vmin or 1.0

        def y(val: float) -> float:
            return PLOT_BOTTOM - (val - vmin) / span * (PLOT_BOTTOM - PLOT_TOP)

        pts = " ".join(f"{x(float(a)):.1f},{y(float(b)):.1f}" for a, b in zip(t, v, strict=True))
        parts.append(f'<polyline class="value" points="{pts}"/>')
        for val, yy in ((vmax, PLOT_TOP + 8), (vmin, PLOT_BOTTOM)):
            parts.append(f'<text class="axis" x="{LEFT - 4}" y="{yy}" text-anchor="end">{val:.4g}</text>')
    else:
        parts.append(f'<text class="axis" x="{W / 2}" y="{(PLOT_TOP + PLOT_BOTTOM) / 2}" '
                     'text-anchor="middle">no values given (pass --data)</text>')
    parts += _bars(theirs, kinds, "theirs", x, THEIR_Y, h)
    parts += _bars(ours, kinds, "ours", x, OUR_Y, h)
    parts.append("</svg>")
    return "".join(parts)


def html_page(c: Comparison, values: Mapping[str, tuple[np.ndarray, np.ndarray]]) -> str:
    """One self-contained page: tables, then a timeline per series. No scripts."""
    def table(title: str, rows: list[tuple[str, Tally]]) -> str:
        head = "".join(f"<th>{html.escape(x)}</th>" for x in [title, *HEADER[1:]])
        body = "".join("<tr>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in _row(n, t)) + "</tr>"
                       for n, t in rows)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

    since = rfc3339(c.since) if math.isfinite(c.since) else "the start"
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           "<title>streamdet shadow report</title>", f"<style>{_CSS}</style></head><body>",
           "<h1>streamdet beside your alerts</h1>",
           f"<p>From {since} to {rfc3339(c.horizon)}. Lead is streamdet's start minus the existing "
           "alert's (negative: streamdet was earlier). Dashed bars met nothing on the other side.</p>",
           '<p class="key"><span style="background:#d98e04"></span>existing alert'
           '<span style="background:#0f8b8d"></span>streamdet breach'
           '<span style="border-top:2px solid #324a5f;height:0"></span>observed value</p>',
           table("rule", [*sorted(c.rules.items()), ("all", c.total)]),
           table("series", [(k, s.tally) for k, s in c.series.items()])]
    if c.unmatched:
        def label_text(labels: Mapping[str, str]) -> str:
            return html.escape(",".join(f"{k}={v}" for k, v in sorted(labels.items())))

        items = "".join(f"<li><code>{html.escape(rfc3339(a.start))} {label_text(a.labels)}</code></li>"
                        for a in c.unmatched[:50])
        out.append(f"<h2>{len(c.unmatched)} alert(s) match no known series</h2><ul>{items}</ul>")
    for n, key in enumerate(c.series):
        out.append(f'<section id="series-{n}" data-series="{html.escape(key)}">'
                   f"<h2>{html.escape(key)}</h2>{series_svg(key, c, values.get(key))}</section>")
    out.append("</body></html>")
    return "\n".join(out)


def values_by_series(points) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Sorted (times, values) per series key of a PointBatch."""
    out: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    if not len(points):
        return out
    keys = np.asarray(points.keys)
    for key in np.unique(keys):
        sel = keys == key
        order = np.argsort(points.time[sel], kind="stable")
        out[str(key)] = (points.time[sel][order], points.value[sel][order])
    return out


# ---------------------------------------------------------------- command line


def run_report(args) -> int:
    """``streamdet shadow report``; exit codes: 0 done, 2 bad arguments, config or input."""
    import sys
    import time

    from streamdet.config import ConfigError, load_config, parse_config, parse_duration
    from streamdet.shadow.alerts_in import read_alert_file
    from streamdet.shadow.runtime import STATE_FILE
    from streamdet.shadow.settings import parse_shadow

    def fail(msg: str) -> int:
        print(f"streamdet shadow report: {msg}", file=sys.stderr)
        return 2

    try:
        cfg = load_config(args.config) if args.config else parse_config({})
        settings = parse_shadow(cfg)
    except ConfigError as exc:
        return fail(str(exc))
    try:
        since = parse_duration(args.since)
        slack = settings.slack if args.slack is None else parse_duration(args.slack)
        until = None if args.until is None else parse_time(args.until)
    except (ValueError, RecordError) as exc:
        return fail(f"--since/--slack/--until: {exc}")
    if since <= 0 or slack < 0:
        return fail("--since must be > 0 and --slack >= 0")
    warnings: list[str] = []
    if args.events or args.alerts:
        book = ShadowBook(match=settings.match, slack=slack)
        try:
            for path in args.events or ():
                warnings += read_event_file(path, book)
            for path in args.alerts or ():
                alerts, errs = read_alert_file(path)
                warnings += errs
                book.add_alerts(alerts)
        except OSError as exc:
            return fail(f"{exc.filename}: cannot read ({exc.strerror})")
    else:
        from streamdet.daemon.settings import parse_settings

        state = Path(parse_settings(cfg).state_dir) / STATE_FILE
        try:
            book = ShadowBook.from_dict(orjson.loads(state.read_bytes()), match=settings.match, slack=slack)
        except FileNotFoundError:
            return fail(f"{state}: no comparison state; run the daemon in shadow mode or pass "
                        "--events and --alerts files")
        except (OSError, ValueError, KeyError, TypeError, IndexError, AttributeError) as exc:
            return fail(f"{state}: unusable comparison state ({exc})")
    values: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    if args.data:
        from streamdet.replay import read_inputs

        try:
            points, errs, _n = read_inputs(args.data, cfg, fmt=args.format, now=time.time())
        except (OSError, ValueError) as exc:
            return fail(f"--data: {exc}")
        warnings += [str(e) for e in errs]
        values = values_by_series(points)
        known = []
        for k, (m, lab) in points.series.items():
            ri = cfg.rule_for(m, dict(lab))
            known.append((k, m, dict(lab), cfg.rules[ri].name if ri is not None else "?"))
        book.add_series(known)
    horizon = until if until is not None else book.latest
    if not math.isfinite(horizon):
        return fail("nothing to compare: no events and no alerts were read")
    comparison = book.compare(since=horizon - since, horizon=horizon)
    for w in warnings[:10]:
        print(f"warning: {w}", file=sys.stderr)
    if len(warnings) > 10:
        print(f"warning: ... and {len(warnings) - 10} more", file=sys.stderr)
    print(format_report(comparison))
    if args.html:
        try:
            Path(args.html).write_text(html_page(comparison, values), encoding="utf-8")
        except OSError as exc:
            return fail(f"--html {args.html}: cannot write ({exc.strerror})")
        print(f"\nHTML: {args.html}")
    return 0
