"""A series' recent band as one self-contained SVG (no matplotlib: safe on the HTTP thread).

Drawn from a :class:`streamdet.core.recent.RecentBand`: the band as a soft blue ribbon, the
expected value as a dashed blue line, the observed value in near-black, breach periods as light
orange spans with a dark orange triangle at each opening (at least 3 px wide, so a one-step breach
stays visible over weeks), muted periods (if a caller passes any) as grey hatching. Times are UTC.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import UTC, datetime
from html import escape

import numpy as np

from streamdet.core.recent import RecentBand

BAND_FILL = "#cfe0f5"
EXPECTED_LINE = "#3b6ea8"
OBSERVED_LINE = "#1c1f2e"
BREACH_FILL = "#f8d2b0"
BREACH_MARK = "#b4540a"
MUTED_FILL = "#9aa0a6"
WIDTH, HEIGHT = 960, 320
LEFT, RIGHT, TOP, BOTTOM = 64, 16, 34, 64
MIN_SPAN_PX = 3.0


def _nice_ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo] if math.isfinite(lo) else []
    raw = (hi - lo) / n
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step) * step
    return [first + i * step for i in range(int((hi - first) / step) + 1)]


def _time_ticks(t0: float, t1: float) -> tuple[list[float], str]:
    span = max(t1 - t0, 1.0)
    for size, fmt in ((300, "%H:%M"), (900, "%H:%M"), (3600, "%H:%M"), (3 * 3600, "%d %b %H:%M"),
                      (6 * 3600, "%d %b %H:%M"), (12 * 3600, "%d %b %H:%M"), (86400, "%d %b"),
                      (2 * 86400, "%d %b"), (7 * 86400, "%d %b"), (30 * 86400, "%b %Y")):
        if span / size <= 8:
            first = math.ceil(t0 / size) * size
            return [first + i * size for i in range(int((t1 - first) / size) + 1)], fmt
    size = span / 6
    return [t0 + i * size for i in range(7)], "%Y-%m-%d"


def _fmt(v: float) -> str:
    a = abs(v)
    if a >= 1e6 or (0 < a < 1e-3):
        return f"{v:.3g}"
    return f"{v:,.4g}" if a < 1e4 else f"{v:,.0f}"


def _path(x: np.ndarray, y: np.ndarray) -> str:
    """Polyline segments, broken at NaN."""
    parts: list[str] = []
    pen = False
    for xi, yi in zip(x.tolist(), y.tolist(), strict=True):
        if math.isnan(yi):
            pen = False
            continue
        parts.append(f"{'L' if pen else 'M'}{xi:.1f},{yi:.1f}")
        pen = True
    return "".join(parts)


def band_svg(band: RecentBand, *, muted: Sequence[tuple[float, float]] = (),
             title: str | None = None) -> str:
    """The SVG text for ``band`` (an empty band gives a frame saying so)."""
    w, h = WIDTH - LEFT - RIGHT, HEIGHT - TOP - BOTTOM
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{WIDTH}" height="{HEIGHT}" '
           f'viewBox="0 0 {WIDTH} {HEIGHT}" font-family="sans-serif" font-size="11">',
           '<rect width="100%" height="100%" fill="white"/>',
           '<defs><pattern id="mute" width="6" height="6" patternUnits="userSpaceOnUse" '
           f'patternTransform="rotate(45)"><rect width="2" height="6" fill="{MUTED_FILL}" '
           'fill-opacity="0.5"/></pattern></defs>',
           f'<text x="{LEFT}" y="18" font-size="13">{escape(title or band.key)}</text>']
    n = band.start.shape[0]
    if n == 0:
        out.append(f'<text x="{LEFT}" y="{TOP + h / 2:.0f}" fill="#555">no judged steps kept for '
                   'this series yet</text></svg>')
        return "".join(out)
    t0, t1 = float(band.start[0]), float(band.start[-1]) + band.step
    cols = [band.observed, band.expected, band.lower, band.upper]
    finite = np.concatenate([c[np.isfinite(c)] for c in cols])
    lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    pad = (hi - lo) * 0.06 or max(abs(hi) * 0.06, 1.0)
    lo, hi = lo - pad, hi + pad

    def fx(t):
        return LEFT + (np.asarray(t, dtype=np.float64) - t0) / (t1 - t0) * w

    def fy(v):
        return TOP + (hi - np.asarray(v, dtype=np.float64)) / (hi - lo) * h

    mid = band.start + band.step / 2
    xs = fx(mid)
    # axes and grid
    for v in _nice_ticks(lo, hi):
        y = float(fy(v))
        out.append(f'<line x1="{LEFT}" x2="{LEFT + w}" y1="{y:.1f}" y2="{y:.1f}" stroke="#eceff3"/>'
                   f'<text x="{LEFT - 6}" y="{y + 4:.1f}" text-anchor="end" fill="#444">{_fmt(v)}</text>')
    ticks, fmt = _time_ticks(t0, t1)
    for t in ticks:
        x = float(fx(t))
        label = datetime.fromtimestamp(t, UTC).strftime(fmt)
        out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{TOP}" y2="{TOP + h}" stroke="#f3f4f6"/>'
                   f'<text x="{x:.1f}" y="{TOP + h + 16}" text-anchor="middle" fill="#444">{label}</text>')
    out.append(f'<text x="{LEFT + w / 2:.0f}" y="{TOP + h + 34}" text-anchor="middle" fill="#444">'
               'time (UTC)</text>')
    if band.unit:
        out.append(f'<text x="14" y="{TOP + h / 2:.0f}" text-anchor="middle" fill="#444" '
                   f'transform="rotate(-90 14 {TOP + h / 2:.0f})">{escape(band.unit)}</text>')
    # muted periods (hook for silences), breaches behind the data
    for a, b in muted:
        xa, xb = float(fx(max(a, t0))), float(fx(min(b, t1)))
        if xb > xa:
            out.append(f'<rect x="{xa:.1f}" y="{TOP}" width="{xb - xa:.1f}" height="{h}" fill="url(#mute)">'
                       '<title>muted</title></rect>')
    for a, b, side in band.breaches:
        xa, xb = float(fx(max(a, t0))), float(fx(min(b, t1)))
        if xb < LEFT or xa > LEFT + w:
            continue
        if xb - xa < MIN_SPAN_PX:
            xa, xb = xa - MIN_SPAN_PX / 2, xa + MIN_SPAN_PX / 2
        end = "open" if math.isinf(b) else datetime.fromtimestamp(b, UTC).strftime("%Y-%m-%d %H:%M")
        what = "above" if side > 0 else "below"
        began = datetime.fromtimestamp(a, UTC).strftime("%Y-%m-%d %H:%M")
        out.append(f'<rect x="{xa:.1f}" y="{TOP}" width="{xb - xa:.1f}" height="{h}" fill="{BREACH_FILL}">'
                   f'<title>breach {what} from {began} to {end}</title></rect>')
        if a >= t0:
            out.append(f'<path d="M{xa - 5:.1f},{TOP - 2} L{xa + 5:.1f},{TOP - 2} L{xa:.1f},{TOP + 7}Z" '
                       f'fill="{BREACH_MARK}"/>')
    # band ribbon (broken where not judged), expected, observed
    ok = np.isfinite(band.lower) & np.isfinite(band.upper)
    edges = np.flatnonzero(np.diff(np.concatenate([[0], ok.astype(np.int8), [0]])))
    for a, b in zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True):
        up = " ".join(f"{x:.1f},{y:.1f}" for x, y in zip(xs[a:b], fy(band.upper[a:b]), strict=True))
        down = " ".join(f"{x:.1f},{y:.1f}" for x, y in zip(xs[a:b][::-1], fy(band.lower[a:b][::-1]),
                                                          strict=True))
        out.append(f'<polygon points="{up} {down}" fill="{BAND_FILL}"/>')
    out.append(f'<path d="{_path(xs, fy(band.expected))}" fill="none" stroke="{EXPECTED_LINE}" '
               'stroke-width="1.2" stroke-dasharray="5 3"/>')
    out.append(f'<path d="{_path(xs, fy(band.observed))}" fill="none" stroke="{OBSERVED_LINE}" '
               'stroke-width="1.3"/>')
    out.append(f'<rect x="{LEFT}" y="{TOP}" width="{w}" height="{h}" fill="none" stroke="#c9ced6"/>')
    # legend below the plot area, outside the data
    ly = HEIGHT - 10
    items = [("rect", BAND_FILL, "band"), ("dash", EXPECTED_LINE, "expected"),
             ("line", OBSERVED_LINE, "observed"), ("mark", BREACH_MARK, "breach opened")]
    if muted:
        items.append(("rect", MUTED_FILL, "muted"))
    x = LEFT
    for kind, colour, label in items:
        if kind == "rect":
            out.append(f'<rect x="{x}" y="{ly - 9}" width="18" height="10" fill="{colour}"/>')
        elif kind == "mark":
            out.append(f'<path d="M{x + 4},{ly - 9} L{x + 14},{ly - 9} L{x + 9},{ly}Z" fill="{colour}"/>')
        else:
            dash = ' stroke-dasharray="5 3"' if kind == "dash" else ""
            out.append(f'<line x1="{x}" x2="{x + 18}" y1="{ly - 4}" y2="{ly - 4}" stroke="{colour}" '
                       f'stroke-width="1.5"{dash}/>')
        out.append(f'<text x="{x + 24}" y="{ly}" fill="#333">{label}</text>')
        x += 40 + 7 * len(label)
    out.append("</svg>")
    return "".join(out)
