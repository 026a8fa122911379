"""Daemon settings: defaults, environment overrides, secrets kept out of logs and metrics."""

import logging

import pytest
from prometheus_client import CollectorRegistry, generate_latest

from streamdet.cli import main
from streamdet.config import ConfigError, parse_config
from streamdet.daemon.health import Metrics, reason_code
from streamdet.daemon.settings import apply_environment, load_with_environment, parse_settings, redacted
from streamdet.daemon.state_store import Checkpoint, LocalStateStore, StateError


def test_defaults_and_validation():
    s = parse_settings(parse_config({}))
    assert s.health_address == "127.0.0.1:9464" and s.input_topics == ("metrics",)
    with pytest.raises(ConfigError) as exc:
        parse_settings(parse_config({"kafka": {"input_topics": [], "batch_size": 0, "colour": "red"},
                                     "health": {"address": "nowhere"}}))
    text = "\n".join(exc.value.problems)
    assert "kafka.input_topics: expected a non-empty list" in text
    assert "kafka.batch_size: must be >= 1" in text
    assert "kafka.colour: unknown key" in text
    assert "health.address: expected host:port" in text


def test_daemon_refuses_csv_input():
    with pytest.raises(ConfigError, match=r"input\.format: the daemon reads json or influx"):
        parse_settings(parse_config({"input": {"format": "csv"}}))


def test_environment_overrides(tmp_path):
    cfg_file = tmp_path / "c.yaml"
    cfg_file.write_text("kafka:\n  bootstrap_servers: file:9092\nrules:\n  - name: all\n")
    env = {"STREAMDET_KAFKA_BOOTSTRAP_SERVERS": "env:9092", "STREAMDET_KAFKA_INPUT_TOPICS": "a,b",
           "STREAMDET_STATE_DIR": "/data", "STREAMDET_LIBRDKAFKA_SASL_PASSWORD": "hunter2",
           "STREAMDET_LIBRDKAFKA_SECURITY_PROTOCOL": "SASL_SSL", "OTHER": "x"}
    _cfg, s = load_with_environment(str(cfg_file), env)
    assert s.bootstrap_servers == "env:9092" and s.input_topics == ("a", "b") and s.state_dir == "/data"
    assert s.client == {"sasl.password": "hunter2", "security.protocol": "SASL_SSL"}
    assert apply_environment({}, {"STREAMDET_KAFKA_BATCH_SIZE": "50"}) == {"kafka": {"batch_size": 50}}


def test_secrets_are_redacted_and_never_in_metrics(caplog):
    props = {"sasl.password": "hunter2", "ssl.key.pem": "PEM", "sasl.oauthbearer.client.secret": "s",
             "security.protocol": "SASL_SSL"}
    assert redacted(props) == {"sasl.password": "***", "ssl.key.pem": "***",
                               "sasl.oauthbearer.client.secret": "***", "security.protocol": "SASL_SSL"}
    text = generate_latest(Metrics(CollectorRegistry()).registry).decode()
    assert "hunter2" not in text and "streamdet_points_accepted_total" in text
    logging.getLogger("streamdet").info("%s", redacted(props))
    assert "hunter2" not in caplog.text


def test_metric_names_follow_prometheus_conventions():
    # Prometheus naming practice: counters end in _total, units as suffix (_seconds, _bytes).
    names = {m.name + ("_total" if m.type == "counter" else "")
             for m in Metrics(CollectorRegistry()).registry.collect()}
    assert {"streamdet_records_in_total", "streamdet_events_out_total", "streamdet_state_bytes",
            "streamdet_seconds_since_checkpoint", "streamdet_batch_processing_seconds",
            "streamdet_step_close_to_delivery_seconds", "streamdet_consumer_lag_messages"} <= names


def test_reason_codes_are_bounded():
    assert reason_code("value 'x' is not numeric") == "bad_value"
    assert reason_code("invalid JSON (unexpected character)") == "invalid_json"
    assert reason_code("time is 90000 s in the future (more than max_future=3600 s)") == "future_time"
    assert reason_code("missing field 'metric' (or label '__name__')") == "missing_field"
    assert reason_code("something else") == "malformed"


def test_state_store_round_trip_and_damage(tmp_path):
    store = LocalStateStore(tmp_path)
    assert store.load("t", 0) is None
    store.save(Checkpoint("t", 0, 42, b"snapshot-bytes"))
    assert store.load("t", 0) == Checkpoint("t", 0, 42, b"snapshot-bytes")
    assert not list(tmp_path.glob("*.tmp"))  # written atomically
    path = store.path("t", 0)
    path.write_bytes(path.read_bytes()[:-3])
    with pytest.raises(StateError, match=r"t-0\.ckpt: checksum mismatch.*--fresh-partition t:0"):
        store.load("t", 0)
    path.write_bytes(b"garbage")
    with pytest.raises(StateError, match="not a streamdet checkpoint"):
        store.load("t", 0)


def test_check_validates_daemon_sections(tmp_path, capsys):
    f = tmp_path / "c.yaml"
    f.write_text("kafka:\n  output_topic: 7\n")
    assert main(["check", str(f)]) == 2
    assert "kafka.output_topic: expected a topic name or null" in capsys.readouterr().err


def test_json_logs_are_one_object_per_line(capsys):
    import orjson

    from streamdet.daemon.logs import setup_logging

    setup_logging("json", "info")
    logging.getLogger("streamdet.daemon").warning("broker %s unreachable", "127.0.0.1:1")
    line = capsys.readouterr().err.strip().splitlines()[-1]
    doc = orjson.loads(line)
    assert doc["level"] == "warning" and doc["message"] == "broker 127.0.0.1:1 unreachable"
    assert doc["logger"] == "streamdet.daemon" and "time" in doc
    setup_logging("text", "info")
