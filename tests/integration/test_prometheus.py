"""A real Prometheus server (Debian package) scrapes the daemon's health endpoint."""

from __future__ import annotations

import json
import shutil
import subprocess
import urllib.parse
import urllib.request

import pytest

from streamdet.local_broker import free_port, wait_port
from tests.integration.streams import as_messages, waterflow_points
from tests.integration.test_daemon import Running, make_daemon, wait_for

pytestmark = pytest.mark.broker
PROMETHEUS = shutil.which("prometheus")


def query(port: int, expr: str):
    url = f"http://127.0.0.1:{port}/api/v1/query?" + urllib.parse.urlencode({"query": expr})
    try:
        doc = json.load(urllib.request.urlopen(url, timeout=3))
    except OSError:
        return None
    result = doc.get("data", {}).get("result", [])
    return float(result[0]["value"][1]) if result else None


@pytest.mark.skipif(PROMETHEUS is None, reason="the prometheus binary is not installed "
                    "(apt-get install --no-install-recommends prometheus; .ci/run does this)")
def test_prometheus_scrapes_the_daemon(broker, tmp_path):
    topics = broker.daemon_topics()
    points = waterflow_points(sites=1)
    broker.produce(topics[0], as_messages(points))
    daemon, _metrics = make_daemon(broker, tmp_path, topics)
    with Running(daemon):
        assert wait_for(lambda: daemon.health_port is not None)
        (tmp_path / "prom.yml").write_text(
            "global: {scrape_interval: 1s}\nscrape_configs:\n  - job_name: streamdet\n"
            f"    static_configs: [{{targets: ['127.0.0.1:{daemon.health_port}']}}]\n")
        port = free_port()
        prom = subprocess.Popen([PROMETHEUS, f"--config.file={tmp_path / 'prom.yml'}",
                                 f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                                 f"--web.listen-address=127.0.0.1:{port}"],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            wait_port(port, timeout=30)
            assert wait_for(lambda: query(port, 'up{job="streamdet"}') == 1.0, timeout=60)
            assert wait_for(lambda: query(port, "streamdet_points_accepted_total") == len(points), timeout=60)
        finally:
            prom.terminate()
            prom.wait(10)
