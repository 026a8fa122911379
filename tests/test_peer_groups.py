"""Peer groups in the engine: the scenario of the issue, membership, events, snapshots, totals.

Fictional fleet throughout: the hosts of a 'checkout' service in an invented shop.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch, series_key
from streamdet.events import OPENED, OUTLIER_CLOSED, OUTLIER_OPENED, OutlierEvent, parse_cloudevent
from streamdet.replay import replay, write_events

STEP = 300.0
DAY = 86400.0


def _cfg(**peers):
    p = {"group_by": ["service"], **peers}
    return parse_config({"rules": [{"name": "web", "match": {"metric": "requests_per_second"},
                                    "step": "5m", "peers": p}]})


def fleet(n=40, days=3.0, change_at=None, who=17, frac=0.2, seed=0, service="checkout", drop=None):
    """Points of ``n`` hosts sharing a daily cycle with 5 % noise; from ``change_at`` host
    ``who`` does ``frac`` of the others' work. ``drop``: (host, t0, t1) sends no points."""
    rng = np.random.default_rng(seed)
    t = np.arange(0, days * DAY, STEP)
    cycle = 1000 + 600 * np.sin(2 * np.pi * t / DAY)
    keys, meta = [], {}
    for h in range(n):
        labels = (("host", f"h{h:02d}"), ("service", service))
        k = series_key("requests_per_second", labels)
        keys.append(k)
        meta[k] = ("requests_per_second", labels)
    y = cycle[None, :] * rng.normal(1, 0.05, (n, t.shape[0]))
    if change_at is not None:
        y[who, t >= change_at] *= frac
    kk = np.tile(np.arange(n), t.shape[0])
    tt = np.repeat(t, n) + rng.uniform(0, 60, n * t.shape[0])
    yy = y.T.ravel()
    keep = np.ones(kk.shape[0], bool)
    if drop is not None:
        h, t0, t1 = drop
        keep = ~((kk == h) & (tt >= t0) & (tt < t1))
    return PointBatch([keys[i] for i in kk[keep]], tt[keep], yy[keep], meta), keys


def run(cfg, b, chunk=997, engine=None):
    eng = engine or Engine(cfg)
    events = []
    for lo in range(0, len(b), chunk):
        events += eng.ingest(b.take(np.arange(lo, min(lo + chunk, len(b)))))
    events += eng.finish()
    return eng, events


def outliers(events):
    return [e for e in events if isinstance(e, OutlierEvent)]


def test_scenario_one_host_drops_to_a_fraction_of_the_work():
    # Scenario (common practice, no source): 40 hosts of one service behind one balancer do
    # alike work; one starts doing a fifth of it. The outlier opens within confirm.steps (5)
    # of the change and names that host only; the fleet-wide daily cycle raises nothing.
    change = 2 * DAY + 3600
    cfg = _cfg(method="mad", threshold=3.5, min_members=5)
    _, events = run(cfg, fleet(change_at=change)[0])
    out = outliers(events)
    opened = [e for e in out if e.type == OUTLIER_OPENED]
    assert [e.series for e in opened] == ['requests_per_second{host="h17",service="checkout"}']
    e = opened[0]
    assert change < e.time <= change + cfg.rules[0].confirm_steps * STEP
    assert e.started == change  # the first outside step
    assert e.direction == "below" and e.score < -3.5 and e.members == 40
    assert e.group == 'web{service="checkout"}' and dict(e.group_labels) == {"service": "checkout"}
    assert e.observed < 0.3 * e.median


def test_fleet_wide_daily_cycle_alone_raises_no_outlier():
    # the same fleet with no change, over three days and three seeds
    for seed in range(3):
        _, events = run(_cfg(), fleet(seed=seed)[0])
        assert outliers(events) == []


