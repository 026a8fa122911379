"""One binary frame for saved state: magic, version, a JSON header, a body, and its SHA-256.

Used by engine snapshots and daemon checkpoints, so both refuse damaged or foreign bytes the
same way.

>>> h, b = unpack(pack(b"TESTMAGC", 1, {"a": 1}, b"body"), b"TESTMAGC", 1, "test frame")
>>> h["a"], b
(1, b'body')
"""

from __future__ import annotations

import hashlib
import struct
from typing import Any

import orjson


class FrameError(ValueError):
    """Bytes that are not a valid frame of the expected kind; the message says why."""


def pack(magic: bytes, version: int, header: dict[str, Any], body: bytes) -> bytes:
    head = orjson.dumps({**header, "sha256": hashlib.sha256(body).hexdigest()})
    return magic + struct.pack(">II", version, len(head)) + head + body


def dumps(header: dict[str, Any]) -> bytes:
    """The header's JSON bytes (for writers that hash and join the body themselves)."""
    return orjson.dumps(header)


def unpack(data: bytes, magic: bytes, version: int, what: str) -> tuple[dict[str, Any], bytes]:
    _got, header, body = unpack_view(data, magic, (version,), what)
    return header, bytes(body)


def unpack_view(data: bytes, magic: bytes, versions: tuple[int, ...], what: str
                ) -> tuple[int, dict[str, Any], memoryview]:
    """Like :func:`unpack`, accepting any of ``versions``; the body is a view (no copy)."""
    if not data.startswith(magic) or len(data) < len(magic) + 8:
        raise FrameError(f"not a streamdet {what} (bad magic)")
    got, head_len = struct.unpack_from(">II", data, len(magic))
    if got not in versions:
        readable = " or ".join(str(v) for v in versions)
        raise FrameError(f"{what} version {got}, this build reads {readable}")
    off = len(magic) + 8
    try:
        header = orjson.loads(data[off:off + head_len])
    except orjson.JSONDecodeError:
        raise FrameError(f"{what} header is damaged") from None
    body = memoryview(data)[off + head_len:]
    if not isinstance(header, dict) or hashlib.sha256(body).hexdigest() != header.get("sha256"):
        raise FrameError("checksum mismatch: the bytes are truncated or damaged")
    return got, header, body
