"""Influx line protocol: ``measurement[,tag=v...] field=v[,field=v...] [timestamp]``.

Each numeric field becomes the series ``<measurement>_<field>`` with the tags as
labels. Escaping follows the published line-protocol reference: in the
measurement ``\\,`` and ``\\ ``; in tag keys, tag values and field keys also
``\\=``; in string field values ``\\"`` and ``\\\\``. Booleans become 1/0; string
fields are ignored (a line with no numeric field at all is an error). Numbers are ASCII
digits only, and an integer or timestamp too large for a float is refused, not raised.
"""

from __future__ import annotations

import re

from streamdet.codecs.common import Decoded, ErrorCollector, RecordError, TimeRules, check_series, finish
from streamdet.core.points import PointBuilder, shorten

_PRECISION = {"s": 1.0, "ms": 1e3, "us": 1e6, "ns": 1e9}
_TRUE = {"t", "T", "true", "True", "TRUE"}
_FALSE = {"f", "F", "false", "False", "FALSE"}
_DEFAULT_RULES = TimeRules()
_INTEGER = re.compile(r"[+-]?[0-9]+")
_FLOAT = re.compile(r"[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?")


def _split(text: str, sep: str, *, quotes: bool = False) -> list[str]:
    """Split on ``sep`` where it is neither escaped nor (with ``quotes``) inside a string."""
    if "\\" not in text and (not quotes or '"' not in text):
        return text.split(sep)
    parts: list[str] = []
    cur: list[str] = []
    i, n, in_str = 0, len(text), False
    while i < n:
        c = text[i]
        if c == "\\" and i + 1 < n:
            cur.append(c)
            cur.append(text[i + 1])
            i += 2
            continue
        if quotes and c == '"':
            in_str = not in_str
        elif c == sep and not in_str:
            parts.append("".join(cur))
            cur = []
            i += 1
            continue
        cur.append(c)
        i += 1
    if in_str:
        raise RecordError("unterminated string field value")
    parts.append("".join(cur))
    return parts


def _unescape(text: str, chars: str) -> str:
    if "\\" not in text:
        return text
    out: list[str] = []
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c == "\\" and i + 1 < n and text[i + 1] in chars:
            out.append(text[i + 1])
            i += 2
            continue
        out.append(c)
        i += 1
    return "".join(out)


def _split_sections(line: str) -> list[str]:
    """Measurement+tags, fields, optional timestamp: split on unescaped, unquoted spaces."""
    sections = [s for s in _split(line, " ", quotes=True) if s != ""]
    if len(sections) < 2:
        raise RecordError("expected 'measurement[,tags] fields [timestamp]'")
    if len(sections) > 3:
        raise RecordError("unexpected text after the timestamp")
    return sections


def _field_value(raw: str) -> float | None:
    """Numeric value of a field, or None for a string field."""
    if not raw:
        raise RecordError("empty field value")
    if raw[0] == '"':
        if len(raw) < 2 or raw[-1] != '"':
            raise RecordError("unterminated string field value")
        return None
    if raw in _TRUE:
        return 1.0
    if raw in _FALSE:
        return 0.0
    last = raw[-1]
    if last in "iu":
        if not _INTEGER.fullmatch(raw, 0, len(raw) - 1):
            raise RecordError(f"field value {shorten(raw, 40)!r} is not a number, boolean or string")
        try:
            value = float(int(raw[:-1]))
        except (OverflowError, ValueError):
            raise RecordError(f"integer field value of {len(raw) - 1} digits is out of range") from None
        if last == "u" and value < 0:
            raise RecordError(f"unsigned field value {raw!r} is negative")
        return value
    if not _FLOAT.fullmatch(raw):
        raise RecordError(f"field value {shorten(raw, 40)!r} is not a number, boolean or string")
    value = float(raw)
    if value in (float("inf"), float("-inf")):
        raise RecordError(f"field value {shorten(raw, 40)!r} is out of range")
    return value


def parse_line(line: str, precision: float, rules: TimeRules) -> list[tuple[str, tuple, float, float]]:
    """One line to ``[(metric, labels, time, value), ...]``; raises RecordError."""
    sections = _split_sections(line)
    head = _split(sections[0], ",")
    measurement = _unescape(head[0], ", ")
    if not measurement:
        raise RecordError("missing measurement name")
    tags: dict[str, str] = {}
    for tag in head[1:]:
        kv = _split(tag, "=")
        if len(kv) != 2 or not kv[0] or not kv[1]:
            raise RecordError(f"tag {tag!r} is not key=value")
        tags[_unescape(kv[0], ",= ")] = _unescape(kv[1], ",= ")
    labels = tuple(sorted(tags.items()))
    out = []
    for field in _split(sections[1], ",", quotes=True):
        kv = _split(field, "=", quotes=True)
        if len(kv) != 2 or not kv[0]:
            raise RecordError(f"field {field!r} is not key=value")
        value = _field_value(kv[1])
        if value is not None:
            metric = f"{measurement}_{_unescape(kv[0], ',= ')}"
            check_series(metric, labels)
            out.append((metric, value))
    if not out:
        raise RecordError("no numeric field")
    if len(sections) == 3:
        if not _INTEGER.fullmatch(sections[2]):
            raise RecordError(f"timestamp {shorten(sections[2], 40)!r} is not an integer")
        try:
            t = int(sections[2]) / precision
        except (OverflowError, ValueError):
            raise RecordError(f"timestamp of {len(sections[2])} digits is out of range") from None
        t = rules.check(t)
    elif rules.now is not None:
        t = rules.now
    else:
        raise RecordError("missing timestamp (and no receive time to use instead)")
    return [(metric, labels, t, value) for metric, value in out]


def decode_influx(
    data: bytes,
    *,
    prefix: str = "",
    rules: TimeRules = _DEFAULT_RULES,
    precision: str = "ns",
    builder: PointBuilder | None = None,
) -> Decoded:
    r"""Decode line-protocol text (one or many lines).

    >>> d = decode_influx(b"cpu,host=a usage=0.5,idle=9i 60000000000")
    >>> sorted(d.points.keys), d.points.time.tolist()
    (['cpu_idle{host="a"}', 'cpu_usage{host="a"}'], [60.0, 60.0])
    """
    scale = _PRECISION[precision]
    own = builder is None
    builder = PointBuilder() if builder is None else builder
    errors = ErrorCollector(prefix)
    records = 0
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        errors.add("message", f"not UTF-8 ({exc.reason} at byte {exc.start})", data)
        return finish(builder, errors, 1)
    for lineno, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        records += 1
        try:
            points = parse_line(line, scale, rules)
        except RecordError as exc:
            errors.add(f"line {lineno}", str(exc), line)
            continue
        for metric, labels, t, v in points:
            builder.add(metric, labels, t, v)
    return finish(builder, errors, records, own=own)
