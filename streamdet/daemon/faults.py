"""Test-only fault injection: fail the daemon at the Nth pass through a named point.

For the crash-consistency tests only; production runs never set it. ``STREAMDET_FAULT`` (read by
``Daemon`` alone) holds comma-separated ``POINT:N`` or ``POINT:N:kill`` items: at the Nth pass
through ``POINT`` the daemon raises :class:`InjectedFault`, or with ``kill`` sends itself SIGKILL
(an abrupt death: no ``finally``, no flush). Points (see ``POINTS``): ``ingest`` (after the engine
took a batch, before its events are sent), ``deliver`` (halfway through sending a batch's events),
``checkpoint`` (before a checkpoint file is written) and ``commit`` (checkpoints durable, offsets
not yet committed).

>>> plan = FaultPlan.parse("ingest:2")
>>> plan.hit("ingest")
>>> plan.hit("ingest")  # doctest: +IGNORE_EXCEPTION_DETAIL
Traceback (most recent call last):
...
streamdet.daemon.faults.InjectedFault: injected fault at ingest #2 (STREAMDET_FAULT)
"""

from __future__ import annotations

import os
import signal
import threading
from collections import Counter
from collections.abc import Mapping

ENV = "STREAMDET_FAULT"
POINTS = ("ingest", "deliver", "checkpoint", "commit")


class InjectedFault(RuntimeError):
    """Raised at an injected fault point; stands for any unexpected error (a bug)."""


class FaultPlan:
    """Where to fail: point -> (call number, kill?). An empty plan costs one dict lookup per pass."""

    def __init__(self, faults: Mapping[str, tuple[int, bool]] | None = None) -> None:
        self.faults = dict(faults or {})
        self.calls: Counter[str] = Counter()
        self._lock = threading.Lock()  # checkpoint points run on the writer thread

    @classmethod
    def parse(cls, text: str) -> FaultPlan:
        faults: dict[str, tuple[int, bool]] = {}
        for item in filter(None, (s.strip() for s in text.split(","))):
            parts = item.split(":")
            if (len(parts) not in (2, 3) or parts[0] not in POINTS or not parts[1].isdigit()
                    or int(parts[1]) < 1 or (len(parts) == 3 and parts[2] != "kill")):
                raise ValueError(f"{ENV}: bad item {item!r}; expected POINT:N or POINT:N:kill with "
                                 f"POINT one of {', '.join(POINTS)} and N >= 1")
            faults[parts[0]] = (int(parts[1]), len(parts) == 3)
        return cls(faults)

    @classmethod
    def from_environment(cls, env: Mapping[str, str] | None = None) -> FaultPlan:
        return cls.parse((os.environ if env is None else env).get(ENV, ""))

    def hit(self, point: str) -> None:
        """Count a pass through ``point``; fail if this is the planned one."""
        if point not in self.faults:
            return
        with self._lock:
            self.calls[point] += 1
            n = self.calls[point]
        at, kill = self.faults[point]
        if n != at:
            return
        if kill:
            os.kill(os.getpid(), signal.SIGKILL)
        raise InjectedFault(f"injected fault at {point} #{n} ({ENV})")
