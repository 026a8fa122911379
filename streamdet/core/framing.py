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


def unpack(data: bytes, magic: bytes, version: int, what: str) -> tuple[dict[str, Any], bytes]:
    if not data.startswith(magic) or len(data) < len(magic) + 8:
        raise FrameError(f"not a streamdet {what} (bad magic)")
    got, head_len = struct.unpack_from(">II", data, len(magic))
    if got != version:
        raise FrameError(f"{what} version {got}, this build reads {version}")
    off = len(magic) + 8
    try:
        header = orjson.loads(data[off:off + head_len])
    except orjson.JSONDecodeError:
        raise FrameError(f"{what} header is damaged") from None
    body = data[off + head_len:]
    if not isinstance(header, dict) or hashlib.sha256(body).hexdigest() != header.get("sha256"):
        raise FrameError("checksum mismatch: the bytes are truncated or damaged")
    return header, body