def test_events_do_not_depend_on_batching():
    # members of one group close their steps in different waves and batches; a group's step is
    # judged once complete, so the events are the same for any chunking
    # (temporal and peer events of one call may interleave differently; each kind keeps order)
    b = fleet(days=2.2, change_at=2 * DAY, seed=4)[0]
    cfg = _cfg()
    ref = _by_kind(run(cfg, b, chunk=len(b))[1])
    for chunk in (13, 173, 4001):
        assert _by_kind(run(cfg, b, chunk=chunk)[1]) == ref
    assert any(OUTLIER_OPENED.encode() in j for j in ref[1])


def _by_kind(events):
    return ([e.to_json() for e in events if not isinstance(e, OutlierEvent)],
            [e.to_json() for e in outliers(events)])


def test_lateness_waits_for_the_whole_group():
    # with lateness a member's point may arrive after another member's next step: the group's
    # step is judged only when event time has passed its end plus lateness
    cfg = parse_config({"rules": [{"name": "web", "step": "5m", "lateness": "2m",
                                   "peers": {"group_by": ["service"]}}]})
    b = fleet(days=2.2, change_at=2 * DAY, seed=5)[0]
    ref = _by_kind(run(cfg, b, chunk=len(b))[1])
    assert _by_kind(run(cfg, b, chunk=50)[1]) == ref
    assert sum(OUTLIER_OPENED.encode() in j for j in ref[1]) == 1


def test_min_members_and_missing_members():
    # 4 hosts: fewer than min_members (5): never judged, even with one host far off
    eng, events = run(_cfg(), fleet(n=4, days=1, change_at=0.5 * DAY, who=1)[0])
    assert outliers(events) == [] and eng.counters["peer_members_judged"] == 0
    # 6 hosts, one missing for a while: its missing steps are not judged, the others are
    b = fleet(n=6, days=1, drop=(2, 0.3 * DAY, 0.6 * DAY))[0]
    eng, events = run(_cfg(), b)
    steps = int(DAY / STEP)
    missing = int(0.3 * DAY / STEP)
    assert eng.counters["peer_members_judged"] == 6 * steps - missing
    assert outliers(events) == []


def test_members_lacking_a_group_label_are_not_judged():
    # hostile: series of the rule without the group_by label (or with only other labels) stay
    # out of every group and cost nothing; the labelled members are judged as usual
    b, _ = fleet(n=8, days=0.5)
    n_odd = int(0.5 * DAY / STEP)
    odd_key = 'requests_per_second{host="x"}'
    keys_all = list(b.keys) + [odd_key] * n_odd
    t_all = np.concatenate([b.time, np.arange(n_odd) * STEP + 30.0])
    y_all = np.concatenate([b.value, np.full(n_odd, 5.0)])
    order = np.argsort(t_all, kind="stable")
    meta = {**b.series, odd_key: ("requests_per_second", (("host", "x"),))}
    both = PointBatch([keys_all[i] for i in order], t_all[order], y_all[order], meta)
    eng, events = run(_cfg(), both)
    row = eng.table.index[odd_key]
    assert eng.peer_groups.state.gid[row] == -2
    assert eng.counters["peer_members_judged"] == 8 * n_odd
    assert outliers(events) == []


def test_rules_without_peers_have_no_peer_state():
    eng = Engine(parse_config({"rules": [{"name": "a", "step": "5m"}]}))
    assert eng.peer_groups is None
    eng.ingest(fleet(n=3, days=0.1)[0])
    assert not any(k.startswith("peers") for k in _arrays(eng.snapshot()))
    assert eng.stats()["outliers_open"] == 0


def _arrays(snap: bytes) -> list[str]:
    from streamdet.core.snapshot import decode_snapshot

    return list(decode_snapshot(snap).arrays)


