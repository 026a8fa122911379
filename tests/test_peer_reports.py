"""Peer groups in the tools around the engine: `replay --plot` group pictures, `evaluate` counting
outliers, and the daemon's peer metrics.

Fictional fleets throughout (the invented 'checkout' and 'search' services of tests/test_peer_groups.py).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from streamdet.cli import main
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.evaluate import (
    Combination,
    Mark,
    Window,
    evaluate,
    peer_units,
    prepare,
    run_all,
    score_series,
    split_series,
)
from streamdet.group_plots import OUTLIER, outlier_spans, plot_groups
from tests.test_peer_groups import DAY, STEP, fleet, outliers, run

RULES = {"rules": [{"name": "web", "match": {"metric": "requests_per_second"}, "step": "5m",
                    "peers": {"group_by": ["service"]}}]}
SLOW = 'requests_per_second{host="h03",service="checkout"}'


def _write_jsonl(path, batch: PointBatch) -> None:
    with open(path, "w") as f:
        for k, t, v in zip(batch.keys, batch.time, batch.value, strict=True):
            metric, labels = batch.series[k]
            f.write(json.dumps({"metric": metric, "labels": dict(labels), "time": float(t),
                                "value": float(v)}) + "\n")


def _two_fleets(days: float, change_at: float, back_at: float | None = None) -> PointBatch:
    """'checkout' (10 hosts; h03 does a fifth of the work from ``change_at``, until ``back_at``)
    and 'search' (10 hosts, alike throughout)."""
    checkout, _ = fleet(n=10, days=days, change_at=change_at, who=3, seed=3)
    if back_at is not None:
        healthy, _ = fleet(n=10, days=days, seed=3)
        late = np.array([k == SLOW for k in checkout.keys]) & (checkout.time >= back_at)
        checkout.value[late] = healthy.value[late]
    search, _ = fleet(n=10, days=days, seed=4, service="search")
    return PointBatch.concat([checkout, search])


# ---------------------------------------------------------------- replay --plot


def test_replay_plot_draws_the_group_with_an_outlier_only(tmp_path, capsys):
    # h03 of 'checkout' falls behind for 3 hours and recovers; 'search' stays alike
    change = 0.5 * DAY
    data = tmp_path / "fleet.jsonl"
    _write_jsonl(data, _two_fleets(0.8, change, back_at=change + 3 * 3600))
    cfg = tmp_path / "rules.yaml"
    cfg.write_text(json.dumps(RULES))  # JSON is YAML
    plots = tmp_path / "plots"
    assert main(["replay", str(data), "--config", str(cfg), "--plot", str(plots)]) == 0
    assert "plots: 1 PNG file(s) of peer groups with an outlier (group-*.png)" in capsys.readouterr().out
    pngs = sorted(p.name for p in plots.glob("group-*.png"))
    assert pngs == ['group-web_service=_checkout.png']  # nothing for 'search'
    import matplotlib.image as mpimg
    img = mpimg.imread(plots / pngs[0])[..., :3]
    plum = np.array([int(OUTLIER[0][i:i + 2], 16) / 255 for i in (1, 3, 5)])
    assert img.shape[0] > 300 and (np.abs(img - plum).max(axis=2) < 0.03).sum() > 200  # the member line


def test_group_plots_need_recorded_steps_and_skip_groups_without_outliers(tmp_path):
    cfg = parse_config(RULES)
    b = _two_fleets(0.6, 0.25 * DAY)
    eng, events = run(cfg, b)
    assert [e.series for e in outliers(events) if e.type.endswith("opened")] == [SLOW]
    with pytest.raises(ValueError, match="record_steps"):
        plot_groups(eng, events, tmp_path)
    quiet = [e for e in events if not e.type.startswith("streamdet.outlier")]
    eng2, events2 = run(cfg, b, engine=Engine(cfg, record_steps=True))
    assert plot_groups(eng2, quiet, tmp_path / "none") == []
    # an outlier still open at the end runs to the last step
    spans = outlier_spans(events2, end=123.0)
    assert list(spans) == ['web{service="checkout"}']
    (span,) = spans['web{service="checkout"}'][SLOW]
    assert span[0] == 0.25 * DAY and span[1] == 123.0


# ---------------------------------------------------------------- evaluate


def test_evaluate_counts_a_labelled_members_outlier(tmp_path):
    # Under a day of data: the temporal bands are still in their warm-up (1 day), so only the
    # peer judge can detect h03 falling behind at 12:00 (labelled 12:00-15:00).
    change = 0.5 * DAY
    data = tmp_path / "fleet.jsonl"
    _write_jsonl(data, _two_fleets(0.8, change))
    labels = {SLOW: [Window(change, change + 3 * 3600)],
              'web{service="checkout"}': [Window(change, change + 3600)]}  # a group key: no series
    ev = evaluate([data], RULES, labels, slack=900.0)
    s = ev.series[0][SLOW]
    assert (s.windows, s.detected, s.false) == (1, 1, 0)
    assert 0 < s.delays[0] <= 5 * STEP  # within confirm.steps (5) of the change
    assert ev.overall[0].false == 0 and ev.overall[0].detected == 1
    assert ev.unmatched_labels == ['web{service="checkout"}']
    # control: the same labels without peer groups are missed (no temporal verdicts yet)
    plain = evaluate([data], {"rules": [{"name": "web", "step": "5m"}]},
                     {SLOW: [Window(change, change + 3 * 3600)]}, slack=900.0)
    assert plain.series[0][SLOW].detected == 0


def test_evaluate_keeps_peer_groups_whole_across_workers():
    b = _two_fleets(0.6, 0.25 * DAY)
    cfg = parse_config(RULES)
    prep = prepare(b, [Combination(0, ())])
    units = peer_units(prep, cfg)
    assert set(units.values()) == {'web{service="checkout"}', 'web{service="search"}'}
    parts = split_series(prep.points, 2, units)
    services = [{prep.points.series[prep.points.keys[i]][1][1][1] for i in p.tolist()} for p in parts]
    assert sorted(map(sorted, services)) == [["checkout"], ["search"]]
    one = run_all(prep, cfg, jobs=1)
    two = run_all(prep, cfg, jobs=2, min_series_per_job=1)
    assert sorted(one) == sorted(two)
    assert [f for f in one if f[0]] == [(True, SLOW, 0, pytest.approx(0.25 * DAY + 2 * STEP, abs=3 * STEP),
                                         "outlier")]


def test_reopens_are_counted_per_kind():
    # a breach closing and the member's outlier opening soon after is not a re-open of either
    marks = [Mark(opened=True, time=0.0), Mark(opened=False, time=600.0),
             Mark(opened=True, time=900.0, kind="outlier"), Mark(opened=False, time=1200.0, kind="outlier"),
             Mark(opened=True, time=1500.0, kind="outlier")]
    s = score_series([Window(0.0, 2000.0)], marks, slack=0.0, first=0.0, last=DAY, step=STEP)
    assert (s.detected, s.false, s.reopens) == (1, 0, 1)


# ---------------------------------------------------------------- config/example.yaml


def test_example_config_peers_block_parses_when_uncommented():
    from pathlib import Path

    import yaml

    from streamdet.config import PeerParams
    text = (Path(__file__).parent.parent / "config" / "example.yaml").read_text()
    lines = text.splitlines()
    at = next(i for i, line in enumerate(lines) if line.strip().startswith("# peers:"))
    block = []
    for line in lines[at:]:
        if not line.strip().startswith("#"):
            break
        block.append(line.replace("# ", "", 1))
    raw = yaml.safe_load("\n".join(lines[:at] + block + lines[at + len(block):]))
    cfg = parse_config(raw)
    rule = next(r for r in cfg.rules if r.name == "request-counts")
    assert rule.peers == PeerParams(group_by=("service",), method="mad", threshold=3.5, min_members=5,
                                    total="sum")


# ---------------------------------------------------------------- daemon metrics


def test_daemon_copies_peer_counters_and_gauges_from_its_engines(tmp_path):
    # the path from the engines to /metrics (Daemon._count after each batch, _update_gauges on
    # the loop), on a fresh registry as prometheus_client's own tests do; no broker needed
    from prometheus_client import CollectorRegistry

    from streamdet.daemon.consumer import Daemon, PartitionState
    from streamdet.daemon.health import Metrics
    from streamdet.daemon.settings import parse_settings
    from streamdet.daemon.state_store import LocalStateStore

    cfg = parse_config({**RULES, "kafka": {"bootstrap_servers": "127.0.0.1:9", "input_topics": ["in"]},
                        "state": {"dir": str(tmp_path)}})
    reg = CollectorRegistry()
    daemon = Daemon(cfg, parse_settings(cfg), metrics=Metrics(reg), store=LocalStateStore(tmp_path))
    b = _two_fleets(0.6, 0.25 * DAY)  # h03's outlier is still open at the end
    eng, _ = run(cfg, b)
    part = daemon.parts[("in", 0)] = PartitionState(eng)
    daemon._count(part)
    daemon._update_gauges()
    get = reg.get_sample_value
    groups = eng.counters["peer_groups_judged"]
    assert groups > 0 and get("streamdet_peer_groups_judged_total") == groups
    assert get("streamdet_peer_members_judged_total") == eng.counters["peer_members_judged"] == 10 * groups
    assert get("streamdet_outliers_open") == 1
    assert get("streamdet_peer_groups_split") == 0
    daemon._count(part)  # nothing new: counters only move by the engine's increase
    assert get("streamdet_peer_groups_judged_total") == groups
    # the 'search' hosts also arriving on a second partition: that group is split
    search = np.flatnonzero(np.array(['service="search"' in k for k in b.keys]))
    other = Engine(cfg)
    other.ingest(b.take(search[: search.shape[0] // 2]))
    daemon.parts[("in", 1)] = PartitionState(other)
    daemon._update_gauges()
    assert get("streamdet_peer_groups_split") == 1
