"""Checkpoints written off the consume loop, one at a time, in the order that keeps them honest.

The loop takes a *cut* between two batches: the offsets of every changed partition, the
producer's barrier (every event and dead letter handed over so far) and a frozen image of the
engines. On POSIX the image is a forked child process (copy-on-write: the loop stops only for
the ``fork`` call, tens of ms at 200,000 series, and the child's snapshot and write never
compete for the loop's GIL); elsewhere it is an in-memory ``pickle`` copy snapshotted by a
thread. Either way nothing is written until the loop reports the barrier acknowledged
(:meth:`CheckpointWriter.release`); then the checkpoint files are written durably, and only
after that does the loop commit the offsets (:meth:`CheckpointWriter.finished`). A cut that is
never released (a crash, a shutdown without acknowledgements) is abandoned; if the daemon dies,
the child sees its pipe close and writes nothing it was not told to.
"""

from __future__ import annotations

import logging
import os
import pickle
import signal
import sys
import threading
import time
import traceback
from dataclasses import dataclass, field

from streamdet.core.engine import Engine
from streamdet.daemon.faults import FaultPlan
from streamdet.daemon.state_store import Checkpoint, StateStore

log = logging.getLogger("streamdet.checkpoint")
TP = tuple[str, int]
CHILD_TIMEOUT = 600.0  # a child that takes longer is presumed stuck, killed, and the cut retried


def frozen_copy(engine: Engine) -> bytes:
    """The engine's whole state as an in-memory copy (the fallback where there is no ``fork``).

    Never written anywhere: the stored format is ``Engine.snapshot()``, with no pickle.
    """
    return pickle.dumps(engine, protocol=pickle.HIGHEST_PROTOCOL)


def write_checkpoints(store: StateStore, items: list[tuple[TP, int, bytes]]) -> None:
    """Write ``(partition, next offset, snapshot)`` checkpoints durably, one file each."""
    for (topic, partition), offset, snapshot in items:
        store.save(Checkpoint(topic, partition, offset, snapshot))


@dataclass(slots=True)
class Cut:
    """A consistent point of every changed partition: offsets, producer barrier, engine images."""

    offsets: dict[TP, int]
    barrier: int
    copies: dict[TP, bytes] = field(default_factory=dict)  # thread mode only
    pause: float = 0.0  # seconds the loop spent taking it
    started: float = field(default_factory=time.monotonic)


class CheckpointWriter:
    """At most one cut in flight; the loop releases it, a child (or thread) writes it, the loop commits."""

    def __init__(self, store: StateStore, faults: FaultPlan | None = None, *,
                 use_fork: bool | None = None) -> None:
        self.store = store
        self.faults = faults or FaultPlan()
        # A store written from a forked child must not need anything a fork leaves behind
        # (threads, client connections): it says so with ``fork_safe = True``.
        if use_fork is None:
            use_fork = hasattr(os, "fork") and getattr(store, "fork_safe", False)
        self.use_fork = use_fork
        self.cut: Cut | None = None
        self._released = threading.Event()
        self._abandoned = threading.Event()
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None
        self._written = False
        self._retry = False

    @property
    def busy(self) -> bool:
        return self.cut is not None

    @property
    def released(self) -> bool:
        return self._released.is_set()

    def start(self, offsets: dict[TP, int], barrier: int, engines: dict[TP, Engine]) -> Cut:
        """Take the cut (the only part on the loop thread) and start writing it in the background."""
        if self.cut is not None:
            raise RuntimeError("a checkpoint is already in flight")
        self._released.clear()
        self._abandoned.clear()
        self._error, self._written, self._retry = None, False, False
        began = time.monotonic()
        if self.use_fork:
            cut = Cut(dict(offsets), barrier)
            go_read, go_write = os.pipe()
            pid = os.fork()
            if pid == 0:  # the child: never returns
                os.close(go_write)
                self._child(cut, engines, go_read)
            os.close(go_read)
            target, args = self._watch_child, (cut, pid, go_write)
        else:
            cut = Cut(dict(offsets), barrier, {k: frozen_copy(e) for k, e in engines.items()})
            target, args = self._write_in_thread, (cut,)
        cut.pause = time.monotonic() - began
        self.cut = cut
        self._thread = threading.Thread(target=target, args=args, name="streamdet-checkpoint", daemon=True)
        self._thread.start()
        return cut

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

        An error while writing is raised here, on the loop thread. A stuck child is killed and
        the cut dropped (``retry`` is then true: its partitions need a new cut).
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

    @property
    def retry(self) -> bool:
        return self._retry

    # ------------------------------------------------------------ the two ways of writing

    def _wait_for_release(self) -> bool:
        while not self._released.wait(0.1):
            if self._abandoned.is_set():
                log.info("checkpoint abandoned before its events were acknowledged")
                return False
        return True

    def _hit_checkpoint_faults(self, cut: Cut) -> None:
        for _ in cut.offsets:
            self.faults.hit("checkpoint")  # test-only (STREAMDET_FAULT): once per file

    def _write_in_thread(self, cut: Cut) -> None:
        try:
            snapshots = []
            for key in list(cut.copies):
                engine = pickle.loads(cut.copies.pop(key))  # free each copy as soon as it is used
                snapshots.append((key, cut.offsets[key], engine.snapshot()))
                del engine
            if not self._wait_for_release():
                return
            self._hit_checkpoint_faults(cut)
            write_checkpoints(self.store, snapshots)
            self._written = True
        except BaseException as exc:  # reported on the loop thread by finished()
            self._error = exc

    def _child(self, cut: Cut, engines: dict[TP, Engine], go: int) -> None:
        """In the forked child: snapshot, wait for the go-ahead, write, exit. Never returns.

        Touches only the engines, the store and the pipe (no Kafka client, no logging), and
        leaves by ``os._exit`` so nothing inherited is flushed or closed twice.
        """
        code = 1
        try:
            items = [(k, cut.offsets[k], engines[k].snapshot()) for k in cut.offsets]
            if os.read(go, 1) == b"1":  # EOF (the daemon died) or b"0": write nothing
                write_checkpoints(self.store, items)
                code = 0
            else:
                code = 3
        except BaseException:
            try:
                sys.stderr.write("checkpoint writer process failed:\n" + traceback.format_exc())
                sys.stderr.flush()
            except BaseException:
                pass
        finally:
            os._exit(code)

    def _watch_child(self, cut: Cut, pid: int, go: int) -> None:
        try:
            released = self._wait_for_release()
            if released:
                self._hit_checkpoint_faults(cut)
            os.write(go, b"1" if released else b"0")
            os.close(go)
            go = -1
            deadline = time.monotonic() + CHILD_TIMEOUT
            while True:
                done, status = os.waitpid(pid, os.WNOHANG)
                if done:
                    break
                if time.monotonic() > deadline or (self._abandoned.is_set() and not released):
                    os.kill(pid, signal.SIGKILL)
                    os.waitpid(pid, 0)
                    if released:
                        log.error("checkpoint writer process stuck for %.0f s; killed, the cut is "
                                  "dropped and taken again", CHILD_TIMEOUT)
                        self._retry = True
                    return
                time.sleep(0.01)
            code = os.waitstatus_to_exitcode(status)
            if released and code == 0:
                self._written = True
            elif released:
                raise RuntimeError(f"checkpoint writer process failed (exit status {code}); "
                                   f"see its traceback above")
        except BaseException as exc:
            self._error = exc
            if go >= 0:
                os.close(go)
            try:
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
            except (ProcessLookupError, ChildProcessError):
                pass
