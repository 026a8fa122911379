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
    assert s.health_address == "127.0.0.1:8734" and s.input_topics == ("metrics",)
    with pytest.raises(ConfigError) as exc:
        parse_settings(parse_config({"kafka": {"input_topics": [], "batch_size": 0, "colour": "red"},
                                     "health": {"address": "nowhere"}}))
    text = "\n".join(exc.value.problems)
    assert "kafka.input_topics: expected a non-empty list" in text
    assert "kafka.batch_size: must be >= 1" in text
    assert "kafka.colour: unknown key" in text
    assert "health.address: expected host:port" in text


def test_daemon_refuses_csv_input():
    with pytest.raises(ConfigError, match=r"input\.format: the daemon reads messages \(json, influx, telegraf_json"):
        parse_settings(parse_config({"input": {"format": "csv"}}))


def test_environment_overrides(tmp_path):
    cfg_file = tmp_path / "c.yaml"
    cfg_file.write_text("kafka:\n  bootstrap_servers: file:9092\nrules:\n  - name: all\n")
    env = {"STREAMDET_KAFKA_BOOTSTRAP_SERVERS": "env:9092", "STREAMDET_KAFKA_INPUT_TOPICS": "a,b",
           "STREAMDET_STATE_DIR": "/data", "STREAMDET_LIBRDKAFKA_SASL_PASSWORD": "hunter2",
           "STREAMDET_LIBRDKAFKA_SECURITY_PROTOCOL": "SASL_SSL", "STREAMDET_LIBRDKAFKA_SASL_MECHANISM": "PLAIN",
           "STREAMDET_LIBRDKAFKA_SASL_USERNAME": "u", "OTHER": "x"}
    _cfg, s = load_with_environment(str(cfg_file), env)
    assert s.bootstrap_servers == "env:9092" and s.input_topics == ("a", "b") and s.state_dir == "/data"
    assert s.client == {"sasl.password": "hunter2", "security.protocol": "SASL_SSL", "sasl.mechanism": "PLAIN",
                        "sasl.username": "u"}
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


# ---------------------------------------------------------------- config honesty (issue 7, item 5)

def test_environment_strings_stay_strings(tmp_path):
    # Before: "a:1,b:2" became a list and "12345" a number, and both were refused.
    env = {"STREAMDET_KAFKA_BOOTSTRAP_SERVERS": "a:1,b:2", "STREAMDET_KAFKA_GROUP_ID": "12345",
           "STREAMDET_OUTPUT_SOURCE": "3.5", "STREAMDET_KAFKA_INPUT_TOPICS": "solo",
           "STREAMDET_KAFKA_CHECKPOINT_INTERVAL": "30", "STREAMDET_KAFKA_BATCH_SIZE": "500"}
    _cfg, s = load_with_environment(None, env)
    assert s.bootstrap_servers == "a:1,b:2" and s.group_id == "12345" and s.source == "3.5"
    assert s.input_topics == ("solo",) and s.checkpoint_interval == 30.0 and s.batch_size == 500
    with pytest.raises(ConfigError, match=r"kafka\.batch_size: expected a whole number, got 'many'"):
        load_with_environment(None, {"STREAMDET_KAFKA_BATCH_SIZE": "many"})


def _check(tmp_path, capsys, text: str | bytes) -> str:
    f = tmp_path / "c.yaml"
    f.write_bytes(text if isinstance(text, bytes) else text.encode())
    assert main(["check", str(f)]) == 2
    return capsys.readouterr().err


@pytest.mark.parametrize("text,problem", [
    ("health:\n  address: 127.0.0.1:99999\n",
     "health.address: port must be 0..65535 (0: any free port), got '127.0.0.1:99999'"),
    ("kafka:\n  client:\n    no.such.property: 1\n",
     'kafka (consumer properties from kafka.client / kafka.consumer): No such configuration property: '
     '"no.such.property"'),
    ("kafka:\n  producer:\n    acks: 1\n",
     "kafka (producer properties from kafka.client / kafka.producer): Failed to create producer: `acks` must "
     "be set to `all` when `enable.idempotence` is true"),
    ("kafka:\n  client:\n    message.max.bytes: 5000\n  consumer:\n    fetch.max.bytes: 1000\n",
     "Failed to create consumer: `fetch.max.bytes` must be >= `message.max.bytes`"),
    ("kafka:\n  group_id: a\n  group_id: b\n",
     "not valid YAML (line 3, column 3: duplicate key 'group_id' (first on line 2))"),
    (b"kafka:\n  group_id: caf\xe9\n", "not UTF-8 (byte 22 on line 2: invalid continuation byte)"),
])
def test_check_catches_what_run_would_reject(tmp_path, capsys, text, problem):
    # Before: each of these passed `check` (or raised a traceback) and crashed `run`.
    assert problem in _check(tmp_path, capsys, text)


