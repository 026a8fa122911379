"""Telegraf's JSON serializer: ``{"name", "tags", "fields", "timestamp"}``, one metric or a batch.

Telegraf's Kafka output with ``data_format = "json"`` writes one metric per message, or
``{"metrics": [...]}`` when the serializer batches. Each numeric field becomes the series
``<name>_<field>`` with the tags as labels, exactly as the line-protocol decoder names the same
data; booleans become 1/0 and string fields are ignored (a metric with no numeric field is an
error). ``timestamp`` is an integer in the serializer's ``json_timestamp_units``
(``input.telegraf_units``) or, with ``json_timestamp_format``, an RFC 3339 string.
"""

from __future__ import annotations

import math

import orjson

from streamdet.codecs.common import (
    Decoded,
    ErrorCollector,
    RecordError,
    TimeRules,
    check_series,
    finish,
    parse_time,
)
from streamdet.core.points import PointBuilder, shorten

_SCALE = {"s": 1.0, "ms": 1e3, "us": 1e6, "ns": 1e9}
_DEFAULT_RULES = TimeRules()


def _field_value(name: str, raw: object) -> float | None:
    """A field's number (booleans 1/0), None for a string field; RecordError otherwise."""
    if raw is True:
        return 1.0
    if raw is False:
        return 0.0
    if type(raw) is str:
        return None
    if type(raw) is int:
        try:
            return float(raw)
        except OverflowError:
            raise RecordError(f"field {shorten(name, 40)!r}: integer out of range") from None
    if type(raw) is float:
        if not math.isfinite(raw):
            raise RecordError(f"field {shorten(name, 40)!r}: value is not finite")
        return raw
    raise RecordError(f"field {shorten(name, 40)!r}: value must be a number, boolean or string, "
                      f"got {type(raw).__name__}")


def _time(raw: object, scale: float, rules: TimeRules) -> float:
    if raw is None:
        if rules.now is not None:
            return rules.now  # as line protocol: a metric without a timestamp is "now"
        raise RecordError("missing field 'timestamp' (and no receive time to use instead)")
    if type(raw) is int:
        t = raw / scale
    elif type(raw) is float:
        if not math.isfinite(raw):
            raise RecordError("timestamp is not a finite number")
        t = raw / scale
    elif type(raw) is str:
        t = parse_time(raw)
    else:
        raise RecordError(f"'timestamp' must be an integer or an RFC 3339 string, got {type(raw).__name__}")
    return rules.check(t)


def parse_metric(obj: object, scale: float, rules: TimeRules) -> list[tuple[str, tuple, float, float]]:
    """One Telegraf metric object to ``[(metric, labels, time, value), ...]``; raises RecordError."""
    if type(obj) is not dict:
        raise RecordError(f"expected a JSON object, got {type(obj).__name__}")
    name = obj.get("name")
    if not isinstance(name, str) or not name:
        raise RecordError("missing field 'name'" if name is None else "'name' must be a non-empty string")
    tags = obj.get("tags", {})
    if tags is None:
        tags = {}
    if type(tags) is not dict:
        raise RecordError("'tags' must be an object of strings")
    for k, v in tags.items():
        if type(v) is not str:
            raise RecordError(f"tag {shorten(k, 40)!r}: value must be a string, got {type(v).__name__}")
        if not k or not v:
            raise RecordError(f"tag {shorten(k, 40)!r} has an empty name or value")
    fields = obj.get("fields")
    if fields is None:
        raise RecordError("missing field 'fields'")
    if type(fields) is not dict:
        raise RecordError("'fields' must be an object")
    labels = tuple(sorted(tags.items()))
    out = []
    for field, raw in fields.items():
        if not field:
            raise RecordError("a field has an empty name")
        value = _field_value(field, raw)
        if value is not None:
            metric = f"{name}_{field}"
            check_series(metric, labels)
            out.append((metric, value))
    if not out:
        raise RecordError("no numeric field")
    t = _time(obj.get("timestamp"), scale, rules)
    return [(metric, labels, t, value) for metric, value in out]


def decode_telegraf(
    data: bytes,
    *,
    prefix: str = "",
    rules: TimeRules = _DEFAULT_RULES,
    units: str = "s",
    builder: PointBuilder | None = None,
) -> Decoded:
    """Decode one message: a metric, ``{"metrics": [...]}``, or JSON lines of either.

    >>> d = decode_telegraf(b'{"name": "cpu", "tags": {"host": "a"}, "fields": {"idle": 9}, '
    ...                     b'"timestamp": 60}')
    >>> d.points.keys, d.points.time.tolist()
    (['cpu_idle{host="a"}'], [60.0])
    """
    scale = _SCALE[units]
    own = builder is None
    out = PointBuilder() if builder is None else builder
    errors = ErrorCollector(prefix)
    try:
        docs = [("message", orjson.loads(data))]
    except orjson.JSONDecodeError as exc:
        if b"\n" not in data.strip():
            errors.add("message", f"invalid JSON ({exc})", data)
            return finish(out, errors, 1, own=own)
        docs = []
        for lineno, chunk in enumerate(data.splitlines(), start=1):
            if not chunk.strip():
                continue
            try:
                docs.append((f"line {lineno}", orjson.loads(chunk)))
            except orjson.JSONDecodeError as exc:
                errors.add(f"line {lineno}", f"invalid JSON ({exc})", chunk)
    records = len(errors.errors)
    for where, doc in docs:
        if type(doc) is dict and "metrics" in doc and "name" not in doc:
            items = doc["metrics"]
            if type(items) is not list:
                records += 1
                errors.add(where, "'metrics' must be a list of metric objects", data)
                continue
            labelled = [(f"{where} metric {i}", item) for i, item in enumerate(items, start=1)]
        else:
            labelled = [(where, doc)]
        for item_where, item in labelled:
            records += 1
            try:
                points = parse_metric(item, scale, rules)
            except RecordError as exc:
                errors.add(item_where, str(exc), orjson.dumps(item))
                continue
            for metric, labels, t, v in points:
                out.add(metric, labels, t, v)
    return finish(out, errors, records, own=own)
