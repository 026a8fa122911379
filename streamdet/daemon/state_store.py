"""Durable engine checkpoints per input partition, behind a small StateStore interface.

A checkpoint is the engine snapshot plus the input offset it covers (the next offset to
read). Files are written atomically (temp file, fsync, rename, fsync of the directory),
versioned and checksummed; a damaged or incompatible file is an error naming the file,
never a silent reset.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

from streamdet.core import framing

MAGIC = b"SDETCKPT"
VERSION = 1


class StateError(RuntimeError):
    """A checkpoint that exists but cannot be used; names the file and the fix."""


@dataclass(frozen=True, slots=True)
class Checkpoint:
    topic: str
    partition: int
    next_offset: int
    snapshot: bytes


class StateStore(Protocol):
    def load(self, topic: str, partition: int) -> Checkpoint | None: ...
    def save(self, checkpoint: Checkpoint) -> None: ...
    def discard(self, topic: str, partition: int) -> None: ...


def _safe(topic: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]", "_", topic)


class LocalStateStore:
    """One file per partition in a directory: ``<topic>-<partition>.ckpt``."""

    fork_safe = True  # plain file writes: usable from the checkpoint writer's forked child

    def __init__(self, directory: str | Path) -> None:
        self.dir = Path(directory)
        self.dir.mkdir(parents=True, exist_ok=True)

    def path(self, topic: str, partition: int) -> Path:
        return self.dir / f"{_safe(topic)}-{partition}.ckpt"

    def save(self, checkpoint: Checkpoint) -> None:
        data = framing.pack(MAGIC, VERSION, {"topic": checkpoint.topic, "partition": checkpoint.partition,
                                             "next_offset": checkpoint.next_offset}, checkpoint.snapshot)
        final = self.path(checkpoint.topic, checkpoint.partition)
        tmp = final.with_suffix(".tmp")
        with open(tmp, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, final)
        dir_fd = os.open(self.dir, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)

    def load(self, topic: str, partition: int) -> Checkpoint | None:
        path = self.path(topic, partition)
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            return None
        hint = f"(start this partition fresh with --fresh-partition {topic}:{partition})"
        try:
            header, snapshot = framing.unpack(data, MAGIC, VERSION, "checkpoint")
        except framing.FrameError as exc:
            raise StateError(f"{path}: {exc} {hint}") from None
        if header.get("topic") != topic or header.get("partition") != partition:
            raise StateError(f"{path}: belongs to {header.get('topic')}:{header.get('partition')} {hint}")
        return Checkpoint(topic, partition, int(header["next_offset"]), snapshot)

    def discard(self, topic: str, partition: int) -> None:
        self.path(topic, partition).unlink(missing_ok=True)