def test_snapshot_restore_mid_stream_gives_the_same_events():
    cfg = parse_config({"rules": [{"name": "web", "step": "5m", "lateness": "1m",
                                   "peers": {"group_by": ["service"]}}]})
    b = fleet(days=2.3, change_at=2.1 * DAY, seed=6)[0]
    _, ref = run(cfg, b, chunk=1000)
    cut = len(b) // 2 + 13
    eng = Engine(cfg)
    first = eng.ingest(b.take(np.arange(cut)))
    eng2 = Engine.restore(cfg, eng.snapshot())
    rest = b.take(np.arange(cut, len(b)))
    _, second = run(cfg, rest, chunk=1000, engine=eng2)
    assert _by_kind(first + second) == _by_kind(ref)
    assert outliers(ref)


def test_snapshot_without_peers_restores_into_a_config_with_peers():
    plain = parse_config({"rules": [{"name": "web", "step": "5m"}]})
    eng = Engine(plain)
    eng.ingest(fleet(n=6, days=0.2)[0])
    eng2 = Engine.restore(_cfg(), eng.snapshot())
    assert eng2.peer_groups is not None and eng2.stats()["outliers_open"] == 0


def test_outlier_cloudevent_fields_and_group_key():
    _, events = run(_cfg(), fleet(days=2.2, change_at=2 * DAY)[0])
    e = outliers(events)[0]
    doc = parse_cloudevent(e.to_json())
    assert doc["type"] == OUTLIER_OPENED and doc["subject"] == e.series
    d = doc["data"]
    for key in ("group", "group_labels", "member", "labels", "method", "observed", "group_median",
                "group_mad", "score", "members_judged", "threshold", "direction", "started"):
        assert key in d
    assert d["method"] == "mad" and d["members_judged"] == 40 and d["threshold"] == 3.5
    assert e.partition_key == 'web{service="checkout"}'  # the Kafka key: one group, one partition
    assert "cluster_sizes" not in d
    with pytest.raises(ValueError):
        OutlierEvent(**{**{f: getattr(e, f) for f in e.__slots__ if f != "id"}, "type": OPENED})


def test_outlier_closes_when_the_host_recovers_and_on_eviction():
    # the host does a fifth of the work for two hours, then recovers
    b = fleet(days=2.5, change_at=2 * DAY, seed=2)[0]
    t = b.time
    fix = np.array(["h17" in k for k in b.keys]) & (t >= 2 * DAY + 7200)
    b = PointBatch(b.keys, t, np.where(fix, b.value * 5, b.value), b.series)
    _, events = run(_cfg(), b)
    out = outliers(events)
    assert [e.type for e in out] == [OUTLIER_OPENED, OUTLIER_CLOSED]
    closed = out[1]
    assert closed.opened_id == out[0].id and closed.reason == "back among its peers"
    assert 2 * DAY + 7200 < closed.time <= 2 * DAY + 7200 + 4 * STEP
    # a member evicted while its outlier is open gets a closed event
    cfg = parse_config({"series": {"idle_ttl": "1h"},
                        "rules": [{"name": "web", "step": "5m", "peers": {"group_by": ["service"]}}]})
    b = fleet(days=2.2, change_at=2 * DAY, seed=2, drop=(17, 2 * DAY + 3600, 3 * DAY))[0]
    _, events = run(cfg, b)
    out = outliers(events)
    assert [e.type for e in out] == [OUTLIER_OPENED, OUTLIER_CLOSED]
    assert out[1].reason == "member went quiet"


