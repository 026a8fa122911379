"""JSON points: one object or an array of objects per message or line.

Object form: ``{"metric": "cpu", "labels": {"host": "a"}, "time": ..., "value": ...}``.
The Prometheus data-model form is accepted too: the metric name as the
``__name__`` label and no ``metric`` field. Label values are strings (numbers are turned
into strings; anything else refuses the record). Well-formed objects with numeric epoch-second
times and values take a fast path; everything else goes through the validating one, which
gives the reason. Producers with their own key names are read through a
:class:`~streamdet.config.JsonMapping` (``input.json``; :func:`decode_mapped_json`).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import orjson

from streamdet.codecs.common import (
    MAX_LABEL_NAME,
    MAX_LABEL_VALUE,
    MAX_METRIC_NAME,
    MAX_SERIES_KEY,
    MIN_TIME,
    SMALL_MESSAGE,
    Decoded,
    ErrorCollector,
    RecordError,
    TimeRules,
    check_series,
    finish,
    parse_time,
    parse_value,
)
from streamdet.config import JsonMapping
from streamdet.core.points import KeyCache, PointBatch, PointBuilder, normalise_labels, shorten

_DEFAULT_RULES = TimeRules()
_NUM = (int, float)
_isfinite = math.isfinite


def _add_fast(obj: object, builder: PointBuilder, limit: float, size: int) -> bool:
    """The common case: an object with a string metric, string labels, an epoch-seconds time
    no later than ``limit`` and a finite number, all within the length limits. Returns False to
    send it to the checked path (which gives the reason). ``size`` is the message's length in
    bytes: a short message cannot hold a label over the limits, so only long ones are scanned."""
    if type(obj) is not dict:
        return False
    metric, labels, t, v = obj.get("metric"), obj.get("labels"), obj.get("time"), obj.get("value")
    if not (type(metric) is str and metric and type(t) in _NUM and type(v) in _NUM
            and (labels is None or (type(labels) is dict and "__name__" not in labels))
            and len(metric) <= MAX_METRIC_NAME):
        return False
    if size > SMALL_MESSAGE and labels and not _labels_fit(metric, labels):
        return False
    t, v = float(t), float(v)
    if not (_isfinite(v) and MIN_TIME <= t < 1e11 and t <= limit):
        return False
    try:
        return builder.add_raw(metric, tuple(labels.items()) if labels else (), t, v)
    except TypeError:  # an unhashable label value (object or list): the checked path says so
        return False


def _labels_fit(metric: str, labels: dict) -> bool:
    """Plainly within the limits; False sends borderline keys to the exact check."""
    size = len(metric) + 2
    for k, v in labels.items():
        if type(v) is not str or len(v) > MAX_LABEL_VALUE or len(k) > MAX_LABEL_NAME:
            return False
        size += len(k) + len(v) + 4
    return size <= MAX_SERIES_KEY // 2


def _limit(rules: TimeRules) -> float:
    return math.inf if rules.now is None else rules.now + rules.max_future


def _add_object(obj: object, builder: PointBuilder, rules: TimeRules, size: int) -> None:
    if not _add_fast(obj, builder, _limit(rules), size):
        _add_object_checked(obj, builder, rules)


def _add_object_checked(obj: object, builder: PointBuilder, rules: TimeRules) -> None:
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
            raise RecordError(f"label {shorten(k, 40)!r}: value is {_kind(v)}; label values must be "
                              "strings or numbers")
    if "time" not in obj and "timestamp" not in obj:
        raise RecordError("missing field 'time'")
    t = rules.check(parse_time(obj.get("time", obj.get("timestamp"))))
    if "value" not in obj:
        raise RecordError("missing field 'value'")
    v = parse_value(obj["value"])
    normal = normalise_labels(labels)
    check_series(metric, normal)
    builder.add(metric, normal, t, v)


_KINDS = {dict: "an object", list: "a list", bool: "a boolean", type(None): "null"}


def _kind(value: object) -> str:
    return _KINDS.get(type(value), type(value).__name__)


def _add_document(doc: object, where: str, chunk: bytes, builder: PointBuilder, rules: TimeRules,
                  errors: ErrorCollector) -> int:
    items = doc if type(doc) is list else (doc,)
    for i, item in enumerate(items, start=1):
        try:
            _add_object(item, builder, rules, len(chunk))
        except RecordError as exc:
            item_where = f"{where} item {i}" if type(doc) is list else where
            errors.add(item_where, str(exc), orjson.dumps(item) if _dumpable(item) else chunk)
    return len(items)


def decode_json(
    data: bytes,
    *,
    prefix: str = "",
    rules: TimeRules = _DEFAULT_RULES,
    lines: bool | None = None,
    builder: PointBuilder | None = None,
) -> Decoded:
    """Decode one JSON message, or JSON lines when ``lines`` is true.

    With ``lines=None`` the payload is read as one document, and as JSON lines if that fails
    and it holds several lines. With ``builder`` the points are appended to it (for decoding
    many messages into one batch) and the returned batch is empty.

    >>> d = decode_json(b'{"metric": "q", "time": 60, "value": 3}')
    >>> d.points.keys, d.points.value.tolist(), d.errors
    (['q'], [3.0], [])
    """
    own = builder is None
    out = PointBuilder() if builder is None else builder
    errors = ErrorCollector(prefix)
    records = 0
    if not lines:
        try:
            doc = orjson.loads(data)
        except orjson.JSONDecodeError as exc:
            if lines is None and b"\n" in data.strip():
                lines = True
            else:
                errors.add("record", f"invalid JSON ({exc})", data)
                return finish(out, errors, 1, own=own)
        else:
            records = _add_document(doc, "record", data, out, rules, errors)
            return finish(out, errors, records, own=own)
    for lineno, chunk in enumerate(data.splitlines(), start=1):
        if not chunk.strip():
            continue
        try:
            doc = orjson.loads(chunk)
        except orjson.JSONDecodeError as exc:
            records += 1
            errors.add(f"line {lineno}", f"invalid JSON ({exc})", chunk)
            continue
        records += _add_document(doc, f"line {lineno}", chunk, out, rules, errors)
    return finish(out, errors, records, own=own)


def _dumpable(item: object) -> bool:
    try:
        orjson.dumps(item)
    except TypeError:
        return False
    return True


def decode_json_messages(values: list[bytes], position: Callable[[int], str], *,
                         rules: TimeRules = _DEFAULT_RULES, cache: KeyCache | None = None
                         ) -> tuple[PointBatch, list[tuple[int, Decoded]], int]:
    """Decode many messages into one batch (the daemon's path): ``(batch, bad, records)``.

    ``bad`` lists ``(index, Decoded)`` for messages with at least one refused record; their
    good records are in the batch too. Well-formed single objects take the fast path
    (parse, four type checks, one cache lookup).
    """
    b = PointBuilder(cache)
    loads = orjson.loads
    limit = _limit(rules)
    bad: list[tuple[int, Decoded]] = []
    records = 0
    for i, data in enumerate(values):
        try:
            doc = loads(data)
        except orjson.JSONDecodeError:
            doc = None
        if _add_fast(doc, b, limit, len(data)):
            records += 1
            continue
        d = decode_json(data, prefix=position(i), rules=rules, builder=b)
        records += d.records
        if d.errors:
            bad.append((i, d))
    return b.build(), bad, records


# ------------------------------------------------------------------ mapped key names

_UNIT_SCALE = {"s": 1.0, "ms": 1e3, "us": 1e6, "ns": 1e9}


def _remap(obj: object, m: JsonMapping) -> dict:
    """An object in a producer's own shape (``input.json``) as our shape; RecordError names the
    producer's key when something is missing or of the wrong type."""
    if type(obj) is not dict:
        raise RecordError(f"expected a JSON object, got {_kind(obj)}")
    if m.metric_key not in obj:
        raise RecordError(f"missing field {m.metric_key!r}")
    if m.value_key not in obj:
        raise RecordError(f"missing field {m.value_key!r}")
    if m.time_key not in obj:
        raise RecordError(f"missing field {m.time_key!r}")
    labels = obj.get(m.labels_key)
    if labels is not None and type(labels) is not dict:
        raise RecordError(f"{m.labels_key!r} must be an object of strings")
    if m.label_keys:
        lifted = {}
        for k in m.label_keys:
            v = obj.get(k)
            if v is None:
                continue
            if not isinstance(v, str | int | float) or isinstance(v, bool):
                raise RecordError(f"label key {shorten(k, 40)!r}: value is {_kind(v)}; label values "
                                  "must be strings or numbers")
            lifted[k] = v if type(v) is str else str(v)
        labels = {**(labels or {}), **lifted}
    t = obj[m.time_key]
    if m.time_unit != "auto":
        t = _scaled_time(t, _UNIT_SCALE[m.time_unit])
    return {"metric": obj[m.metric_key], "labels": labels, "time": t, "value": obj[m.value_key]}


def _scaled_time(raw: object, scale: float) -> object:
    """Epoch seconds from a number (or numeric string) in an explicit unit; anything else is
    left for :func:`parse_time` (ISO strings, or the error)."""
    if type(raw) is str:
        try:
            raw = float(raw.strip())
        except ValueError:
            return raw
    if type(raw) in _NUM:
        if not _isfinite(raw):
            raise RecordError("time is not a finite number")
        return raw / scale
    return raw


def decode_mapped_json(data: bytes, mapping: JsonMapping, *, prefix: str = "",
                       rules: TimeRules = _DEFAULT_RULES, lines: bool | None = None,
                       builder: PointBuilder | None = None) -> Decoded:
    """:func:`decode_json` for objects with the key names of ``mapping``.

    >>> m = JsonMapping(metric_key="name", time_key="ts", time_unit="ms", label_keys=("host",))
    >>> d = decode_mapped_json(b'{"name": "q", "host": "a", "ts": 60000, "value": 3}', m)
    >>> d.points.keys, d.points.time.tolist()
    (['q{host="a"}'], [60.0])
    """
    if mapping.is_default:
        return decode_json(data, prefix=prefix, rules=rules, lines=lines, builder=builder)
    own = builder is None
    out = PointBuilder() if builder is None else builder
    errors = ErrorCollector(prefix)
    docs: list[tuple[str, object, bytes]] = []
    records = 0
    try:
        docs.append(("record", orjson.loads(data), data))
    except orjson.JSONDecodeError as exc:
        if lines is False or b"\n" not in data.strip():
            errors.add("record", f"invalid JSON ({exc})", data)
            return finish(out, errors, 1, own=own)
        for lineno, chunk in enumerate(data.splitlines(), start=1):
            if not chunk.strip():
                continue
            try:
                docs.append((f"line {lineno}", orjson.loads(chunk), chunk))
            except orjson.JSONDecodeError as exc:
                records += 1
                errors.add(f"line {lineno}", f"invalid JSON ({exc})", chunk)
    for where, doc, chunk in docs:
        items = doc if type(doc) is list else (doc,)
        for i, item in enumerate(items, start=1):
            records += 1
            try:
                _add_object(_remap(item, mapping), out, rules, len(chunk))
            except RecordError as exc:
                item_where = f"{where} item {i}" if type(doc) is list else where
                errors.add(item_where, str(exc), orjson.dumps(item) if _dumpable(item) else chunk)
    return finish(out, errors, records, own=own)
