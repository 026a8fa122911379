"""``GET /series`` and ``GET /series/{key}/band.svg|band.json`` on the health port.

The band of any series, now: the engines' recent-step rings (:mod:`streamdet.core.recent`) read
from the HTTP thread while the consume loop writes (each read is a consistent copy). ``match`` is
a shell-style pattern (``*``, ``?``, ``[...]``, :mod:`fnmatch`) over the series key; without a
wildcard it is a plain substring. Keys go in the path percent-encoded (quotes, braces, slashes).
``muted`` is a hook for silences: a callable ``key -> [(start, end), ...]`` drawn as hatching.
"""

from __future__ import annotations

import fnmatch
import json
import math
import re
from collections.abc import Callable, Iterable
from urllib.parse import parse_qs

import numpy as np

from streamdet.band_svg import band_svg
from streamdet.core.engine import Engine
from streamdet.core.recent import RecentBand

MAX_MATCH_CHARS = 1000
DEFAULT_LIMIT, MAX_LIMIT = 100, 1000
MAX_HOURS = 24 * 366 * 10  # larger is refused; anything over the ring's reach shows the whole ring
_BAND_PATH = re.compile(r"^/series/(?P<key>.+)/band\.(?P<fmt>svg|json)$", re.DOTALL)


def _reply(start_response, status: str, body: bytes | str, ctype: str = "text/plain; charset=utf-8"):
    data = body.encode() if isinstance(body, str) else body
    start_response(status, [("Content-Type", ctype), ("Content-Length", str(len(data))),
                            ("Cache-Control", "no-store")])
    return [data]


def _matcher(pattern: str) -> Callable[[str], bool]:
    if not any(c in pattern for c in "*?["):
        return lambda key: pattern in key
    rx = re.compile(fnmatch.translate(pattern), re.DOTALL)
    return lambda key: rx.match(key) is not None


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def series_summary(engine: Engine, key: str, row: int) -> dict:
    """One entry of ``GET /series``: key, rule, labels, last value, learning, open breach."""
    tab = engine.table
    meta = tab.meta[row]
    metric, labels = (meta if meta is not None else (key, ()))
    side = int(engine.breaches.status[row])
    last = None
    if engine.recent is not None:
        band = engine.recent_band(key)
        if band is not None and band.start.shape[0]:
            last = {"start": float(band.start[-1]), "value": _finite(float(band.observed[-1]))}
    rule_i = int(tab.rule[row])
    return {
        "key": key,
        "metric": metric,
        "labels": dict(labels),
        "rule": engine.config.rules[rule_i].name if rule_i >= 0 else None,
        "unit": tab.units.get(row),
        "last": last,
        "learning": engine.is_learning(key),
        "open_breach": None if side == 0 else {
            "direction": "above" if side > 0 else "below",
            "since": _finite(float(engine.breaches.since[row]))},
    }


def band_json(band: RecentBand, muted: Iterable[tuple[float, float]] = ()) -> dict:
    def col(a: np.ndarray) -> list[float | None]:
        return [None if math.isnan(v) else v for v in a.tolist()]

    return {"key": band.key, "step": band.step, "unit": band.unit,
            "start": band.start.tolist(), "observed": col(band.observed), "expected": col(band.expected),
            "lower": col(band.lower), "upper": col(band.upper),
            "breaches": [{"start": a, "end": _finite(b), "direction": "above" if s > 0 else "below"}
                         for a, b, s in band.breaches],
            "muted": [list(m) for m in muted]}


def series_app(engines: Callable[[], list[Engine]],
               muted: Callable[[str], list[tuple[float, float]]] | None = None):
    """The WSGI app; ``engines()`` returns the engines to search (one per partition)."""

    def current() -> list[Engine]:
        for _ in range(5):  # the partition map may change on the loop's thread meanwhile
            try:
                return list(engines())
            except RuntimeError:
                continue
        return []

    def app(environ, start_response):
        if environ.get("REQUEST_METHOD", "GET") not in ("GET", "HEAD"):
            return _reply(start_response, "405 Method Not Allowed", "GET only\n")
        # PEP 3333: PATH_INFO is percent-decoded bytes as latin-1; keys are UTF-8.
        raw = environ.get("PATH_INFO", "")
        try:
            path = raw.encode("latin-1").decode("utf-8")
        except (UnicodeEncodeError, UnicodeDecodeError):
            return _reply(start_response, "400 Bad Request", "the path is not UTF-8\n")
        try:
            query = parse_qs(environ.get("QUERY_STRING", ""), keep_blank_values=True, max_num_fields=20)
        except ValueError as exc:
            return _reply(start_response, "400 Bad Request", f"bad query string: {exc}\n")
        if path in ("/series", "/series/"):
            return _list(query, start_response)
        m = _BAND_PATH.match(path)
        if m is None:
            return _reply(start_response, "404 Not Found",
                          "use /series?match=PATTERN or /series/{key}/band.svg?hours=48\n")
        return _band(m["key"], m["fmt"], query, start_response)

    def _list(query, start_response):
        pattern = query.get("match", ["*"])[-1]
        if len(pattern) > MAX_MATCH_CHARS:
            return _reply(start_response, "400 Bad Request",
                          f"match: at most {MAX_MATCH_CHARS} characters, got {len(pattern)}\n")
        try:
            limit = int(query.get("limit", [DEFAULT_LIMIT])[-1])
        except ValueError:
            return _reply(start_response, "400 Bad Request", "limit: expected a whole number\n")
        if not 1 <= limit <= MAX_LIMIT:
            return _reply(start_response, "400 Bad Request", f"limit: must be 1..{MAX_LIMIT}\n")
        hit = _matcher(pattern)
        found, total = [], 0
        for eng in current():
            for row, key in enumerate(list(eng.table.keys)):
                if key is None or not hit(key):
                    continue
                total += 1
                if len(found) < limit:
                    found.append(series_summary(eng, key, row))
        found.sort(key=lambda s: s["key"])
        body = json.dumps({"match": pattern, "total": total, "series": found,
                           "truncated": total > len(found)}, allow_nan=False)
        return _reply(start_response, "200 OK", body, "application/json")

    def _band(key, fmt, query, start_response):
        raw_hours = query.get("hours", ["48"])[-1]
        try:
            hours = float(raw_hours)
        except ValueError:
            hours = math.nan
        if not 0 < hours <= MAX_HOURS:  # NaN fails too
            return _reply(start_response, "400 Bad Request",
                          f"hours: expected a number in (0, {MAX_HOURS}], got {raw_hours[:40]!r}\n")
        band = None
        try:
            for eng in current():
                if eng.recent is None:
                    return _reply(start_response, "404 Not Found",
                                  "series bands are off: set engine.recent_steps (e.g. 288)\n")
                band = eng.recent_band(key)
                if band is not None:
                    break
        except TimeoutError as exc:
            return _reply(start_response, "503 Service Unavailable", f"{exc}\n")
        if band is None:
            return _reply(start_response, "404 Not Found", "no such series\n")
        if band.start.shape[0]:
            band = band.window(float(band.start[-1]) + band.step - hours * 3600.0)
        mutes = list(muted(key)) if muted is not None else []
        if fmt == "json":
            return _reply(start_response, "200 OK", json.dumps(band_json(band, mutes), allow_nan=False),
                          "application/json")
        return _reply(start_response, "200 OK", band_svg(band, muted=mutes), "image/svg+xml")

    return app
