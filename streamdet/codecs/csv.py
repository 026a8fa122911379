"""CSV points for replay: a header with ``time`` and ``value``, optionally ``metric``.

Every other column is a label. Without a ``metric`` column the caller's default
name is used (replay passes the file's stem).
"""

from __future__ import annotations

import csv
import io

from streamdet.codecs.common import (
    Decoded,
    ErrorCollector,
    RecordError,
    TimeRules,
    check_series,
    finish,
    parse_time,
    parse_value,
)
from streamdet.core.points import PointBuilder, normalise_labels

_DEFAULT_RULES = TimeRules()


def decode_csv(
    data: bytes,
    *,
    prefix: str = "",
    rules: TimeRules = _DEFAULT_RULES,
    metric: str = "value",
) -> Decoded:
    """Decode a whole CSV file.

    >>> d = decode_csv(b"time,value,host\\n2024-01-01 00:00,5,a\\n", metric="load")
    >>> d.points.keys, d.points.value.tolist()
    (['load{host="a"}'], [5.0])
    """
    builder = PointBuilder()
    errors = ErrorCollector(prefix)
    text = data.decode("utf-8-sig", "replace")
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        return finish(builder, errors, 0)
    except csv.Error as exc:
        errors.add("line 1", f"unreadable CSV header ({exc})", text.splitlines()[0][:160])
        return finish(builder, errors, 1)
    missing = [c for c in ("time", "value") if c not in header]
    if missing:
        errors.add("line 1", f"header lacks column(s) {', '.join(missing)}", ",".join(header))
        return finish(builder, errors, 1)
    i_time, i_value = header.index("time"), header.index("value")
    i_metric = header.index("metric") if "metric" in header else None
    label_cols = [(i, h) for i, h in enumerate(header) if h not in ("time", "value", "metric")]
    records = 0
    while True:
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            records += 1
            errors.add(f"line {reader.line_num}", f"unreadable CSV ({exc})", "")
            continue
        if not row or all(not c.strip() for c in row):
            continue
        records += 1
        where = f"line {reader.line_num}"
        try:
            if len(row) != len(header):
                raise RecordError(f"expected {len(header)} columns, got {len(row)}")
            name = row[i_metric].strip() if i_metric is not None else metric
            if not name:
                raise RecordError("empty metric name")
            t = rules.check(parse_time(row[i_time]))
            v = parse_value(row[i_value])
            labels = normalise_labels({h: row[i].strip() for i, h in label_cols})
            check_series(name, labels)
        except RecordError as exc:
            errors.add(where, str(exc), ",".join(row))
            continue
        builder.add(name, labels, t, v)
    return finish(builder, errors, records)
