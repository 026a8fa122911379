"""The mutes HTTP API (streamdet/daemon/mutes_api.py) and its settings, hostile cases first.

Status codes follow RFC 9110 (400, 403, 404, 405, 409, 411, 413 "Content Too Large", 415).
"""

from __future__ import annotations

import io
import json
import re
import urllib.error
import urllib.request

import pytest
from prometheus_client import CollectorRegistry

from streamdet.config import ConfigError, parse_config
from streamdet.core.mutes import parse_mute
from streamdet.daemon.health import HealthServer, Metrics
from streamdet.daemon.mutes_api import MAX_BODY, MuteBoard, is_loopback, mutes_app
from streamdet.daemon.settings import parse_settings

GOOD = {"match": {"labels": {"service": "checkout"}}, "start": "2024-05-01T22:00:00Z",
        "end": "2024-05-02T02:00:00Z", "comment": "database migration", "created_by": "ops"}
PLANNED = {"id": "planned", "match": {"metric": "queries"}, "start": 0, "end": 10}


def call(app, method, path, body=b"", ctype="application/json", remote="127.0.0.1", length=None):
    environ = {"REQUEST_METHOD": method, "PATH_INFO": path, "REMOTE_ADDR": remote,
               "CONTENT_TYPE": ctype, "wsgi.input": io.BytesIO(body),
               "CONTENT_LENGTH": str(len(body)) if length is None else length}
    seen = {}

    def start_response(status, headers):
        seen["status"] = int(status.split()[0])

    out = b"".join(app(environ, start_response))
    return seen["status"], json.loads(out)


def board_and_app(**kw):
    board = MuteBoard([parse_mute(PLANNED, origin="config")])
    return board, mutes_app(board, **kw)


def test_post_list_delete_and_the_changes_queued_for_the_loop():
    board, app = board_and_app()
    status, body = call(app, "POST", "/mutes", json.dumps(GOOD).encode())
    assert status == 201 and body["learn"] is False and body["origin"] == "api"
    mid = body["id"]
    assert call(app, "POST", "/mutes", json.dumps({**GOOD, "id": mid}).encode())[0] == 200  # replaced
    status, listing = call(app, "GET", "/mutes")
    assert status == 200 and sorted(m["id"] for m in listing["mutes"]) == sorted(["planned", mid])
    assert call(app, "DELETE", f"/mutes/{mid}") == (200, {"deleted": mid})
    changes = board.drain()
    assert [c[0] for c in changes] == ["add", "add", "remove"] and board.drain() == []
    assert call(app, "DELETE", f"/mutes/{mid}")[0] == 404  # gone now


@pytest.mark.parametrize(("args", "status", "why"), [
    (("POST", "/mutes", b"{not json"), 400, "not JSON"),
    (("POST", "/mutes", b"\xff\xfe"), 400, "not JSON"),
    (("POST", "/mutes", b"[" * 100_000), 413, "body over"),
    (("POST", "/mutes", b"[" * 50_000 + b"]" * 50_000), 413, "body over"),
    (("POST", "/mutes", b"[" * 30_000 + b"]" * 30_000), 400, "not JSON|expected a mapping"),
    (("POST", "/mutes", b"[]"), 400, "expected a mapping"),
    (("POST", "/mutes", json.dumps({**GOOD, "end": 0}).encode()), 400, "mute.end"),
    (("POST", "/mutes", json.dumps({**GOOD, "origin": "config"}).encode()), 400, "origin"),
    (("POST", "/mutes", json.dumps({**GOOD, "match": {"labels": {"a": {"regex": "(x+)+"}}}}).encode()),
     400, "regular expression not allowed"),
    (("POST", "/mutes", json.dumps({**GOOD, "match": {}}).encode()), 400, "selects every series"),
    (("POST", "/mutes", json.dumps({**GOOD, "id": "planned"}).encode()), 409, "config file"),
    (("DELETE", "/mutes/planned"), 409, "config file"),
    (("DELETE", "/mutes/nope"), 404, "no mute"),
    (("DELETE", "/mutes/a/b"), 404, "no such path"),
    (("PUT", "/mutes"), 405, "GET or POST"),
    (("GET", "/mutes/x"), 405, "DELETE"),
])
def test_hostile_requests_get_a_4xx_with_a_reason(args, status, why):
    _board, app = board_and_app()
    got, body = call(app, *args)
    assert got == status
    assert any(re.search(why, e) for e in body["error"]), body


