"""Series bands: the recent-step ring, /series and /series/{key}/band.svg, `streamdet show`.

The ring must hold exactly what replay's step log (``Engine(record_steps=True).log``) holds for
the same input; the HTTP endpoints must hand those numbers out unchanged, refuse hostile input
with a clear status, and never show half a wave to a reader on another thread.
"""

from __future__ import annotations

import json
import threading
import urllib.error
import urllib.request
import xml.etree.ElementTree as ET
from urllib.parse import quote

import numpy as np
import pytest

from streamdet.config import ConfigError, parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.daemon.health import HealthServer, Metrics
from streamdet.daemon.series_api import series_app

# Fictional scenario: a tram depot's door controllers report open-door counts per minute.
ODD_KEY = 'door_open{depot="north \\"yard\\"",path="/a/b",note="{x}"}'
T0 = 1.7e9 - 1.7e9 % 60
KEYS = ['door_open{depot="north"}', 'door_open{depot="south"}', ODD_KEY, "türen_offen"]


def _config(recent: int = 60, **engine) -> object:
    return parse_config({"rules": [{"name": "doors", "step": "60s", "warmup": "20 steps"}],
                         "engine": {"recent_steps": recent, **engine}})


def _data(n_steps: int = 240, seed: int = 3):
    rng = np.random.default_rng(seed)
    t = np.arange(n_steps) * 60.0 + 1.7e9 - 1.7e9 % 60
    series = {}
    for i, key in enumerate(KEYS):
        y = 20 + 5 * i + rng.normal(0, 1, n_steps)
        y[150 + 3 * i:170 + 3 * i] += 25  # a breach in every series
        if i == 1:
            keep = rng.random(n_steps) > 0.1  # gaps: steps without points are not judged
            series[key] = (t[keep], y[keep])
        else:
            series[key] = (t, y)
    return series


def _feed(engine: Engine, series, batches: int = 7) -> list:
    keys, times, values = [], [], []
    for key, (t, y) in series.items():
        keys += [key] * len(t)
        times.append(t + 7.0)
        values.append(y)
    t = np.concatenate(times)
    v = np.concatenate(values)
    order = np.argsort(t, kind="stable")
    keys = [keys[i] for i in order]
    t, v = t[order], v[order]
    meta = {k: (k.split("{")[0], ()) for k in KEYS}
    events = []
    for part in np.array_split(np.arange(len(t)), batches):
        events += engine.ingest(PointBatch([keys[i] for i in part], t[part], v[part], meta))
    return events + engine.finish()


def _log_of(engine: Engine, key: str, last: int) -> dict[str, np.ndarray]:
    cols = engine.log.columns()
    sel = cols["row"] == engine.table.index[key]
    return {n: cols[n][sel][-last:] for n in ("start", "observed", "expected", "lower", "upper")}


def test_ring_holds_the_step_logs_numbers_after_wrapping():
    eng = Engine(_config(recent=60), record_steps=True)
    events = _feed(eng, _data())
    assert any(e.series == ODD_KEY for e in events)
    for key in KEYS:
        band = eng.recent_band(key)
        log = _log_of(eng, key, 60)
        assert band.start.shape[0] == 60  # 240 steps through a 60-slot ring
        np.testing.assert_array_equal(band.start, log["start"])
        for name in ("observed", "expected", "lower", "upper"):
            # the ring keeps float32: equal to the log's float64 rounded to float32
            np.testing.assert_array_equal(getattr(band, name),
                                          log[name].astype(np.float32).astype(np.float64))


def test_breach_periods_in_the_ring_match_the_events():
    eng = Engine(_config(recent=240))
    events = _feed(eng, _data())
    band = eng.recent_band(KEYS[0])
    opened = [e for e in events if e.series == KEYS[0] and e.type.endswith("opened")]
    assert len(band.breaches) == len(opened) == 1
    start, end, side = band.breaches[0]
    assert side == 1 and start <= opened[0].started + 5 * 60 and end > start


def test_ring_is_not_snapshotted_and_restores_empty_with_any_size():
    eng = Engine(_config(recent=60))
    _feed(eng, _data())
    snap = eng.snapshot()
    assert Engine(_config(recent=0)).snapshot() and b"recent." not in snap[:4096]
    for size in (60, 10, 0):
        back = Engine.restore(_config(recent=size), snap)
        if size == 0:
            assert back.recent is None and back.recent_band(KEYS[0]) is None
        else:
            assert back.recent_band(KEYS[0]).start.shape[0] == 0
            assert back.recent.written.shape[0] >= back.table.n


def test_recent_steps_zero_keeps_no_ring_and_bad_values_are_refused():
    eng = Engine(_config(recent=0))
    assert eng.recent is None
    assert Engine(parse_config({})).recent is None  # off by default: ~2 KB of detection state per series
    on = Engine(_config(recent=288))
    assert eng.state_bytes_per_series() + 21 * 288 + 8 == on.state_bytes_per_series()
    for bad in (-1, 2.5, "many", 10**6):
        with pytest.raises(ConfigError, match=r"engine\.recent_steps"):
            _config(recent=bad)


# ------------------------------------------------------------------ HTTP


@pytest.fixture(scope="module")
def served():
    from prometheus_client import CollectorRegistry

    eng = Engine(_config(recent=300), record_steps=True)
    _feed(eng, _data())
    mutes = {KEYS[0]: [(1.7e9 - 1.7e9 % 60 + 3600.0, 1.7e9 - 1.7e9 % 60 + 4200.0)]}
    app = series_app(lambda: [eng], lambda key: mutes.get(key, []))
    server = HealthServer(Metrics(CollectorRegistry()), lambda: (True, "ok"), "127.0.0.1", 0,
                          {"/series": app, "/series/": app}).start()
    yield eng, f"http://127.0.0.1:{server.port}"
    server.stop()


