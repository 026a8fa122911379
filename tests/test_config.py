"""Config validation: defaults, key paths in errors, the example file, and `streamdet check`."""

from pathlib import Path

import pytest

from streamdet.cli import main
from streamdet.config import ConfigError, load_config, parse_config

ROOT = Path(__file__).resolve().parents[1]


def test_defaults():
    cfg = parse_config({})
    (rule,) = cfg.rules
    assert (rule.step, rule.width, rule.confirm_steps, rule.clear_steps) == (60.0, 3.0, 5, 3)
    assert rule.relearn_after.seconds == 7200 and rule.direction == "both"
    assert rule.rearm.seconds == 3600
    # handbook fact: P(|Z| > 3) = 0.0027 for a standard normal; the open rarity is its square
    assert abs(rule.open_rarity - 0.0026998**2) < 1e-9


def test_errors_name_key_paths_and_all_problems():
    with pytest.raises(ConfigError) as exc:
        parse_config({"rules": [{"name": "a", "width": -1, "confirm": {"fraction": 0.6}, "step": "1x"},
                                {"name": "a", "aggregation": "median"}], "sereis": {}})
    text = "\n".join(exc.value.problems)
    assert "rules[0].width: must be > 0" in text
    assert "rules[0].confirm.fraction: no longer used" in text
    assert "rules[0].step: expected a duration" in text
    assert "rules[1].aggregation: expected one of mean, sum, min, max, last, count" in text
    assert "rule name 'a' is used more than once" in text
    assert "sereis: unknown key" in text


def test_label_matchers_and_first_match_wins():
    cfg = parse_config({"rules": [
        {"name": "prod-web", "match": {"metric": "http_*", "labels": {"env": "prod", "host": {"regex": "web-\\d+"}}}},
        {"name": "not-canary", "match": {"labels": {"track": {"not": "canary"}}}},
        {"name": "rest"},
    ]})
    assert cfg.rule_for("http_requests", {"env": "prod", "host": "web-12"}) == 0
    assert cfg.rule_for("http_requests", {"env": "prod", "host": "db-1"}) == 1
    assert cfg.rule_for("cpu", {"track": "canary"}) == 2


def test_example_config_is_valid():
    cfg = load_config(ROOT / "config" / "example.yaml")
    assert len(cfg.rules) >= 2


def test_check_command(tmp_path, capsys):
    good = tmp_path / "good.yaml"
    good.write_text("rules:\n  - name: all\n    width: 4\n")
    assert main(["check", str(good)]) == 0
    bad = tmp_path / "bad.yaml"
    bad.write_text("rules:\n  - name: all\n    direction: sideways\n")
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "rules[0].direction: expected one of both, above, below, got 'sideways'" in err
    broken = tmp_path / "broken.yaml"
    broken.write_text("rules: [\n")
    assert main(["check", str(broken)]) == 2
    assert "not valid YAML" in capsys.readouterr().err
