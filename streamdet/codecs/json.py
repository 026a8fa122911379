"""JSON points: one object or an array of objects per message or line.

Object form: ``{"metric": "cpu", "labels": {"host": "a"}, "time": ..., "value": ...}``.
The Prometheus data-model form is accepted too: the metric name as the
``__name__`` label and no ``metric`` field.
"""

from __future__ import annotations

import orjson

from streamdet.codecs.common import (
    Decoded,
    ErrorCollector,
    RecordError,
    TimeRules,
    finish,
    parse_time,
    parse_value,
)
from streamdet.core.points import PointBuilder, normalise_labels

_DEFAULT_RULES = TimeRules()


def _add_object(obj: object, builder: PointBuilder, rules: TimeRules) -> None:
    if not isinstance(obj, dict):
        raise RecordError(f"expected a JSON object, got {type(obj).__name__}")
    labels_raw = obj.get("labels")
    if labels_raw is None:
        labels_raw = {}
    if not isinstance(labels_raw, dict):
        raise RecordError("'labels' must be an object of strings")
    labels = dict(labels_raw)
    metric = obj.get("metric", labels.pop("__name__", None))
    labels.pop("__name__", None)
    if metric is None:
        raise RecordError("missing field 'metric' (or label '__name__')")
    if not isinstance(metric, str) or not metric:
        raise RecordError("'metric' must be a non-empty string")
    for k, v in labels.items():
        if not isinstance(v, str | int | float) or isinstance(v, bool):
            raise RecordError(f"label {k!r} must be a string or number")
    if "time" not in obj and "timestamp" not in obj:
        raise RecordError("missing field 'time'")
    t = rules.check(parse_time(obj.get("time", obj.get("timestamp"))))
    if "value" not in obj:
        raise RecordError("missing field 'value'")
    v = parse_value(obj["value"])
    builder.add(metric, normalise_labels(labels), t, v)


def decode_json(
    data: bytes,
    *,
    prefix: str = "",
    rules: TimeRules = _DEFAULT_RULES,
    lines: bool | None = None,
) -> Decoded:
    """Decode one JSON message, or JSON lines when ``lines`` is true.

    With ``lines=None`` a payload holding several non-empty lines is read as JSON lines.

    >>> d = decode_json(b'{"metric": "q", "time": 60, "value": 3}')
    >>> d.points.keys, d.points.value.tolist(), d.errors
    (['q'], [3.0], [])
    """
    builder = PointBuilder()
    errors = ErrorCollector(prefix)
    records = 0
    if lines is None:
        stripped = data.strip()
        lines = b"\n" in stripped and not stripped.startswith(b"[")
    chunks = data.splitlines() if lines else [data]
    for lineno, chunk in enumerate(chunks, start=1):
        where = f"line {lineno}" if lines else "record"
        if lines and not chunk.strip():
            continue
        try:
            doc = orjson.loads(chunk)
        except orjson.JSONDecodeError as exc:
            records += 1
            errors.add(where, f"invalid JSON ({exc})", chunk)
            continue
        items = doc if isinstance(doc, list) else [doc]
        for i, item in enumerate(items, start=1):
            records += 1
            try:
                _add_object(item, builder, rules)
            except RecordError as exc:
                item_where = f"{where} item {i}" if isinstance(doc, list) else where
                errors.add(item_where, str(exc), orjson.dumps(item) if _dumpable(item) else chunk)
    return finish(builder, errors, records)


def _dumpable(item: object) -> bool:
    try:
        orjson.dumps(item)
    except TypeError:
        return False
    return True
