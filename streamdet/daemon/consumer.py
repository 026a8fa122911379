"""The daemon loop: consume metric points, run one engine per input partition, publish events.

Delivery semantics: a partition's engine state and its input offset move together. Every
``checkpoint_interval`` the loop takes a cut between batches (offsets, producer barrier, a
copy-on-write image of the engines); it is written in the background once every event before
the cut is acknowledged, and only then are the offsets committed (``checkpointer``). On revoke
and shutdown the same happens synchronously. After any unexpected error the daemon writes no
checkpoint at all and exits non-zero: the engines may hold part of a batch their offsets do
not cover. After a crash it restores the checkpoint and re-reads from the offset it covers;
events re-emitted then carry the same ids as before, so nothing is lost and duplicates can be
dropped by id.

Poison is data: a message that cannot be decoded is counted by reason, dead-lettered and
skipped, and even a decoder bug on one message only costs that message (logged with a
traceback). Broker trouble and bad records are logged at most once per ``log_interval``.
"""

from __future__ import annotations

import logging
import signal
import threading
import time
from collections import Counter, defaultdict
from collections.abc import Iterable
from dataclasses import dataclass, field

from confluent_kafka import Consumer, KafkaError, KafkaException, Message, TopicPartition

from streamdet.alerting.alertmanager import alertmanager_sink
from streamdet.alerting.routing import Encoder
from streamdet.codecs import TimeRules
from streamdet.codecs.readers import MessageReader
from streamdet.config import Config
from streamdet.core.engine import DROP_REASONS, Engine, SnapshotError, StateChangeError
from streamdet.core.points import DecodeError, KeyCache, PointBatch, cache_limit, shorten
from streamdet.daemon.checkpointer import CheckpointWriter, write_checkpoints
from streamdet.daemon.faults import FaultPlan
from streamdet.daemon.health import HealthServer, Metrics, reason_code
from streamdet.daemon.logs import RateLimitedLog
from streamdet.daemon.producer import Sink
from streamdet.daemon.settings import DaemonSettings, redacted
from streamdet.daemon.state_store import LocalStateStore, StateError, StateStore


def make_store(settings: DaemonSettings) -> StateStore:
    """The store ``state.store`` names: a local directory (default) or a compacted Kafka topic."""
    if settings.state_store == "kafka":
        from streamdet.daemon.kafka_store import kafka_store_from_settings

        return kafka_store_from_settings(settings)
    return LocalStateStore(settings.state_dir)


log = logging.getLogger("streamdet.daemon")
TP = tuple[str, int]
_COUNTER_METRICS = ("points_accepted", "points_late",  # engine counter = metric attribute
                    "peer_groups_judged", "peer_members_judged", "steps_muted")
_DROP_REASONS = ("points_no_rule", "points_series_limit", "counter_samples_dropped", "points_bad_time")


class StartupError(RuntimeError):
    """The daemon cannot start or go on (bad state file); the message says what to do."""


@dataclass(slots=True)
class PartitionState:
    engine: Engine
    next_offset: int | None = None  # next offset to read; None until something was read
    dirty: bool = False
    counters: Counter[str] = field(default_factory=Counter)
    key_cache: KeyCache = field(default_factory=KeyCache)  # raw record identity -> series key
    reader: MessageReader | None = None  # formats: the topic's decoder, made on first use

    def __post_init__(self) -> None:
        # Bounded by the engine's series cap; entries of refused series are settled after ingest.
        self.key_cache.limit = cache_limit(self.engine.config.series.max_series)


def split_groups(engines: list[Engine]) -> int:
    """Peer groups that have live members in more than one partition's engine."""
    seen: Counter[str] = Counter()
    for eng in engines:
        if eng.peer_groups is not None:
            seen.update(eng.peer_groups.group_keys())
    return sum(1 for n in seen.values() if n > 1)