def test_dbscan_method_names_the_member_with_another_shape():
    # fictional: host h05 follows the daily cycle half a day out of phase (same level and
    # range): every step's value is within the group's spread at some hours, but its shape
    # over a window is unlike the others'
    rng = np.random.default_rng(9)
    t = np.arange(0, 2 * DAY, STEP)
    meta, ks, ts, ys = {}, [], [], []
    for h in range(30):
        labels = (("host", f"h{h:02d}"), ("service", "checkout"))
        k = series_key("requests_per_second", labels)
        meta[k] = ("requests_per_second", labels)
        phase = np.pi if h == 5 else 0.0
        shift = np.where(t >= 1.5 * DAY, phase, 0.0)
        y = 1000 + 600 * np.sin(2 * np.pi * t / DAY + shift) + rng.normal(0, 30, t.shape[0])
        ks += [k] * t.shape[0]
        ts.append(t + 1.0)
        ys.append(y)
    order = np.argsort(np.concatenate(ts), kind="stable")
    b = PointBatch([ks[i] for i in order], np.concatenate(ts)[order], np.concatenate(ys)[order], meta)
    cfg = _cfg(method="dbscan", window=12, every=3, min_samples=4)
    _, events = run(cfg, b, chunk=2000)
    out = outliers(events)
    assert {e.series for e in out} == {'requests_per_second{host="h05",service="checkout"}'}
    e = out[0]
    assert e.type == OUTLIER_OPENED and e.method == "dbscan"
    assert e.time >= 1.5 * DAY and e.time <= 1.5 * DAY + 12 * STEP
    assert e.cluster_sizes[0] >= 27 and e.score > 1.0
    assert parse_cloudevent(e.to_json())["data"]["cluster_sizes"] == list(e.cluster_sizes)


def test_group_total_feeds_the_temporal_detector():
    # peers.total: sum gives a derived series 'web:group_sum{service="checkout"}'; when the
    # whole fleet halves its work at once no member stands out, but the total breaches
    b, _ = fleet(n=10, days=3, seed=3)
    half = b.time >= 2.5 * DAY
    b = PointBatch(b.keys, b.time, np.where(half, 0.4 * b.value, b.value), b.series)
    cfg = _cfg(total="sum")
    eng, events = run(cfg, b)
    key = 'web:group_sum{service="checkout"}'
    assert key in eng.table.index
    assert outliers(events) == []
    opened = [e for e in events if e.type == OPENED]
    assert key in {e.series for e in opened}
    total = next(e for e in opened if e.series == key)
    assert total.direction == "below" and 2.5 * DAY < total.time <= 2.5 * DAY + 5 * STEP
    assert eng.counters["peer_total_steps"] == int(3 * DAY / STEP)


def test_replay_writes_outlier_events(tmp_path):
    b, _ = fleet(n=10, days=2.2, change_at=2 * DAY, who=3)
    path = tmp_path / "points.jsonl"
    with open(path, "w") as f:
        for k, t, v in zip(b.keys, b.time, b.value, strict=True):
            metric, labels = b.series[k]
            f.write(json.dumps({"metric": metric, "labels": dict(labels), "time": t, "value": v}) + "\n")
    res = replay([path], _cfg())
    out = io.BytesIO()
    write_events(res.events, out)
    lines = [json.loads(x) for x in out.getvalue().splitlines()]
    assert any(d["type"] == OUTLIER_OPENED and 'host="h03"' in d["subject"] for d in lines)


# ---------------------------------------------------------------- config and daemon bits


def test_peers_config_defaults_and_shape_from_the_issue():
    cfg = _cfg(method="mad", threshold=3.5, min_members=5)
    p = cfg.rules[0].peers
    assert (p.group_by, p.method, p.threshold, p.min_members, p.total) == (("service",), "mad", 3.5, 5, None)
    assert parse_config({"rules": [{"name": "a"}]}).rules[0].peers is None


