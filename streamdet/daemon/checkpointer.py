"""Checkpoints written off the consume loop, one at a time, in the order that keeps them honest.

The loop thread takes a *cut* between two batches: a private copy of each changed partition's
engine (``pickle`` in memory, never stored: a few hundred ms at 200,000 series, against seconds
for ``Engine.snapshot()`` plus the file write) with the offset it covers, and the producer's
barrier (every event and dead letter handed over so far). A background thread turns the copies
into snapshots while the loop goes on consuming. It writes nothing until the loop reports the
barrier acknowledged (:meth:`CheckpointWriter.release`); then it writes each checkpoint file
durably, and only after that does the loop commit the offsets (:meth:`CheckpointWriter.finished`).
A cut that is never released (a crash, a shutdown without acknowledgements) is abandoned.
"""

from __future__ import annotations

import logging
import pickle
import threading
import time
from dataclasses import dataclass, field

from streamdet.core.engine import Engine
from streamdet.daemon.faults import FaultPlan
from streamdet.daemon.state_store import Checkpoint, StateStore

log = logging.getLogger("streamdet.checkpoint")
TP = tuple[str, int]


def frozen_copy(engine: Engine) -> bytes:
    """The engine's whole state as an in-memory copy, fast enough for the consume loop.

    Arrays are copied in one pass and key strings by the C pickler; the copy is turned back into
    an engine (and its snapshot) on the writer thread. Never written anywhere: the stored format
    is ``Engine.snapshot()``, with no pickle.
    """
    return pickle.dumps(engine, protocol=pickle.HIGHEST_PROTOCOL)


def write_checkpoints(store: StateStore, items: list[tuple[TP, int, bytes]], faults: FaultPlan) -> None:
    """Write ``(partition, next offset, snapshot)`` checkpoints durably, one file each."""
    for (topic, partition), offset, snapshot in items:
        faults.hit("checkpoint")  # test-only (STREAMDET_FAULT)
        store.save(Checkpoint(topic, partition, offset, snapshot))


@dataclass(slots=True)
class Cut:
    """A consistent point of every changed partition: engine copies, offsets, producer barrier."""

    offsets: dict[TP, int]
    copies: dict[TP, bytes]
    barrier: int
    pause: float = 0.0  # seconds the loop spent taking it
    started: float = field(default_factory=time.monotonic)


class CheckpointWriter:
    """At most one cut in flight; the loop releases it, the thread writes it, the loop commits."""

    def __init__(self, store: StateStore, faults: FaultPlan | None = None) -> None:
        self.store = store
        self.faults = faults or FaultPlan()
        self.cut: Cut | None = None
        self._released = threading.Event()
        self._abandoned = threading.Event()
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None
        self._written = False

    @property
    def busy(self) -> bool:
        return self.cut is not None

    @property
    def released(self) -> bool:
        return self._released.is_set()

    def start(self, cut: Cut) -> None:
        if self.cut is not None:
            raise RuntimeError("a checkpoint is already in flight")
        self.cut = cut
        self._released.clear()
        self._abandoned.clear()
        self._error = None
        self._written = False
        self._thread = threading.Thread(target=self._write, args=(cut,), name="streamdet-checkpoint",
                                        daemon=True)
        self._thread.start()

    def release(self) -> None:
        """The cut's events are acknowledged: its checkpoints may now be written."""
        self._released.set()

    def abandon(self, timeout: float = 5.0) -> None:
        """Give up a cut (crash or shutdown): nothing more is written unless already released."""
        self._abandoned.set()
        if self._thread is not None:
            self._thread.join(timeout)
        self.cut = None
        self._thread = None

    def finished(self, timeout: float = 0.0) -> Cut | None:
        """The cut, once its checkpoints are durable (then the writer is free again); else None.

        An error on the writer thread is raised here, on the loop thread.
        """
        if self._thread is None:
            return None
        self._thread.join(timeout)
        if self._thread.is_alive():
            return None
        cut, error, written = self.cut, self._error, self._written
        self.cut = None
        self._thread = None
        if error is not None:
            raise error
        return cut if written else None

    def _write(self, cut: Cut) -> None:
        try:
            snapshots = []
            for key in list(cut.copies):
                engine = pickle.loads(cut.copies.pop(key))  # free each copy as soon as it is used
                snapshots.append((key, cut.offsets[key], engine.snapshot()))
                del engine
            while not self._released.wait(0.1):
                if self._abandoned.is_set():
                    log.info("checkpoint abandoned before its events were acknowledged")
                    return
            write_checkpoints(self.store, snapshots, self.faults)
            self._written = True
        except BaseException as exc:  # reported on the loop thread by finished()
            self._error = exc
