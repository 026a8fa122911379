"""The background checkpoint writer (forked child and thread) and the test-only fault plan."""

import numpy as np
import pytest

from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.daemon.checkpointer import CheckpointWriter
from streamdet.daemon.faults import FaultPlan, InjectedFault
from streamdet.daemon.state_store import LocalStateStore
from tests.helpers import batch

CFG = {"rules": [{"name": "r", "warmup": "30 steps"}]}
KEY = ("metrics", 0)


def engine_after(n: int) -> Engine:
    rng = np.random.default_rng(5)
    eng = Engine(parse_config(CFG))
    eng.ingest(batch(["a", "b"] * n, np.repeat(np.arange(n) * 60.0 + 1.7e9, 2), rng.normal(0, 1, 2 * n)))
    return eng


def more(eng: Engine, start: int, n: int) -> None:
    eng.ingest(batch(["a", "b"] * n, np.repeat(np.arange(start, start + n) * 60.0 + 1.7e9, 2),
                     np.ones(2 * n)))


@pytest.mark.parametrize("use_fork", [True, False], ids=["fork", "thread"])
def test_the_file_holds_the_state_at_the_cut_and_appears_only_after_release(tmp_path, use_fork):
    store = LocalStateStore(tmp_path)
    eng = engine_after(100)
    at_cut = eng.snapshot()
    writer = CheckpointWriter(store, use_fork=use_fork)
    cut = writer.start({KEY: 200}, 7, {KEY: eng})
    more(eng, 100, 50)  # the loop goes on: later batches must not leak into the checkpoint
    assert writer.finished(0.5) is None and store.load(*KEY) is None  # not released: nothing written
    writer.release()
    done = None
    for _ in range(200):
        done = writer.finished(0.1)
        if done is not None:
            break
    assert done is cut and not writer.busy
    ck = store.load(*KEY)
    assert ck.next_offset == 200
    assert ck.snapshot == at_cut
    assert Engine.restore(eng.config, ck.snapshot).counters["points_in"] == 200


@pytest.mark.parametrize("use_fork", [True, False], ids=["fork", "thread"])
def test_an_abandoned_cut_writes_nothing(tmp_path, use_fork):
    store = LocalStateStore(tmp_path)
    writer = CheckpointWriter(store, use_fork=use_fork)
    writer.start({KEY: 200}, 7, {KEY: engine_after(100)})
    writer.abandon()
    assert not writer.busy and writer.finished() is None
    assert store.load(*KEY) is None and not list(tmp_path.iterdir())


@pytest.mark.parametrize("use_fork", [True, False], ids=["fork", "thread"])
def test_a_fault_while_checkpointing_is_raised_on_the_loop_and_writes_nothing(tmp_path, use_fork):
    store = LocalStateStore(tmp_path)
    writer = CheckpointWriter(store, FaultPlan.parse("checkpoint:1"), use_fork=use_fork)
    writer.start({KEY: 200}, 7, {KEY: engine_after(100)})
    writer.release()
    with pytest.raises(InjectedFault):
        for _ in range(200):
            writer.finished(0.1)
    assert store.load(*KEY) is None


def test_only_one_cut_in_flight(tmp_path):
    writer = CheckpointWriter(LocalStateStore(tmp_path), use_fork=False)
    eng = engine_after(10)
    writer.start({KEY: 20}, 0, {KEY: eng})
    with pytest.raises(RuntimeError, match="already in flight"):
        writer.start({KEY: 20}, 0, {KEY: eng})
    writer.abandon()


@pytest.mark.parametrize("text", ["ingest", "ingest:0", "ingest:x", "bogus:3", "ingest:2:maybe",
                                  "ingest:1:kill:now", ":3"])
def test_bad_fault_plans_are_refused_naming_the_item(text):
    with pytest.raises(ValueError, match="STREAMDET_FAULT: bad item"):
        FaultPlan.parse(text)


def test_fault_plan_counts_each_point_apart():
    plan = FaultPlan.parse("deliver:2, commit:1")
    plan.hit("ingest")  # not planned: never fails
    plan.hit("deliver")
    with pytest.raises(InjectedFault, match="commit #1"):
        plan.hit("commit")
    with pytest.raises(InjectedFault, match="deliver #2"):
        plan.hit("deliver")
    plan.hit("deliver")  # only the Nth pass fails
    assert FaultPlan.from_environment({}).faults == {}


def test_only_a_fork_safe_store_is_written_from_a_forked_child(tmp_path):
    class MemoryStore:  # a store that does not say it is fork-safe (say, one with a Kafka client)
        def save(self, checkpoint): ...
        def load(self, topic, partition): ...
        def discard(self, topic, partition): ...

    assert not CheckpointWriter(MemoryStore()).use_fork
    assert CheckpointWriter(LocalStateStore(tmp_path)).use_fork