def test_wrong_content_type_and_missing_length_are_refused():
    _board, app = board_and_app()
    body = json.dumps(GOOD).encode()
    assert call(app, "POST", "/mutes", body, ctype="text/plain")[0] == 415
    assert call(app, "POST", "/mutes", body, ctype="")[0] == 415
    assert call(app, "POST", "/mutes", body, length="")[0] == 411
    assert call(app, "POST", "/mutes", body, length="-5")[0] == 413
    assert call(app, "POST", "/mutes", body, length=str(MAX_BODY + 1))[0] == 413
    assert call(app, "POST", "/mutes", body, ctype="application/json; charset=utf-8")[0] == 201


def test_remote_addresses_are_refused_unless_allowed():
    board, app = board_and_app()
    for remote in ("10.0.0.7", "192.168.1.2", "::ffff:10.0.0.1", "", "not-an-address"):
        status, body = call(app, "POST", "/mutes", json.dumps(GOOD).encode(), remote=remote)
        assert status == 403 and "loopback" in body["error"][0]
    assert board.drain() == []
    assert call(app, "GET", "/mutes", remote="127.0.0.2")[0] == 200
    assert call(app, "GET", "/mutes", remote="::1")[0] == 200
    _board, open_app = board_and_app(allow_remote=True)
    assert call(open_app, "GET", "/mutes", remote="10.0.0.7")[0] == 200


def test_a_restored_checkpoint_cannot_revive_a_deleted_or_expired_mute():
    board, _app = board_and_app()
    a = parse_mute({**GOOD, "id": "a"})
    b = parse_mute({**GOOD, "id": "b"})
    c = parse_mute({**GOOD, "id": "c"})
    board.post(a)
    board.post(c)
    board.delete("a")
    board.expired(["c"])
    assert [m.id for m in board.adopt([a, b, c])] == ["b"]


def test_is_loopback():
    assert is_loopback("127.0.0.1") and is_loopback("127.255.0.9") and is_loopback("[::1]")
    assert is_loopback("localhost")
    assert not is_loopback("0.0.0.0") and not is_loopback("10.1.1.1") and not is_loopback("example")


def settings(health):
    return parse_settings(parse_config({"health": health}))


def test_settings_off_by_default_and_loopback_only():
    s = settings({})
    assert s.mutes_api is False and s.mutes_api_remote is False
    assert settings({"mutes_api": True}).mutes_api is True
    with pytest.raises(ConfigError, match=r"health\.mutes_api: the health address '0\.0\.0\.0:9464' is "
                       r"not a loopback"):
        settings({"address": "0.0.0.0:9464", "mutes_api": True})
    assert settings({"address": "0.0.0.0:9464", "mutes_api": True, "mutes_api_remote": True}).mutes_api
    with pytest.raises(ConfigError, match=r"health\.mutes_api: expected true or false"):
        settings({"mutes_api": "yes"})


def test_the_health_server_routes_mutes_and_ids_below_it():
    _board, app = board_and_app()
    server = HealthServer(Metrics(CollectorRegistry()), lambda: (True, "ok"), "127.0.0.1", 0,
                          {"/mutes": app, "/mutes/": app}).start()
    try:
        base = f"http://127.0.0.1:{server.port}"
        req = urllib.request.Request(f"{base}/mutes", data=json.dumps({**GOOD, "id": "x1"}).encode(),
                                     headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=5) as r:
            assert r.status == 201
        req = urllib.request.Request(f"{base}/mutes/x1", method="DELETE")
        with urllib.request.urlopen(req, timeout=5) as r:
            assert r.status == 200
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(urllib.request.Request(f"{base}/mutes/x1", method="DELETE"), timeout=5)
        assert err.value.code == 404
        with urllib.request.urlopen(f"{base}/metrics", timeout=5) as r:
            assert b"streamdet_steps_muted_total" in r.read()
    finally:
        server.stop()
