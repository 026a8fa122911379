"""The daemon and the CLI with a checkpoint whose rules no longer match the config."""

from __future__ import annotations

import logging

import numpy as np
import pytest
from confluent_kafka import TopicPartition
from prometheus_client import CollectorRegistry

from streamdet import cli
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.core.points import PointBatch
from streamdet.daemon.consumer import Daemon, StartupError
from streamdet.daemon.health import Metrics
from streamdet.daemon.settings import DaemonSettings
from streamdet.daemon.state_store import Checkpoint, LocalStateStore

RULES = [{"name": "checkout", "match": {"metric": "checkout_*"}, "warmup": "20 steps",
          "relearn_after": "1d"}, {"name": "other", "warmup": "20 steps"}]


def _checkpoint(store: LocalStateStore) -> list:
    """A fictional shop's partition: two checkout series (one in an open breach) and one other."""
    rng = np.random.default_rng(7)
    keys = ["checkout_ms", "checkout_errors", "disk_used"]
    meta = {k: (k, ()) for k in keys}
    eng = Engine(parse_config({"rules": RULES}))
    events = []
    for s in range(80):
        y = np.array([50.0, 2.0, 70.0]) + rng.normal(0, 1, 3) + np.array([40.0 * (s >= 70), 0, 0])
        events += eng.ingest(PointBatch(keys, np.full(3, 1.7e9 + 60.0 * s), y, meta))
    store.save(Checkpoint("metrics", 0, 240, eng.snapshot()))
    return events


class _Consumer:
    def incremental_assign(self, partitions) -> None:
        self.assigned = partitions


class _Sink:
    def __init__(self) -> None:
        self.sent = []

    def send(self, events, _now) -> None:
        self.sent.extend(events)


def _daemon(tmp_path, rules, on_rule_change):
    settings = DaemonSettings(state_dir=str(tmp_path), on_rule_change=on_rule_change)
    daemon = Daemon(parse_config({"rules": rules}), settings, metrics=Metrics(CollectorRegistry()))
    daemon.sink = _Sink()
    return daemon


def test_daemon_refuses_a_renamed_rule_by_default_naming_it(tmp_path):
    _checkpoint(LocalStateStore(tmp_path))
    renamed = [{**RULES[0], "name": "checkout-v2"}, RULES[1]]
    daemon = _daemon(tmp_path, renamed, DaemonSettings().on_rule_change)
    with pytest.raises(StartupError, match=r"metrics-0.ckpt: .*rule 'checkout': not in the config: "
                                           r"2 series dropped .*--accept-state-changes"):
        daemon._on_assign(_Consumer(), [TopicPartition("metrics", 0)])
    assert (tmp_path / "metrics-0.ckpt").exists()  # the state is left as it was


def test_daemon_accepting_changes_logs_counts_and_closes(tmp_path, caplog):
    events = _checkpoint(LocalStateStore(tmp_path))
    changed = [{**RULES[0], "step": "5m"}, RULES[1]]
    daemon = _daemon(tmp_path, changed, "drop")
    with caplog.at_level(logging.WARNING, logger="streamdet.daemon"):
        daemon._on_assign(_Consumer(), [TopicPartition("metrics", 0)])
    reg = daemon.metrics.registry
    sample = lambda outcome: reg.get_sample_value("streamdet_restored_series_total",  # noqa: E731
                                                  {"outcome": outcome})
    assert (sample("kept"), sample("relearning"), sample("dropped")) == (1.0, 2.0, 0.0)
    assert any("rule 'checkout': step 1m -> 5m: 2 series learning again (1 open breach(es) closed)"
               in r.getMessage() for r in caplog.records)
    opened = [e for e in events if e.type.endswith("opened")]
    assert [e.opened_id for e in daemon.sink.sent] == [opened[0].id]


def test_check_state_prints_the_report(tmp_path, capsys):
    _checkpoint(LocalStateStore(tmp_path / "state"))
    cfg = tmp_path / "cfg.yaml"
    cfg.write_text(f"state:\n  dir: {tmp_path / 'state'}\nrules:\n"
                   "  - name: renamed\n    match: {metric: 'checkout_*'}\n  - name: other\n")
    assert cli.main(["check", str(cfg), "--state", str(tmp_path / "state")]) == 2
    out, err = capsys.readouterr()
    assert "rule 'checkout': not in the config: 2 series dropped" in out
    assert "1 series kept" in out and "run would refuse" in err
    cfg.write_text(cfg.read_text() + "  - name: checkout\n")
    assert cli.main(["check", str(cfg), "--state", str(tmp_path / "state")]) == 0


def test_on_rule_change_setting_is_validated(tmp_path):
    from streamdet.config import ConfigError
    from streamdet.daemon.settings import parse_settings

    ok = parse_settings(parse_config({"state": {"dir": str(tmp_path), "on_rule_change": "drop"}}))
    assert ok.on_rule_change == "drop" and DaemonSettings().on_rule_change == "error"
    with pytest.raises(ConfigError, match=r"state.on_rule_change.*error, drop"):
        parse_settings(parse_config({"state": {"dir": str(tmp_path), "on_rule_change": "maybe"}}))
