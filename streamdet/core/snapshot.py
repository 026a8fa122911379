"""Engine snapshot bytes: taking them apart from the live engine quickly, encoding and decoding.

A snapshot (version 2) is one :mod:`framing` frame: a small JSON header, then a body of raw
array buffers laid end to end (64-byte aligned; the header lists name, dtype, shape and
offset of each). Series keys are one UTF-8 text with a length per row; labels are a table of
distinct strings with an int32 index per metric, label name and value, so restoring 200,000
series makes no per-row Python calls and equal label values share one string. Version 1
(JSON keys and labels, ``.npz`` arrays) is still read.

Taking a snapshot is split so a daemon can keep its loop pause short:
:meth:`Engine.snapshot_parts` copies the state (one memory copy, on the loop thread) and
:func:`encode_snapshot` turns the copy into bytes (hashing and joining; safe in another thread).
"""

from __future__ import annotations

import hashlib
import io
import struct
from dataclasses import dataclass, field
from itertools import chain
from operator import itemgetter
from typing import Any

import numpy as np

from streamdet.core import framing

SNAPSHOT_MAGIC = b"SDETSNAP"
SNAPSHOT_VERSION = 2
READABLE_VERSIONS = (1, 2)
ALIGN = 64


class SnapshotError(ValueError):
    """A snapshot that cannot be restored: damaged, truncated or from an incompatible build."""


class StateChangeError(SnapshotError):
    """A snapshot whose rules no longer match the config, refused because learned state
    would be lost (``state.on_rule_change: error``); the message names the rules."""


@dataclass(slots=True)
class SnapshotParts:
    """A copy of an engine's state, detached from the engine (see :func:`encode_snapshot`).

    ``columns`` is one buffer holding every per-series array at the offsets in ``layout``
    (``name -> (dtype, shape, offset)``); ``keys`` and ``meta`` are shallow copies of the
    series table's lists (their items are immutable); ``header`` holds the small rest.
    """

    header: dict[str, Any]
    columns: np.ndarray
    layout: dict[str, tuple[str, tuple[int, ...], int]]
    keys: list[str | None]
    meta: list[Any]
    free: list[int] = field(default_factory=list)