def _get(url: str) -> tuple[int, str, bytes]:
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.headers["Content-Type"], r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.headers["Content-Type"], e.read()


def test_band_json_over_http_equals_the_step_log(served):
    eng, base = served
    for key in KEYS:
        # RFC 3986 percent-encoding of every reserved character (urllib.parse.quote, safe="")
        code, ctype, body = _get(f"{base}/series/{quote(key, safe='')}/band.json?hours=48")
        assert code == 200 and ctype == "application/json", (key, body)
        got = json.loads(body)
        log = _log_of(eng, key, 300)
        assert got["start"] == log["start"].tolist()
        for name in ("observed", "expected", "lower", "upper"):
            want = [None if np.isnan(v) else float(np.float32(v)) for v in log[name].tolist()]
            assert got[name] == want, (key, name)
    assert json.loads(_get(f"{base}/series/{quote(KEYS[0], safe='')}/band.json")[2])["muted"]


def test_band_svg_is_well_formed_and_windowed(served):
    _eng, base = served
    code, ctype, body = _get(f"{base}/series/{quote(ODD_KEY, safe='')}/band.svg?hours=1")
    assert code == 200 and ctype == "image/svg+xml"
    root = ET.fromstring(body)  # the standard library's XML parser: well-formed, escaped key
    assert root.tag.endswith("svg")
    assert ODD_KEY in "".join(root.itertext())
    one_hour = json.loads(_get(f"{base}/series/{quote(ODD_KEY, safe='')}/band.json?hours=1")[2])
    assert len(one_hour["start"]) == 60
    muted = _get(f"{base}/series/{quote(KEYS[0], safe='')}/band.svg")[2]
    assert b"url(#mute)" in muted and b"url(#mute)" not in body


@pytest.mark.parametrize("path, status", [
    ("/series/nope/band.svg", 404),
    ("/series/%7Bunknown%22%7D/band.svg", 404),
    ("/series//band.svg", 404),
    ("/series/x", 404),
    ("/series/door_open/band.svg?hours=1e400", 400),
    ("/series/door_open/band.svg?hours=nan", 400),
    ("/series/door_open/band.svg?hours=-3", 400),
    ("/series/door_open/band.svg?hours=0", 400),
    ("/series/door_open/band.svg?hours=%00", 400),
    ("/series/%FF%FE/band.svg", 400),
    ("/series?limit=0", 400),
    ("/series?limit=abc", 400),
    ("/series?match=" + "*" * 1001, 400),
])
def test_hostile_requests_get_a_clear_status(served, path, status):
    _eng, base = served
    code, _ctype, body = _get(base + path)
    assert code == status, (path, body)
    assert body.strip()


def test_huge_hours_shows_the_whole_ring(served):
    _eng, base = served
    got = json.loads(_get(f"{base}/series/{quote(KEYS[0], safe='')}/band.json?hours=87000")[2])
    assert len(got["start"]) == 240


@pytest.mark.parametrize("pattern, want", [
    ("door_open", KEYS[:3]),
    ('*"north*', [KEYS[0], ODD_KEY]),
    ("*{*", KEYS[:3]),
    ("[", []),
    ("[!d]*", [KEYS[3]]),
    ("*", sorted(KEYS)),
    ('"yard\\"', [ODD_KEY]),
    ("", sorted(KEYS)),
])
def test_series_list_matches_odd_patterns(served, pattern, want):
    _eng, base = served
    code, _ctype, body = _get(f"{base}/series?match={quote(pattern, safe='')}")
    assert code == 200, body
    got = json.loads(body)
    assert [s["key"] for s in got["series"]] == sorted(want)
    for s in got["series"]:
        assert s["rule"] == "doors" and s["learning"] is False and s["last"]["value"] is not None
        assert set(s) >= {"labels", "open_breach", "unit"}


def test_post_is_refused(served):
    _eng, base = served
    req = urllib.request.Request(f"{base}/series", data=b"{}", method="POST")
    with pytest.raises(urllib.error.HTTPError) as exc:
        urllib.request.urlopen(req, timeout=10)
    assert exc.value.code == 405


def test_readers_on_another_thread_never_see_half_a_wave():
    """Observed = step number: any torn copy (slots from different waves, starts from another
    row) breaks the identity. Bounded: 400 waves, a few seconds at most."""
    eng = Engine(_config(recent=50))
    keys = [f"k{i}" for i in range(300)]
    meta = {k: (k, ()) for k in keys}
    stop = threading.Event()
    problems: list[str] = []
    reads = [0]

    def reader():
        while not stop.is_set():
            for key in ("k0", "k150", "k299"):
                try:
                    band = eng.recent_band(key)
                except TimeoutError:
                    continue
                if band is None or not band.start.shape[0]:
                    continue
                reads[0] += 1
                want = (band.start - T0) / 60.0
                if not np.array_equal(band.observed, want.astype(np.float32)):
                    problems.append(key)
                if np.any(np.diff(band.start) != 60.0):
                    problems.append(f"{key} starts")

    th = threading.Thread(target=reader, daemon=True)
    th.start()
    try:
        for s in range(400):
            t = np.full(len(keys), T0 + s * 60.0 + 1.0)
            eng.ingest(PointBatch(keys, t, np.full(len(keys), float(s)), meta))
    finally:
        stop.set()
        th.join(5)
    assert reads[0] > 0 and not problems, problems[:5]