def test_check_rejects_a_state_dir_that_is_a_file(tmp_path, capsys):
    blocker = tmp_path / "state"
    blocker.write_text("")
    err = _check(tmp_path, capsys, f"state:\n  dir: {blocker}\n")
    assert f"state.dir: {str(blocker)!r} exists and is not a directory" in err
    err = _check(tmp_path, capsys, f"state:\n  dir: {blocker / 'sub'}\n")
    assert f"state.dir: cannot create {str(blocker / 'sub')!r}: {str(blocker)!r} is not a directory" in err


# ---------------------------------------------------------------- secrets (issue 7, item 6)

def test_every_secret_property_is_masked():
    props = {"sasl.oauthbearer.config": "clientId=a clientSecret=hunter2", "ssl.keystore.password": "p",
             "ssl.key.location": "/k", "sasl.oauthbearer.client.secret": "s", "my.token": "t",
             "ssl.keystore.location": "/ks", "security.protocol": "SASL_SSL"}
    masked = redacted(props)
    assert masked.pop("security.protocol") == "SASL_SSL"
    assert set(masked.values()) == {"***"}


def test_check_never_echoes_secrets(tmp_path, capsys):
    # Before: a YAML error printed the offending line, password included.
    err = _check(tmp_path, capsys, 'kafka:\n  client:\n    sasl.password: "hunter2\n    x: 1\n')
    assert "line 3, column 20: while scanning a quoted scalar" in err and "hunter2" not in err
    # librdkafka names a bad value in its message; one that is also a secret is masked there.
    err = _check(tmp_path, capsys, "kafka:\n  client:\n    security.protocol: SASL_SSL\n"
                 "    sasl.password: hunter2\n    sasl.mechanism: hunter2\n")
    assert "Failed to create consumer: Unsupported SASL mechanism: ***" in err and "hunter2" not in err


def test_daemon_start_line_masks_secrets_of_every_section(caplog):
    from streamdet.daemon.consumer import Daemon

    cfg = parse_config({"kafka": {"bootstrap_servers": "127.0.0.1:1",
                                  "client": {"sasl.oauthbearer.config": "clientSecret=hunter2"},
                                  "producer": {"ssl.key.password": "hunter3"}},
                        "health": {"address": "127.0.0.1:0"}})
    daemon = Daemon(cfg, parse_settings(cfg), metrics=Metrics(CollectorRegistry()))
    daemon.stop()  # returns after one pass of the loop
    with caplog.at_level(logging.INFO, logger="streamdet"):
        assert daemon.run(install_signals=False) == 0
    assert "librdkafka options {'sasl.oauthbearer.config': '***'}" in caplog.text
    assert "hunter2" not in caplog.text and "hunter3" not in caplog.text


# ---------------------------------------------------------------- log floods (issue 7, item 7)

def test_broker_errors_are_logged_once_per_interval_with_a_count(tmp_path, caplog):
    # Before: a closed port gave ~20 librdkafka ERROR lines a second (446 in 20 s with the broker down).
    import threading
    import time

    from streamdet.daemon.consumer import Daemon
    from streamdet.local_broker import free_port

    cfg = parse_config({"kafka": {"bootstrap_servers": f"127.0.0.1:{free_port()}", "poll_timeout": "0.2s"},
                        "state": {"dir": str(tmp_path / "state")}, "health": {"address": "127.0.0.1:0"}})
    daemon = Daemon(cfg, parse_settings(cfg), metrics=Metrics(CollectorRegistry()), log_interval=2.0)
    with caplog.at_level(logging.INFO, logger="streamdet"):
        t = threading.Thread(target=daemon.run, kwargs={"install_signals": False}, daemon=True)
        t.start()
        time.sleep(5.0)
        daemon.stop()
        t.join(20)
    assert not t.is_alive()
    rdkafka = [r.getMessage() for r in caplog.records if r.name == "streamdet.librdkafka"]
    kafka_errors = [r.getMessage() for r in caplog.records if r.getMessage().startswith("kafka:")]
    # 5 s at one line per 2 s: at most 3 lines each, plus one "suppressed" summary per interval
    assert 1 <= len(rdkafka) <= 6 and 1 <= len(kafka_errors) <= 3
    assert daemon._librdkafka_log.suppressed_total > 0
    assert any("similar line(s) suppressed in the last 2 s" in m for m in rdkafka)
