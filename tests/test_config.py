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
    assert rule.relearn_after.seconds == 7200 and rule.direction == "either"
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


@pytest.mark.parametrize(("old", "new"), [("above", "rise"), ("below", "drop"), ("both", "either")])
def test_old_direction_spellings_are_read_with_a_warning(old, new, caplog):
    cfg = parse_config({"rules": [{"name": "a", "direction": new}, {"name": "b", "direction": old}]})
    assert [r.direction for r in cfg.rules] == [new, new]
    (w,) = cfg.warnings
    assert w.startswith(f"rules[1].direction: {old!r} is the old spelling of {new!r}")
    assert [r.getMessage() for r in caplog.records if r.name == "streamdet.config"] == [f"config: {w}"]
    assert cfg == parse_config({"rules": [{"name": "a", "direction": new}, {"name": "b", "direction": new}]})


@pytest.mark.parametrize("raw", ["Above", "up", "", 1, True, None, ["above"], {"above": 1}])
def test_bad_direction_values_are_config_errors(raw):
    with pytest.raises(ConfigError) as exc:
        parse_config({"rules": [{"name": "a", "direction": raw}]})
    assert exc.value.problems == [f"rules[0].direction: expected one of either, rise, drop, got {raw!r}"]


def test_check_prints_old_spellings_as_warnings(tmp_path, capsys):
    f = tmp_path / "old.yaml"
    f.write_text("rules:\n  - name: slow\n    direction: above\n")
    assert main(["check", str(f)]) == 0
    out = capsys.readouterr()
    assert "OK (1 rule(s): slow)" in out.out
    assert "  warning: rules[0].direction: 'above' is the old spelling of 'rise'" in out.out
    assert "old spelling" not in out.err  # printed once, not logged as well


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
    assert "rules[0].direction: expected one of either, rise, drop, got 'sideways'" in err
    broken = tmp_path / "broken.yaml"
    broken.write_text("rules: [\n")
    assert main(["check", str(broken)]) == 2
    assert "not valid YAML" in capsys.readouterr().err
