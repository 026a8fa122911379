"""A real Alertmanager (Debian's prometheus-alertmanager) sends its webhook to streamdet's
receiver: alerts posted to its v2 API arrive with the labels and times we gave it, firing and
then resolved, and take part in the comparison. Loopback only; clustering off."""

from __future__ import annotations

import json
import shutil
import subprocess
import time
import urllib.request

import pytest
from prometheus_client import CollectorRegistry

from streamdet.config import parse_config
from streamdet.daemon.health import HealthServer, Metrics
from streamdet.events import OPENED, rfc3339
from streamdet.local_broker import free_port, wait_port
from streamdet.shadow.runtime import ShadowRuntime
from streamdet.shadow.settings import parse_shadow
from tests.integration.test_daemon import wait_for

ALERTMANAGER = shutil.which("prometheus-alertmanager") or shutil.which("alertmanager")


def post_alerts(port: int, alerts: list[dict]) -> None:
    req = urllib.request.Request(f"http://127.0.0.1:{port}/api/v2/alerts", data=json.dumps(alerts).encode(),
                                 headers={"Content-Type": "application/json"}, method="POST")
    with urllib.request.urlopen(req, timeout=5) as r:
        assert r.status == 200


@pytest.mark.skipif(ALERTMANAGER is None, reason="the prometheus-alertmanager binary is not installed "
                    "(apt-get install --no-install-recommends prometheus-alertmanager; .ci/run does this)")
def test_alertmanager_webhook_reaches_the_comparison(tmp_path):
    registry = CollectorRegistry()
    cfg = parse_config({"shadow": {"match": {"labels": ["site"], "metrics": {"FlowLow": "waterflow"}}}})
    rt = ShadowRuntime(parse_shadow(cfg), registry=registry, state_dir=tmp_path)
    rt.book.add_series([('waterflow{site="s0"}', "waterflow", {"site": "s0"}, "flow")])
    server = HealthServer(Metrics(registry), lambda: (True, "ok"), "127.0.0.1", 0, rt.routes()).start()
    am_port = free_port()
    (tmp_path / "am.yml").write_text(
        "route:\n  receiver: streamdet\n  group_by: [alertname, site]\n  group_wait: 1s\n"
        "  group_interval: 1s\n  repeat_interval: 1h\n"
        "receivers:\n  - name: streamdet\n    webhook_configs:\n"
        f"      - url: http://127.0.0.1:{server.port}/alerts\n        send_resolved: true\n")
    am = subprocess.Popen([ALERTMANAGER, f"--config.file={tmp_path / 'am.yml'}",
                           f"--storage.path={tmp_path / 'am-data'}", f"--web.listen-address=127.0.0.1:{am_port}",
                           "--cluster.listen-address="],
                          stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        try:
            wait_port(am_port, timeout=30)
        except RuntimeError as exc:
            pytest.skip(f"Alertmanager did not start: {exc}")
        now = float(int(time.time()))
        start = now - 600
        labels = {"alertname": "FlowLow", "site": "s0", "severity": "page"}
        post_alerts(am_port, [{"labels": labels, "startsAt": rfc3339(start), "endsAt": rfc3339(now + 3600),
                               "generatorURL": "http://127.0.0.1/graph"}])
        firing = lambda: registry.get_sample_value("streamdet_shadow_alerts_in_total",  # noqa: E731
                                                   {"status": "firing"})
        assert wait_for(lambda: (firing() or 0) >= 1, timeout=30)
        (alert,) = rt.book.alerts.values()
        assert alert.labels == labels and alert.start == start and alert.end is None
        end = float(int(time.time())) - 1
        post_alerts(am_port, [{"labels": labels, "startsAt": rfc3339(start), "endsAt": rfc3339(end),
                               "generatorURL": "http://127.0.0.1/graph"}])
        resolved = lambda: registry.get_sample_value("streamdet_shadow_alerts_in_total",  # noqa: E731
                                                     {"status": "resolved"})
        assert wait_for(lambda: (resolved() or 0) >= 1, timeout=30)
    finally:
        am.terminate()
        am.wait(10)
        server.stop()
    (alert,) = rt.book.alerts.values()
    assert alert.end == end
    # our breach opened 5 minutes after theirs started: one incident seen by both, lead +300 s
    rt.book.add_event(type_=OPENED, id_="e1", series='waterflow{site="s0"}', metric="waterflow",
                      labels={"site": "s0"}, rule="flow", time=start + 300, started=start, opened_id=None)
    c = rt.book.compare(horizon=end + 60)
    assert (c.total.both, c.total.only_theirs, c.total.only_ours) == (1, 0, 0)
    assert c.total.leads == [300.0] and c.unmatched == []