@pytest.mark.parametrize("peers, expected", [
    ({"group_by": "service"}, "rules[0].peers.group_by: expected a non-empty list"),
    ({"group_by": []}, "rules[0].peers.group_by: expected a non-empty list"),
    ({"group_by": ["a", 3]}, "rules[0].peers.group_by: expected a non-empty list"),
    ({"group_by": ["a", "a"]}, "rules[0].peers.group_by: a label is listed twice"),
    ({"group_by": ["a"], "method": "knn"}, "rules[0].peers.method: expected one of mad, dbscan"),
    ({"group_by": ["a"], "threshold": 0}, "rules[0].peers.threshold: must be > 0"),
    ({"group_by": ["a"], "threshold": "high"}, "rules[0].peers.threshold: expected a number"),
    ({"group_by": ["a"], "min_members": 2}, "rules[0].peers.min_members: must be >= 3"),
    ({"group_by": ["a"], "min_members": 5.5}, "rules[0].peers.min_members: expected a whole number"),
    ({"group_by": ["a"], "window": 5}, "rules[0].peers.window: only used with method: dbscan"),
    ({"group_by": ["a"], "method": "dbscan", "threshold": 3}, "rules[0].peers.threshold: only used with method: mad"),
    ({"group_by": ["a"], "method": "dbscan", "window": 10_000}, "rules[0].peers.window: must be <= 288"),
    ({"group_by": ["a"], "method": "dbscan", "min_samples": 1}, "rules[0].peers.min_samples: must be >= 2"),
    ({"group_by": ["a"], "total": "max"}, "rules[0].peers.total: expected one of sum, mean"),
    ({"group_by": ["a"], "groupby": ["b"]}, "rules[0].peers.groupby: unknown key"),
    ("service", "rules[0].peers: expected a mapping"),
])
def test_peers_config_errors_name_the_key_path(peers, expected):
    from streamdet.config import ConfigError
    with pytest.raises(ConfigError) as err:
        parse_config({"rules": [{"name": "web", "step": "5m", "peers": peers}]})
    assert any(p.startswith(expected) for p in err.value.problems), err.value.problems


def test_peers_need_a_fixed_step():
    from streamdet.config import ConfigError
    with pytest.raises(ConfigError, match=r"rules\[0\].peers: peer groups need a fixed step"):
        parse_config({"rules": [{"name": "web", "step": "auto", "peers": {"group_by": ["a"]}}]})


def test_daemon_metrics_and_split_groups():
    # the daemon's peer metrics (fresh registry, as prometheus_client's own tests do) and the
    # check for groups whose members arrive on more than one partition
    from prometheus_client import CollectorRegistry

    from streamdet.daemon.consumer import split_groups
    from streamdet.daemon.health import Metrics
    reg = CollectorRegistry()
    m = Metrics(reg)
    m.outliers_open.set(2)
    m.peer_members_judged.inc(40)
    assert reg.get_sample_value("streamdet_outliers_open") == 2
    assert reg.get_sample_value("streamdet_peer_members_judged_total") == 40
    b, _ = fleet(n=6, days=0.1)
    one, two = Engine(_cfg()), Engine(_cfg())
    half = np.array([any(f'host="h0{i}"' in k for i in range(3)) for k in b.keys])
    one.ingest(b.take(np.flatnonzero(half)))
    two.ingest(b.take(np.flatnonzero(~half)))
    assert split_groups([one, two]) == 1
    assert split_groups([one, Engine(_cfg())]) == 0
    assert split_groups([Engine(parse_config({"rules": [{"name": "a"}]}))]) == 0


@pytest.mark.parametrize(("direction", "watched"), [("rise", (True, False)), ("drop", (False, True)),
                                                    ("either", (True, True))])
def test_rule_direction_selects_the_watched_sides_of_peer_outliers(direction, watched):
    from streamdet.core.peer_groups import _need

    rule = parse_config({"rules": [{"name": "web", "step": "5m", "direction": direction,
                                    "peers": {"group_by": ["service"]}}]}).rules[0]
    need = _need(rule)
    assert tuple(np.isfinite(need)) == watched
    # two sides share the rarity (Bonferroni), so each side needs a little more surprise
    one_side = _need(parse_config({"rules": [{"name": "web", "step": "5m", "direction": "rise",
                                              "peers": {"group_by": ["service"]}}]}).rules[0])[0]
    assert need[np.isfinite(need)].min() == pytest.approx(one_side + (np.log10(2) if direction == "either" else 0))