def _aligned(offset: int) -> int:
    return -(-offset // ALIGN) * ALIGN


def copy_columns(arrays: dict[str, np.ndarray]) -> tuple[np.ndarray, dict]:
    """Every array copied whole into one aligned buffer, and its layout."""
    layout: dict[str, tuple[str, tuple[int, ...], int]] = {}
    offset = 0
    for name, arr in arrays.items():
        layout[name] = (arr.dtype.str, arr.shape, offset)
        offset = _aligned(offset + arr.nbytes)
    buf = np.zeros(offset, np.uint8)  # zeros: padding bytes are deterministic
    for name, arr in arrays.items():
        _dtype, shape, off = layout[name]
        buf[off:off + arr.nbytes].view(arr.dtype).reshape(shape)[...] = arr
    return buf, layout


def _strings_to_blob(strings: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(lengths in characters, UTF-8 text) of a list of strings; C-level iteration only."""
    lengths = np.fromiter(map(len, strings), np.int64, count=len(strings))
    text = "".join(strings).encode("utf-8", "surrogatepass")
    return lengths, np.frombuffer(text, np.uint8)


def _blob_to_strings(lengths: np.ndarray, text: np.ndarray) -> list[str]:
    joined = text.tobytes().decode("utf-8", "surrogatepass")
    ends = np.cumsum(lengths)
    if ends.shape[0] and int(ends[-1]) != len(joined):
        raise SnapshotError("snapshot string table is inconsistent with its lengths")
    starts = ends - lengths
    return list(map(joined.__getitem__, map(slice, starts.tolist(), ends.tolist())))


def _series_arrays(keys: list[str | None], meta: list[Any], free: list[int]) -> dict[str, np.ndarray]:
    """Keys and (metric, labels) of every row as flat arrays (freed rows as empty entries)."""
    keys = list(keys)
    meta = list(meta)
    for row in free:
        keys[row] = ""
        meta[row] = ("", ())
    key_len, key_text = _strings_to_blob(keys)
    labels = list(map(itemgetter(1), meta))
    strings = list(map(itemgetter(0), meta))
    strings.extend(chain.from_iterable(chain.from_iterable(labels)))
    code = dict(zip(dict.fromkeys(strings), range(len(strings)), strict=False))
    str_len, str_text = _strings_to_blob(list(code))
    return {
        "series.key_len": key_len, "series.key_text": key_text,
        "series.label_count": np.fromiter(map(len, labels), np.int64, count=len(labels)),
        "series.string_index": np.fromiter(map(code.__getitem__, strings), np.int32, count=len(strings)),
        "series.string_len": str_len, "series.string_text": str_text,
    }


def _series_lists(arrays: dict[str, np.ndarray], n: int, free: list[int]) -> tuple[list, list]:
    """Inverse of :func:`_series_arrays`."""
    keys: list[str | None] = _blob_to_strings(arrays["series.key_len"], arrays["series.key_text"])
    distinct = _blob_to_strings(arrays["series.string_len"], arrays["series.string_text"])
    counts = arrays["series.label_count"]
    index = arrays["series.string_index"]
    if len(keys) != n or counts.shape[0] != n or index.shape[0] != n + 2 * int(counts.sum()):
        raise SnapshotError("snapshot series table has the wrong number of rows")
    if index.shape[0] and (int(index.min()) < 0 or int(index.max()) >= len(distinct)):
        raise SnapshotError("snapshot label index points outside its string table")
    strings = list(map(distinct.__getitem__, index.tolist()))
    flat = strings[n:]
    pairs = list(zip(flat[0::2], flat[1::2], strict=True))
    ends = np.cumsum(counts)
    labels = list(map(tuple, map(pairs.__getitem__, map(slice, (ends - counts).tolist(), ends.tolist()))))
    meta: list[Any] = list(zip(strings[:n], labels, strict=True))
    for row in free:
        keys[row] = None
        meta[row] = None
    return keys, meta


def encode_snapshot(parts: SnapshotParts) -> bytes:
    """Snapshot bytes from :meth:`Engine.snapshot_parts`; pure (touches no engine), so it can
    run in a background thread while the engine goes on."""
    extra = _series_arrays(parts.keys, parts.meta, parts.free)
    layout = dict(parts.layout)
    chunks: list[Any] = [memoryview(parts.columns)]
    offset = parts.columns.nbytes
    for name, arr in extra.items():
        start = _aligned(offset)
        if start > offset:
            chunks.append(bytes(start - offset))
        layout[name] = (arr.dtype.str, arr.shape, start)
        chunks.append(memoryview(np.ascontiguousarray(arr)).cast("B"))
        offset = start + arr.nbytes
    digest = hashlib.sha256()
    for c in chunks:
        digest.update(c)
    header = {**parts.header, "layout": {k: [d, list(s), o] for k, (d, s, o) in layout.items()},
              "sha256": digest.hexdigest()}
    head = framing.dumps(header)
    prefix = SNAPSHOT_MAGIC + struct.pack(">II", SNAPSHOT_VERSION, len(head)) + head
    return b"".join([prefix, *chunks])


@dataclass(slots=True)
class DecodedSnapshot:
    header: dict[str, Any]
    arrays: dict[str, np.ndarray]  # per-series columns, read-only views into the bytes
    keys: list[str | None]
    meta: list[Any]


def decode_snapshot(data: bytes) -> DecodedSnapshot:
    """Header, arrays, keys and labels from snapshot bytes (version 1 or 2); SnapshotError on
    anything damaged."""
    try:
        version, header, body = framing.unpack_view(data, SNAPSHOT_MAGIC, READABLE_VERSIONS, "snapshot")
    except framing.FrameError as exc:
        raise SnapshotError(str(exc)) from None
    try:
        n = int(header["rows"])
        free = [int(r) for r in header["free"]]
        if version == 1:
            with np.load(io.BytesIO(body), allow_pickle=False) as npz:
                arrays = {k: npz[k] for k in npz.files}
            keys = header["keys"]
            meta = [None if m is None else (m[0], tuple(tuple(x) for x in m[1])) for m in header["meta"]]
            return DecodedSnapshot(header, arrays, keys, meta)
        arrays = {}
        for name, (dtype, shape, offset) in header["layout"].items():
            dt = np.dtype(dtype)
            count = int(np.prod(shape, dtype=np.int64))
            if offset < 0 or offset + count * dt.itemsize > len(body):
                raise SnapshotError(f"snapshot array {name!r} runs past the end of the data")
            arrays[name] = np.frombuffer(body, dt, count, offset).reshape(shape)
        keys, meta = _series_lists(arrays, n, free)
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, SnapshotError):
            raise
        raise SnapshotError(f"snapshot header is malformed ({type(exc).__name__}: {exc})") from None
    return DecodedSnapshot(header, arrays, keys, meta)


# ------------------------------------------------------------------ restore report

@dataclass(frozen=True, slots=True)
class RuleChange:
    """What a restore did with one rule's series because the config changed."""

    rule: str
    series: int
    change: str  # what differs, e.g. "not in the config", "step 60s -> 300s"
    action: str  # "dropped" or "learning again"
    open_breaches: int = 0

    def __str__(self) -> str:
        text = f"rule {self.rule!r}: {self.change}: {self.series} series {self.action}"
        if self.open_breaches:
            closing = ("closed" if self.action == "learning again"
                       else "dropped without a closed event")
            text += f" ({self.open_breaches} open breach(es) {closing})"
        return text


@dataclass(frozen=True, slots=True)
class RestoreReport:
    """What :meth:`Engine.restore` kept, dropped and reset, by rule name."""

    series_kept: int = 0
    changes: tuple[RuleChange, ...] = ()
    held_points_dropped: int = 0  # points held while a step was inferred, for a rule now fixed

    @property
    def series_dropped(self) -> int:
        return sum(c.series for c in self.changes if c.action == "dropped")

    @property
    def series_relearning(self) -> int:
        return sum(c.series for c in self.changes if c.action == "learning again")

    def lines(self) -> list[str]:
        out = [str(c) for c in self.changes]
        if self.held_points_dropped:
            out.append(f"{self.held_points_dropped} point(s) held for step inference dropped "
                       "(their rule now has a fixed step)")
        return out

    def __str__(self) -> str:
        lines = self.lines()
        head = f"{self.series_kept} series restored"
        return head + ("; " + "; ".join(lines) if lines else "")
