"""The Kafka state store's settings and pure pieces (no broker): hostile keys, chunking, manifests."""

import hashlib

import pytest

from streamdet.config import ConfigError, parse_config
from streamdet.daemon.consumer import make_store
from streamdet.daemon.kafka_store import KafkaStateStore, Manifest, split_chunks
from streamdet.daemon.settings import apply_environment, parse_settings
from streamdet.daemon.state_store import LocalStateStore, StateError


def test_state_store_keys_and_defaults(tmp_path):
    s = parse_settings(parse_config({"state": {"dir": str(tmp_path)}}))
    assert s.state_store == "local" and isinstance(make_store(s), LocalStateStore)
    s = parse_settings(parse_config({"kafka": {"group_id": "fleet"}, "state": {"store": "kafka"}}))
    store = make_store(s)
    assert isinstance(store, KafkaStateStore) and store.topic == "fleet-state"
    assert store.chunk_bytes == 900_000 and store.fork_safe is False
    env = apply_environment({}, {"STREAMDET_STATE_STORE": "kafka", "STREAMDET_STATE_CHUNK_BYTES": "500000",
                                 "STREAMDET_STATE_TOPIC": "t"})
    s = parse_settings(parse_config(env))
    assert (s.state_store, s.state_chunk_bytes, s.state_topic) == ("kafka", 500_000, "t")


@pytest.mark.parametrize("state, problem", [
    ({"store": "s3"}, "state.store: "),
    ({"store": "kafka", "topic": 7}, "state.topic: expected a topic name, got 7"),
    ({"store": "kafka", "topic": ""}, "state.topic: expected a topic name"),
    ({"store": "kafka", "chunk_bytes": 10}, "state.chunk_bytes: must be >= 1024"),
    ({"store": "kafka", "chunk_bytes": "big"}, "state.chunk_bytes: expected a whole number"),
    ({"store": "kafka", "chunk_bytes": 1e12}, "state.chunk_bytes: must be <= "),
    ({"store": "kafka", "partitions_please": 3}, "state.partitions_please: unknown key"),
])
def test_hostile_state_keys_are_refused_by_key_path(state, problem):
    with pytest.raises(ConfigError) as exc:
        parse_settings(parse_config({"state": state}))
    assert any(p.startswith(problem) for p in exc.value.problems), exc.value.problems


def test_split_chunks_covers_the_bytes_in_order():
    data = bytes(range(256)) * 40  # 10,240 bytes
    pieces = split_chunks(data, 4096)
    assert [len(p) for p in pieces] == [4096, 4096, 2048] and b"".join(pieces) == data
    assert split_chunks(b"", 4096) == [b""]
    assert KafkaStateStore({}, "t", chunk_bytes=1024).chunk_bytes == 1024
    with pytest.raises(ValueError, match="chunk_bytes must be at least 1024"):
        KafkaStateStore({}, "t", chunk_bytes=10)


def test_manifest_round_trip_and_hostile_manifests():
    m = Manifest("in", 2, 77, "g1", ("in/2/c/g1/0",), 3, hashlib.sha256(b"abc").hexdigest())
    assert Manifest.parse(m.to_bytes(), "x") == m
    for raw, why in [(b"\xff\xfe", "not JSON"), (b"[1, 2]", "not a JSON object"),
                     (b'{"format": 2}', "manifest format 2"),
                     (b'{"format": 1, "topic": "in"}', "lacks a usable field"),
                     (m.to_bytes().replace(b'["in/2/c/g1/0"]', b'"in/2/c/g1/0"'), "lacks a usable field"),
                     (m.to_bytes().replace(b'"next_offset":77', b'"next_offset":"soon"'), "lacks a usable field")]:
        with pytest.raises(StateError, match=why):
            Manifest.parse(raw, "x")
