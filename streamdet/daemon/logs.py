"""Structured logs: plain text by default, one JSON object per line with ``--log-format json``."""

from __future__ import annotations

import logging
import sys

import orjson


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        doc = {"time": self.formatTime(record, "%Y-%m-%dT%H:%M:%S%z"), "level": record.levelname.lower(),
               "logger": record.name, "message": record.getMessage()}
        if record.exc_info:
            doc["exception"] = self.formatException(record.exc_info)
        return orjson.dumps(doc).decode()


def setup_logging(fmt: str = "text", level: str = "info") -> None:
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("streamdet")
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False
