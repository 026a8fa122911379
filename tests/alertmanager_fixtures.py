"""Alertmanager for tests: the real one (Debian package prometheus-alertmanager) on loopback,
and a small stand-in HTTP server that answers as told (500, 400, slow) for the hostile cases."""

from __future__ import annotations

import json
import shutil
import subprocess
import threading
import time
import urllib.request
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from streamdet.local_broker import free_port, wait_port

ALERTMANAGER = shutil.which("prometheus-alertmanager") or shutil.which("alertmanager")
SKIP_REASON = ("the Alertmanager binary is not installed (apt-get install --no-install-recommends "
               "prometheus-alertmanager; .ci/run does this)")
MINIMAL_CONFIG = "route:\n  receiver: discard\n  group_wait: 1s\nreceivers:\n  - name: discard\n"


class RealAlertmanager:
    """``prometheus-alertmanager`` with a minimal config, temp storage and clustering off."""

    def __init__(self, tmp_path) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        (tmp_path / "alertmanager.yml").write_text(MINIMAL_CONFIG)
        self.proc = subprocess.Popen(
            [ALERTMANAGER, f"--config.file={tmp_path / 'alertmanager.yml'}",
             f"--storage.path={tmp_path / 'am-data'}", f"--web.listen-address=127.0.0.1:{self.port}",
             "--cluster.listen-address="], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        wait_port(self.port, timeout=30)

    def alerts(self) -> list[dict]:
        with urllib.request.urlopen(self.url + "/api/v2/alerts", timeout=3) as resp:
            return json.load(resp)

    def stop(self) -> None:
        self.proc.terminate()
        self.proc.wait(10)


class StandIn:
    """Records every POST body; answers with ``status`` after ``delay`` seconds. ``refuse``
    makes it answer 400 to any request holding an alert with that label value."""

    def __init__(self) -> None:
        self.status = 200
        self.delay = 0.0
        self.refuse: str | None = None
        self.bodies: list[list[dict]] = []
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = json.loads(self.rfile.read(int(self.headers["Content-Length"])))
                owner.bodies.append(body)
                time.sleep(owner.delay)
                status = owner.status
                if owner.refuse and any(owner.refuse in a["labels"].values() for a in body):
                    status = 400
                self.send_response(status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_port}"
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def alerts(self) -> list[dict]:
        return [a for body in self.bodies for a in body]

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