class Daemon:
    """``Daemon(config, settings).run()`` until SIGTERM/SIGINT or :meth:`stop`."""

    def __init__(self, config: Config, settings: DaemonSettings, *, metrics: Metrics,
                 store: StateStore | None = None, events_file: str | None = None,
                 fresh_partitions: Iterable[TP] = (), log_interval: float = 10.0,
                 faults: FaultPlan | None = None, shadow: bool | None = None) -> None:
        self.config = config
        self.settings = settings
        self.metrics = metrics
        self.store = store or make_store(settings)
        self.restoring: dict[TP, str] = {}  # --- Kafka state store: partitions loading, for /readyz
        self.events_file = events_file
        self.fresh = set(fresh_partitions)
        self.parts: dict[TP, PartitionState] = {}
        self._stop = threading.Event()
        self._connected = False
        self._last_checkpoint = time.monotonic()
        self._checkpoint_done = time.monotonic()
        self._last_probe = 0.0
        self.log_interval = log_interval
        self._log = RateLimitedLog(log, log_interval)
        self._librdkafka_log = RateLimitedLog(logging.getLogger("streamdet.librdkafka"), log_interval)
        self.consumer: Consumer | None = None
        self.sink: Sink | None = None
        self.health_port: int | None = None
        # --- crash consistency (see DEVELOPERS.md, "Checkpoint ordering")
        self.faults = faults if faults is not None else FaultPlan.from_environment()  # tests only
        self.writer = CheckpointWriter(self.store, self.faults)
        self._failed = False  # set on any unexpected error: no checkpoint is written after it
        # --- shadow mode (streamdet/shadow): None when off; `shadow` overrides the config's switch
        from streamdet.shadow.settings import ShadowSettings, parse_shadow

        self.shadow_settings = parse_shadow(config)
        if shadow is not None:
            self.shadow_settings = self.shadow_settings.on() if shadow else ShadowSettings()
        self.shadow = None
        # --- mutes API: changes posted on the health port, applied by the loop between batches
        from streamdet.daemon.mutes_api import MuteBoard

        self.mute_board = MuteBoard(config.mutes)

    # ------------------------------------------------------------ configuration

    def _callbacks(self) -> dict:
        return {"error_cb": self._on_error, "logger": self._librdkafka_log}

    def consumer_conf(self) -> dict:
        return {**self.settings.consumer_properties(), **self._callbacks()}

    def producer_conf(self) -> dict:
        return {**self.settings.producer_properties(), **self._callbacks()}

    # ------------------------------------------------------------ lifecycle

    def stop(self, *_args) -> None:
        self._stop.set()

    def ready(self) -> tuple[bool, str]:
        if self.restoring:  # --- Kafka state store: read from another thread (the health server)
            progress = "; ".join(f"{t}:{p} {text}" for (t, p), text in list(self.restoring.items()))
            return False, f"restoring {len(self.restoring)} partition(s): {progress}"
        if not self._connected:
            return False, "not connected to the brokers"
        if not self.parts:
            return False, "no partitions assigned"
        return True, f"ready: {len(self.parts)} partition(s)"

    def run(self, *, install_signals: bool = True, health: bool = True) -> int:
        if install_signals:
            signal.signal(signal.SIGTERM, self.stop)
            signal.signal(signal.SIGINT, self.stop)
        server = None
        output_topic, extensions = self.settings.output_topic, None
        if self.shadow_settings.enabled:  # --- shadow mode
            from streamdet.shadow.runtime import EXTENSIONS, ShadowRuntime

            output_topic, extensions = self.shadow_settings.topic, EXTENSIONS
            self.shadow = ShadowRuntime(self.shadow_settings, registry=self.metrics.registry,
                                        state_dir=self.settings.state_dir, consumer_conf=self.consumer_conf(),
                                        source=self.settings.source)
            log.info("shadow mode: events to %s, alert webhook on %s",
                     self.events_file or self.shadow_settings.topic, self.shadow_settings.webhook_path)
        if health:
            host, port = self.settings.health_host_port
            routes = dict(self.shadow.routes()) if self.shadow else {}
            routes.update(self.series_routes())  # series bands: /series, /series/{key}/band.svg
            if self.settings.mutes_api:  # --- mutes API
                from streamdet.daemon.mutes_api import mutes_app

                api = mutes_app(self.mute_board, allow_remote=self.settings.mutes_api_remote)
                routes.update({"/mutes": api, "/mutes/": api})
                log.info("mutes API on /mutes%s", " (remote clients allowed)"
                         if self.settings.mutes_api_remote else " (loopback clients only)")
            server = HealthServer(self.metrics, self.ready, host, port, routes).start()
            self.health_port = server.port
            log.info("health on http://%s:%d (/metrics, /healthz, /readyz)", host, server.port)
        log.info("consuming %s from %s as group %s; librdkafka options %s, consumer %s, producer %s",
                 ",".join(self.settings.input_topics), self.settings.bootstrap_servers,
                 self.settings.group_id, redacted(self.settings.client), redacted(self.settings.consumer),
                 redacted(self.settings.producer))
        self.sink = Sink(metrics=self.metrics, source=self.settings.source,
                         producer_conf=self.producer_conf(), output_topic=output_topic,
                         dead_letter_topic=self.settings.dead_letter_topic, events_file=self.events_file,
                         log_interval=self.log_interval,
                         # alert routing (issue 10): routed encoding and the optional Alertmanager sink
                         encoder=Encoder(self.config, self.settings.source),
                         # in shadow mode nothing reaches the live alert route
                         alerts=None if self.shadow_settings.enabled else
                         alertmanager_sink(self.config, self.settings, self.metrics),
                         faults=self.faults, extensions=extensions)
        # --- Kafka state store: check or create the state topic before joining the group
        if hasattr(self.store, "open"):
            try:
                self.store.open()
            except StateError as exc:
                log.error("%s", exc)
                self.sink.close(timeout=2.0)
                if server is not None:
                    server.stop()
                return 2
            self.store.progress = self._restore_progress
        self.consumer = Consumer(self.consumer_conf())
        self.consumer.subscribe(list(self.settings.input_topics), on_assign=self._on_assign,
                                on_revoke=self._on_revoke, on_lost=self._on_lost)
        code = 1
        try:
            while not self._stop.is_set():
                msgs = self.consumer.consume(self.settings.batch_size, self.settings.poll_timeout)
                self.sink.poll()
                self._apply_mutes()  # --- mutes API: between batches, on every partition's engine
                if msgs:
                    self._process(msgs)
                self._checkpoint_progress()
                now = time.monotonic()
                if now - self._last_checkpoint >= self.settings.checkpoint_interval:
                    self._begin_checkpoint()
                if self.shadow:  # --- shadow mode: periodic summary
                    self.shadow.tick([p.engine for p in self.parts.values()], self.sink.send_document)
                if now - self._last_probe >= 2.0:
                    self._probe()
                    self._update_gauges()
                    self._log.flush()
                    self._librdkafka_log.flush()
            code = 0
        except (StateError, SnapshotError, StartupError) as exc:
            log.error("%s", exc)
            code = 2
        except Exception:
            log.exception("unexpected error; exiting without a checkpoint (a restart resumes from the "
                          "last one and emits the same events again)")
        finally:
            if code == 0:
                log.info("stopping: flushing events, checkpointing, committing")
                self.checkpoint(list(self.parts), timeout=5.0)
            else:
                # The engines may hold (part of) a batch their offsets do not cover: from here
                # on nothing is checkpointed, not even by the revoke that close() triggers.
                self._failed = True
                self.writer.abandon()
            if self.shadow:  # --- shadow mode
                self.shadow.stop()
                if code == 0:
                    self.shadow.tick([p.engine for p in self.parts.values()], self.sink.send_document,
                                     force=True)
                    self.shadow.save()
            self.sink.close(timeout=2.0)
            try:
                self.consumer.close()
            except KafkaException as exc:
                log.warning("consumer close: %s", exc)
            if server is not None:
                server.stop()
            if hasattr(self.store, "close"):  # --- Kafka state store
                self.store.close()
        return code

    # ------------------------------------------------------------ rebalances

    def _on_assign(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        self._settle_checkpoint(5.0)  # a write in flight may be for a partition assigned again
        for tp in partitions:
            key = (tp.topic, tp.partition)
            if key in self.fresh:
                self.store.discard(*key)
                log.warning("starting %s:%d fresh as asked (--fresh-partition)", *key)
            self.restoring[key] = "starting"  # --- Kafka state store: /readyz until restored
            ckpt = self.store.load(*key)  # (an error here or below stops the daemon: exit 2)
            if ckpt is None:
                self.restoring.pop(key, None)
                self.parts[key] = PartitionState(Engine(self.config))
                self.parts[key].engine.mutes.replace_api(self.mute_board.adopt(()))  # --- mutes
                log.info("assigned %s:%d with no checkpoint", *key)
                continue
            try:
                engine = Engine.restore(self.config, ckpt.snapshot,
                                        on_rule_change=self.settings.on_rule_change)
            except StateChangeError as exc:
                path = getattr(self.store, "path", lambda *_: "the state store")(*key)
                raise StartupError(f"{path}: {exc}") from None
            except SnapshotError as exc:
                path = getattr(self.store, "path", lambda *_: "the state store")(*key)
                raise StartupError(f"{path}: cannot restore ({exc}); start it fresh with "
                                   f"--fresh-partition {key[0]}:{key[1]}") from None
            engine.mutes.replace_api(self.mute_board.adopt(engine.mutes.api_entries()))  # --- mutes
            self.restoring.pop(key, None)
            part = PartitionState(engine, ckpt.next_offset)
            part.counters = Counter(engine.counters)
            self.parts[key] = part
            tp.offset = ckpt.next_offset
            log.info("assigned %s:%d restored at offset %d (%d series)", *key, ckpt.next_offset,
                     engine.stats()["series_active"])
            self._report_restore(key, engine)
        consumer.incremental_assign(partitions)

    def _restore_progress(self, what: str, records: int, nbytes: int) -> None:
        """The Kafka state store's loader reports how far it has read (shown on /readyz)."""
        topic, _, partition = what.rpartition(":")
        key = (topic, int(partition))
        if key in self.restoring:
            self.restoring[key] = (f"{records} state records read, {nbytes / 1e6:.1f} MB of this "
                                   f"partition's; then the engine is restored")

    def _report_restore(self, key: TP, engine: Engine) -> None:
        """Log and count what the restore kept, dropped and reset; send the closings it decided."""
        report = engine.restore_report
        if report is None:
            return
        m = self.metrics.restored_series
        m.labels("kept").inc(report.series_kept)
        m.labels("dropped").inc(report.series_dropped)
        m.labels("relearning").inc(report.series_relearning)
        for line in report.lines():
            log.warning("restored %s:%d: %s", *key, line)
        if engine.restore_events and self.sink is not None:
            self.sink.send(engine.restore_events, time.monotonic())
            engine.restore_events = []

    def _on_revoke(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        keys = [(tp.topic, tp.partition) for tp in partitions]
        self.checkpoint([k for k in keys if k in self.parts], timeout=5.0)
        for k in keys:
            self.parts.pop(k, None)
        consumer.incremental_unassign(partitions)
        log.info("revoked %s", ", ".join(f"{t}:{p}" for t, p in keys))

    def _on_lost(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        for tp in partitions:
            self.parts.pop((tp.topic, tp.partition), None)
        log.warning("lost %d partition(s); they resume from their last checkpoint", len(partitions))
        consumer.incremental_unassign(partitions)

    # ------------------------------------------------------------ processing

    def _decode(self, key: TP, items: list[Message], part: PartitionState, rules: TimeRules) -> PointBatch:
        """Decode a partition's messages into one batch; dead-letter the messages with bad records.

        Decoders never raise on bad input; should one raise anyway (a bug), the batch is decoded
        again message by message and only the message that raises is lost (dead-lettered).
        """
        try:
            return self._decode_batch(key, items, part, rules)
        except Exception:
            log.exception("decoding a batch of %d message(s) from %s:%d failed; retrying one by one",
                          len(items), *key)
        batches = []
        for msg in items:
            try:
                batches.append(self._decode_batch(key, [msg], part, rules))
            except Exception as exc:
                where = f"{key[0]}/{key[1]}@{msg.offset()}"
                log.exception("decoder error on %s; the message is dead-lettered and skipped", where)
                self.metrics.records_in.inc()
                reason = f"internal error in the decoder ({type(exc).__name__}: {shorten(str(exc), 80)})"
                self._dead_letter(msg, [DecodeError(position=where, reason=reason,
                                                    record=shorten(msg.value() or b""))])
        return PointBatch.concat(batches)

    def _decode_batch(self, key: TP, items: list[Message], part: PartitionState,
                      rules: TimeRules) -> PointBatch:
        topic, partition = key
        # --- formats: each topic is read in its own format (kafka.input_topics[].format)
        if part.reader is None:
            part.reader = MessageReader(self.settings.topic_inputs.get(topic, self.config.input),
                                        cache=part.key_cache)
        batch, bad, records = part.reader.decode_messages(
            [m.value() or b"" for m in items], lambda i: f"{topic}/{partition}@{items[i].offset()}",
            rules=rules)
        # --- end formats
        self.metrics.records_in.inc(records)
        for i, d in bad:
            self._dead_letter(items[i], d.errors)
        return batch

    def _process(self, msgs: list[Message]) -> None:
        started = time.monotonic()
        assert self.sink is not None
        by_part: dict[TP, list[Message]] = defaultdict(list)
        for msg in msgs:
            err = msg.error()
            if err is not None:
                if err.code() != KafkaError._PARTITION_EOF:
                    self._on_error(err)
                continue
            by_part[(msg.topic(), msg.partition())].append(msg)
        self._connected = True
        rules = TimeRules(now=time.time(), max_future=self.config.input.max_future)
        for key, items in by_part.items():
            part = self.parts.get(key)
            if part is None:  # revoked while the batch was in flight
                continue
            events = part.engine.ingest(self._decode(key, items, part, rules))
            part.key_cache.settle(part.engine.table.knows)
            self.faults.hit("ingest")  # test-only (STREAMDET_FAULT): state moved, offset not yet
            self._count(part)
            if part.engine.mutes_expired:  # --- mutes: ended by data time
                self.mute_board.expired(part.engine.mutes_expired)
                part.engine.mutes_expired.clear()
            if part.engine.dropped:
                self._log_dropped(key, part.engine)
            self.sink.send(events, time.monotonic())
            if self.shadow:  # --- shadow mode
                self.shadow.observe(events)
            part.next_offset = items[-1].offset() + 1
            part.dirty = True
        self.metrics.batch_seconds.observe(time.monotonic() - started)

    def _apply_mutes(self) -> None:
        """Apply the mutes API's changes to every partition's engine (the HTTP threads only queue
        them). A changed engine is checkpointed even without new input, so a restart keeps it."""
        changes = self.mute_board.drain()
        for what, arg in changes:
            for part in self.parts.values():
                if what == "add":
                    part.engine.mutes.add(arg)
                else:
                    part.engine.mutes.remove(arg)
                part.dirty = True
            log.info("mute %s: %s", "added" if what == "add" else "removed",
                     arg.id if what == "add" else arg)

    def _dead_letter(self, msg: Message, errors) -> None:
        assert self.sink is not None
        for e in errors:
            self.metrics.records_bad.labels(reason_code(e.reason)).inc()
        first = errors[0]
        self._log.log(logging.WARNING, "bad record %s: %s (%d in this message)", first.position,
                      first.reason, len(errors), key="bad record")
        headers = [
            ("streamdet-error", first.reason.encode()),
            ("streamdet-error-position", first.position.encode()),
            ("streamdet-error-count", str(len(errors)).encode()),
            ("streamdet-errors", "\n".join(f"{e.position}: {e.reason}" for e in errors[:50]).encode()),
            ("source-topic", msg.topic().encode()),
            ("source-partition", str(msg.partition()).encode()),
            ("source-offset", str(msg.offset()).encode()),
        ]
        self.sink.dead_letter(msg.value() or b"", msg.key(), headers,
                              f"{msg.topic()}/{msg.partition()}@{msg.offset()}")

    def _log_dropped(self, key: TP, engine: Engine) -> None:
        """One line per interval about points the engine dropped (late, impossible time):
        the first one's series key and how far behind it was, and the batch's counts."""
        counts = ", ".join(f"{n} {DROP_REASONS[reason]}"
                           for reason, n in sorted(engine.dropped_counts.items()) if n)
        self._log.log(logging.WARNING, "dropped point(s) on %s:%d (%s); first: %s", *key, counts,
                      engine.dropped[0], key="dropped point")

    def _count(self, part: PartitionState) -> None:
        c = part.engine.counters
        for name in _COUNTER_METRICS:
            delta = c[name] - part.counters[name]
            if delta:
                getattr(self.metrics, name).inc(delta)
        for name in _DROP_REASONS:
            delta = c[name] - part.counters[name]
            if delta:
                self.metrics.points_dropped.labels(name.removeprefix("points_")).inc(delta)
        part.counters = Counter(c)

    # ------------------------------------------------------------ checkpoints
    # Ordering (DEVELOPERS.md, "Checkpoint ordering"): events of a batch handed to the sink ->
    # cut between batches -> events up to the cut acknowledged -> checkpoint files durable ->
    # offsets committed. Nothing is checkpointed once ``_failed`` is set.

    def _dirty(self, keys: Iterable[TP]) -> list[TP]:
        return [k for k in keys if k in self.parts and self.parts[k].dirty
                and self.parts[k].next_offset is not None]

    def _begin_checkpoint(self) -> None:
        """Take a cut of every changed partition and hand it to the background writer."""
        self._last_checkpoint = time.monotonic()
        if self.writer.busy or self._failed:
            return
        dirty = self._dirty(self.parts)
        if not dirty:
            return
        assert self.sink is not None
        started = time.monotonic()
        barrier = self.sink.barrier()
        offsets = {k: self.parts[k].next_offset for k in dirty}
        self.writer.start(offsets, barrier, {k: self.parts[k].engine for k in dirty})
        for k in dirty:
            self.parts[k].dirty = False
        self.metrics.checkpoint_pause.observe(time.monotonic() - started)

    def _checkpoint_progress(self, wait: float = 0.0) -> None:
        """Release the cut in flight once its events are acknowledged; commit once it is written."""
        if not self.writer.busy:
            return
        assert self.sink is not None and self.writer.cut is not None
        if not self.writer.released:
            if self.sink.acknowledged(self.writer.cut.barrier):
                self.writer.release()
            elif time.monotonic() - self.writer.cut.started > 10.0:
                self._log.log(logging.WARNING, "events not yet acknowledged; checkpoint waiting",
                              key="checkpoint waiting")
        pending = self.writer.cut
        cut = self.writer.finished(wait)
        if cut is not None:
            self._commit(cut.offsets)
        elif not self.writer.busy and self.writer.retry:
            self._mark_dirty(pending.offsets)

    def _mark_dirty(self, keys: Iterable[TP]) -> None:
        """A cut of these partitions was dropped: the next one must take them again."""
        for key in keys:
            if key in self.parts:
                self.parts[key].dirty = True

    def _settle_checkpoint(self, timeout: float) -> bool:
        """Finish the cut in flight, or abandon it after ``timeout``; True if none is left."""
        deadline = time.monotonic() + timeout
        while self.writer.busy:
            if time.monotonic() >= deadline:
                cut = self.writer.cut
                log.warning("checkpoint in flight abandoned: its events were not acknowledged in time")
                self.writer.abandon()
                self._mark_dirty(cut.offsets if cut is not None else ())
                return False
            self._checkpoint_progress(wait=0.05)
        return True

    def checkpoint(self, keys: list[TP], timeout: float = 5.0) -> bool:
        """Now (revoke, shutdown): events acknowledged -> checkpoints durable -> offsets committed."""
        self._last_checkpoint = time.monotonic()
        if self._failed:
            log.warning("no checkpoint after an unexpected error; the last durable one stands")
            return False
        if not self._settle_checkpoint(timeout):
            return False
        dirty = self._dirty(keys)
        if not dirty:
            return True
        assert self.sink is not None and self.consumer is not None
        if not self.sink.flush(timeout):
            log.warning("events not yet acknowledged; checkpoint postponed")
            return False
        offsets = {k: self.parts[k].next_offset for k in dirty}
        for _ in dirty:
            self.faults.hit("checkpoint")  # test-only (STREAMDET_FAULT): once per file
        write_checkpoints(self.store, [(k, offsets[k], self.parts[k].engine.snapshot()) for k in dirty])
        for k in dirty:
            self.parts[k].dirty = False
        self._commit(offsets)
        return True

    def _commit(self, offsets: dict[TP, int | None]) -> None:
        """Checkpoints for ``offsets`` are durable: count them and commit the offsets still ours."""
        self.faults.hit("commit")  # test-only (STREAMDET_FAULT)
        if self.shadow:  # --- shadow mode: the comparison state goes with the checkpoint
            self.shadow.save()
        self.metrics.checkpoints.inc(len(offsets))
        self._checkpoint_done = time.monotonic()
        assert self.consumer is not None
        tps = [TopicPartition(t, p, o) for (t, p), o in offsets.items()
               if (t, p) in self.parts and o is not None]
        if tps:
            try:
                # Asynchronous: a sync commit would block for as long as the brokers are away.
                # The checkpoint is durable and carries the offset, and a restart seeks there.
                self.consumer.commit(offsets=tps, asynchronous=True)
            except KafkaException as exc:
                log.warning("offset commit failed (%s); the checkpoint still covers it", exc)

    # ------------------------------------------------------------ health

    def series_routes(self, muted=None) -> dict:
        """``/series`` and ``/series/{key}/band.svg`` over this daemon's engines (series bands).
        ``muted``: optional ``key -> [(start, end)]`` for silenced periods (drawn hatched)."""
        from streamdet.daemon.series_api import series_app

        app = series_app(lambda: [p.engine for p in self.parts.values()], muted)
        return {"/series": app, "/series/": app}

    def _on_error(self, err: KafkaError) -> None:
        if err.code() in (KafkaError._ALL_BROKERS_DOWN, KafkaError._TRANSPORT, KafkaError._RESOLVE):
            self._connected = False
        self._log.log(logging.WARNING, "kafka: %s (retrying with backoff)", err.str(), key="kafka")

    def _probe(self) -> None:
        """Ask the brokers for the partitions' end offsets: a connectivity check and the lag gauge."""
        self._last_probe = time.monotonic()
        assert self.consumer is not None
        try:
            if not self.parts:
                self.consumer.list_topics(timeout=1.0)
            for (topic, partition), part in list(self.parts.items()):
                _low, high = self.consumer.get_watermark_offsets(TopicPartition(topic, partition),
                                                                 timeout=1.0, cached=False)
                if part.next_offset is not None:
                    self.metrics.lag.labels(topic, str(partition)).set(max(0, high - part.next_offset))
            self._connected = True
        except KafkaException as exc:
            self._connected = False
            self._log.log(logging.WARNING, "brokers not reachable (%s); retrying", exc, key="kafka")

    def _update_gauges(self) -> None:
        stats = Counter()
        most_mutes = 0  # --- mutes: partitions share the mutes, so the most, not the sum
        for part in self.parts.values():
            one = part.engine.stats()
            most_mutes = max(most_mutes, one["mutes_active"])
            stats.update(one)
        m = self.metrics
        m.series_active.set(stats["series_active"])
        m.series_learning.set(stats["series_learning"])
        m.breaches_open.set(stats["breaches_open"])
        m.outliers_open.set(stats["outliers_open"])
        m.peer_groups_split.set(split_groups([p.engine for p in self.parts.values()]))
        m.state_bytes.set(stats["state_bytes"])
        m.mutes_active.set(most_mutes)
        m.since_checkpoint.set(time.monotonic() - self._checkpoint_done)
        m.ready.set(1 if self.ready()[0] else 0)
