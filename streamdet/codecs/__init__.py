"""Decoders from bytes to :class:`~streamdet.core.points.PointBatch` plus per-record errors.

Every decoder takes the raw bytes of one message or file and returns
``(batch, errors)``; it never raises on bad input.
"""

from __future__ import annotations

from collections.abc import Callable

from streamdet.codecs.common import Decoded, TimeRules
from streamdet.codecs.csv import decode_csv
from streamdet.codecs.influx import decode_influx
from streamdet.codecs.json import decode_json
from streamdet.codecs.otlp import decode_otlp_json, decode_otlp_proto
from streamdet.codecs.telegraf import decode_telegraf

Decoder = Callable[..., Decoded]

DECODERS: dict[str, Decoder] = {
    "json": decode_json,
    "influx": decode_influx,
    "csv": decode_csv,
    "telegraf_json": decode_telegraf,
    "otlp_proto": decode_otlp_proto,
    "otlp_json": decode_otlp_json,
}


def decoder_for(name: str) -> Decoder:
    try:
        return DECODERS[name]
    except KeyError:
        raise ValueError(f"unknown format {name!r}; valid: {', '.join(DECODERS)}") from None


def format_for_path(path: str) -> str:
    """A file's format from its name: .csv, .jsonl/.json/.ndjson, .lp/.influx/.line, and OTLP:
    .otlp.json/.otlp.jsonl (OTLP/JSON) and .pb (one protobuf ExportMetricsServiceRequest).

    Anything else (``.txt`` too, which is as often CSV as line protocol) needs ``--format``.
    """
    lower = path.lower()
    for suffix in (".gz",):
        if lower.endswith(suffix):
            lower = lower[: -len(suffix)]
    if lower.endswith(".csv"):
        return "csv"
    if lower.endswith((".otlp.json", ".otlp.jsonl")):
        return "otlp_json"
    if lower.endswith(".pb"):
        return "otlp_proto"
    if lower.endswith((".jsonl", ".json", ".ndjson")):
        return "json"
    if lower.endswith((".lp", ".influx", ".line")):
        return "influx"
    raise ValueError(
        f"cannot tell the format of {path!r} from its name (.csv, .jsonl/.json/.ndjson or "
        ".lp/.influx/.line, .otlp.json or .pb); pass --format csv, json, influx, telegraf_json, "
        "otlp_json or otlp_proto"
    )


__all__ = ["DECODERS", "Decoded", "TimeRules", "decode_csv", "decode_influx", "decode_json",
           "decode_otlp_json", "decode_otlp_proto", "decode_telegraf", "decoder_for", "format_for_path"]
