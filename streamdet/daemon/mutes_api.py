"""The mutes HTTP API on the health port: ``GET /mutes``, ``POST /mutes``, ``DELETE /mutes/{id}``.

The HTTP threads never touch an engine: :class:`MuteBoard` keeps the API's mutes under a lock
and queues each change; the consume loop drains the queue between batches and applies it to
every partition's engine (``Daemon._apply_mutes``). Off unless ``health.mutes_api: true``;
requests from other than loopback addresses are refused unless ``health.mutes_api_remote: true``.
"""

from __future__ import annotations

import ipaddress
import json
import queue
import threading
import uuid
from collections.abc import Callable, Iterable
from typing import Any

from streamdet.core.mutes import MAX_MUTES, Mute, MuteError, parse_mute

MAX_BODY = 64 * 1024  # bytes of a POST body


class MuteBoard:
    """The mutes known to this process (config and API), and the changes not yet applied."""

    def __init__(self, config_mutes: Iterable[Mute] = ()) -> None:
        self._lock = threading.Lock()
        self.config = {m.id: m for m in config_mutes}
        self.api: dict[str, Mute] = {}
        self.deleted: set[str] = set()  # deleted or expired here: a restored engine must not revive them
        self.changes: queue.SimpleQueue = queue.SimpleQueue()

    def listing(self) -> list[dict[str, Any]]:
        with self._lock:
            return [m.to_json() for m in (*self.config.values(), *self.api.values())]

    def post(self, mute: Mute) -> bool:
        """Add or replace an API mute; True when it is new. Raises MuteError for a config id."""
        with self._lock:
            if mute.id in self.config:
                raise MuteError([f"id {mute.id!r} belongs to a mute in the config file; change it there"])
            new = mute.id not in self.api
            if new and len(self.api) + len(self.config) >= MAX_MUTES:
                raise MuteError([f"at most {MAX_MUTES} mutes"])
            self.api[mute.id] = mute
            self.deleted.discard(mute.id)
            self.changes.put(("add", mute))
            return new

    def delete(self, mute_id: str) -> str:
        """``deleted``, ``config`` (refused: it is in the file) or ``unknown``."""
        with self._lock:
            if mute_id in self.config:
                return "config"
            if self.api.pop(mute_id, None) is None:
                return "unknown"
            self.deleted.add(mute_id)
            self.changes.put(("remove", mute_id))
            return "deleted"

    def drain(self) -> list[tuple[str, Any]]:
        out = []
        while True:
            try:
                out.append(self.changes.get_nowait())
            except queue.Empty:
                return out

    def adopt(self, restored: Iterable[Mute]) -> list[Mute]:
        """Take the API mutes a restored checkpoint holds (unless deleted since); returns the
        full API set, which the restored engine then takes."""
        with self._lock:
            for m in restored:
                if m.id not in self.api and m.id not in self.deleted and m.id not in self.config:
                    self.api[m.id] = m
            return list(self.api.values())

    def expired(self, ids: Iterable[str]) -> None:
        """Mutes an engine dropped by data time leave the listing (other engines drop them too)."""
        with self._lock:
            for i in ids:
                if self.api.pop(i, None) is not None:
                    self.deleted.add(i)


def is_loopback(host: str) -> bool:
    """``127.0.0.0/8``, ``::1`` or ``localhost``."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def _reply(start_response: Callable, status: str, body: Any) -> list[bytes]:
    data = (json.dumps(body, indent=1) + "\n").encode()
    start_response(status, [("Content-Type", "application/json"), ("Content-Length", str(len(data)))])
    return [data]


def _error(start_response: Callable, status: str, reason: str | list[str]) -> list[bytes]:
    return _reply(start_response, status, {"error": reason if isinstance(reason, list) else [reason]})


def mutes_app(board: MuteBoard, *, allow_remote: bool = False) -> Callable:
    """The WSGI app for ``/mutes`` and ``/mutes/{id}``."""

    def app(environ: dict, start_response: Callable) -> list[bytes]:
        if not allow_remote and not is_loopback(environ.get("REMOTE_ADDR", "")):
            return _error(start_response, "403 Forbidden", "the mutes API answers loopback addresses only "
                          "(health.mutes_api_remote: true allows others)")
        path = environ.get("PATH_INFO", "")
        method = environ.get("REQUEST_METHOD", "GET")
        if path == "/mutes":
            if method == "GET":
                return _reply(start_response, "200 OK", {"mutes": board.listing()})
            if method == "POST":
                return _post(environ, start_response)
            return _error(start_response, "405 Method Not Allowed", "use GET or POST on /mutes")
        mute_id = path.removeprefix("/mutes/")
        if not mute_id or "/" in mute_id:
            return _error(start_response, "404 Not Found", "no such path; use /mutes or /mutes/{id}")
        if method != "DELETE":
            return _error(start_response, "405 Method Not Allowed", "use DELETE on /mutes/{id}")
        outcome = board.delete(mute_id)
        if outcome == "unknown":
            return _error(start_response, "404 Not Found", f"no mute with id {mute_id[:100]!r}")
        if outcome == "config":
            return _error(start_response, "409 Conflict",
                          f"mute {mute_id!r} is in the config file; remove it there")
        return _reply(start_response, "200 OK", {"deleted": mute_id})

    def _post(environ: dict, start_response: Callable) -> list[bytes]:
        ctype = environ.get("CONTENT_TYPE", "").split(";")[0].strip().lower()
        if ctype != "application/json":
            return _error(start_response, "415 Unsupported Media Type",
                          f"expected Content-Type application/json, got {ctype[:100]!r}")
        try:
            length = int(environ.get("CONTENT_LENGTH") or "")
        except ValueError:
            return _error(start_response, "411 Length Required", "a Content-Length is required")
        if length < 0 or length > MAX_BODY:
            return _error(start_response, "413 Content Too Large", f"body over {MAX_BODY} bytes")
        body = environ["wsgi.input"].read(length)
        try:
            raw = json.loads(body)
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            return _error(start_response, "400 Bad Request", f"body is not JSON ({exc})")
        except RecursionError:
            return _error(start_response, "400 Bad Request", "body is not JSON (nested too deeply)")
        if isinstance(raw, dict) and "origin" in raw:
            return _error(start_response, "400 Bad Request", "mute.origin: set by the server")
        try:
            mute = parse_mute(raw, "mute", origin="api", default_id=uuid.uuid4().hex[:12])
            new = board.post(mute)
        except MuteError as exc:
            return _error(start_response, "400 Bad Request" if "config file" not in str(exc)
                          else "409 Conflict", exc.problems)
        return _reply(start_response, "201 Created" if new else "200 OK", mute.to_json())

    return app
