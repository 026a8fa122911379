"""One reader per input stream: the decoder of its format, its settings and its caches.

The daemon keeps a :class:`MessageReader` per input partition (each topic may have its own
format, see ``kafka.input_topics``) and replay one per run, so per-series caches (series keys,
the previous count and sum of cumulative OTLP histograms) live as long as the stream.
"""

from __future__ import annotations

from collections.abc import Callable

from streamdet.codecs.common import Decoded, TimeRules
from streamdet.codecs.csv import decode_csv
from streamdet.codecs.influx import decode_influx
from streamdet.codecs.json import decode_json_messages, decode_mapped_json
from streamdet.codecs.otlp import OtlpDecoder
from streamdet.codecs.telegraf import decode_telegraf
from streamdet.config import InputConfig
from streamdet.core.points import KeyCache, PointBatch, PointBuilder

_DEFAULT_RULES = TimeRules()
MESSAGE_FORMATS = ("json", "influx", "telegraf_json", "otlp_proto", "otlp_json")


class MessageReader:
    """Decodes the messages (or files) of one input in the format ``input.format`` names.

    >>> r = MessageReader(InputConfig(format="telegraf_json"))
    >>> batch, bad, n = r.decode_messages([b'{"name": "m", "fields": {"x": 1}, "timestamp": 60}'],
    ...                                   str)
    >>> batch.keys, bad, n
    (['m_x'], [], 1)
    """

    def __init__(self, input: InputConfig, *, cache: KeyCache | None = None) -> None:
        self.input = input
        self.format = input.format
        self.cache = cache if cache is not None else KeyCache()
        self.otlp = (OtlpDecoder(input.resource_labels, json=self.format == "otlp_json")
                     if self.format.startswith("otlp_") else None)

    def decode(self, data: bytes, *, prefix: str, rules: TimeRules, builder: PointBuilder | None = None,
               metric: str = "value") -> Decoded:
        """One message or file (JSON and OTLP/JSON files may hold JSON lines)."""
        fmt, inp = self.format, self.input
        if fmt == "json":
            return decode_mapped_json(data, inp.json, prefix=prefix, rules=rules, builder=builder)
        if fmt == "influx":
            return decode_influx(data, prefix=prefix, rules=rules, precision=inp.influx_precision,
                                 builder=builder)
        if fmt == "telegraf_json":
            return decode_telegraf(data, prefix=prefix, rules=rules, units=inp.telegraf_units,
                                   builder=builder)
        if self.otlp is not None:
            if self.otlp.json and b"\n" in data.strip():
                return self._otlp_json_lines(data, prefix, rules, builder)
            return self.otlp.decode(data, prefix=prefix, rules=rules, builder=builder)
        if fmt == "csv":
            return decode_csv(data, prefix=prefix, rules=rules, metric=metric)
        raise ValueError(f"unknown format {fmt!r}")

    def _otlp_json_lines(self, data: bytes, prefix: str, rules: TimeRules,
                         builder: PointBuilder | None) -> Decoded:
        """OTLP/JSON lines, one request per line (the Collector's file exporter writes these)."""
        assert self.otlp is not None
        own = builder is None
        out = PointBuilder(self.cache) if builder is None else builder
        errors, records = [], 0
        for lineno, line in enumerate(data.splitlines(), start=1):
            if not line.strip():
                continue
            d = self.otlp.decode(line, prefix=f"{prefix} line {lineno}".strip(), rules=rules, builder=out)
            errors.extend(d.errors)
            records += d.records
        return Decoded(points=out.build() if own else PointBatch.empty(), errors=errors, records=records)

    def decode_messages(self, values: list[bytes], position: Callable[[int], str], *,
                        rules: TimeRules = _DEFAULT_RULES
                        ) -> tuple[PointBatch, list[tuple[int, Decoded]], int]:
        """Many messages into one batch: ``(batch, bad, records)`` as
        :func:`~streamdet.codecs.json.decode_json_messages` (``bad``: messages with refused records)."""
        if self.format == "json" and self.input.json.is_default:
            return decode_json_messages(values, position, rules=rules, cache=self.cache)
        builder = PointBuilder(self.cache)
        bad: list[tuple[int, Decoded]] = []
        records = 0
        for i, data in enumerate(values):
            d = self.decode(data, prefix=position(i), rules=rules, builder=builder)
            records += d.records
            if d.errors:
                bad.append((i, d))
        return builder.build(), bad, records
