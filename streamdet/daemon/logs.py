"""Structured logs: plain text by default, one JSON object per line with ``--log-format json``.

:class:`RateLimitedLog` keeps a failing broker or a stream of poison from flooding the log:
one line per interval and topic, and the next line says how many were held back.
"""

from __future__ import annotations

import logging
import sys
import threading
import time
from collections.abc import Callable, Hashable

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


class RateLimitedLog:
    """At most one line per ``interval`` seconds for each ``key``; the next line let through
    after a quiet spell reports how many were suppressed in between.

    It also stands in for a ``logging.Logger`` where librdkafka wants one (confluent-kafka calls
    ``logger.log(level, fmt, *args)``), so librdkafka's own lines are limited too.

    >>> t = [0.0]
    >>> lines = []
    >>> class Sink:
    ...     def log(self, level, msg, *args): lines.append(msg % args)
    >>> rl = RateLimitedLog(Sink(), interval=10, clock=lambda: t[0])
    >>> for t[0] in (0, 1, 2, 11): _ = rl.log(logging.ERROR, "broker down")
    >>> lines
    ['broker down', 'broker down (2 similar line(s) suppressed in the last 10 s)']
    """

    def __init__(self, logger: logging.Logger | object, interval: float = 10.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.logger = logger
        self.interval = interval
        self.clock = clock
        self.suppressed_total = 0
        self._state: dict[Hashable, tuple[float, int]] = {}  # key -> (last line out, held back)
        self._lock = threading.Lock()

    def log(self, level: int, msg: str, *args: object, key: Hashable = None) -> bool:
        """Log unless a line with this ``key`` went out less than ``interval`` ago."""
        with self._lock:
            now = self.clock()
            last, held = self._state.get(key, (None, 0))
            if last is not None and now - last < self.interval:
                self._state[key] = (last, held + 1)
                self.suppressed_total += 1
                return False
            self._state[key] = (now, 0)
        if held:
            msg = f"{msg} (%d similar line(s) suppressed in the last %.0f s)"
            args = (*args, held, self.interval)
        self.logger.log(level, msg, *args)
        return True

    def flush(self) -> None:
        """Report lines held back for keys that have been quiet for a whole interval."""
        with self._lock:
            now = self.clock()
            due = [(k, held) for k, (last, held) in self._state.items()
                   if held and now - last >= self.interval]
            for k, _held in due:
                self._state[k] = (now, 0)
        for k, held in due:
            self.logger.log(logging.WARNING, "%d similar line(s) suppressed in the last %.0f s%s",
                            held, self.interval, "" if k is None else f" ({k})")
