"""`streamdet shadow report` on files: river's WaterFlow dataset (outside data) replayed for our
breaches, hand-made existing alerts around them; the table's counts and the HTML timeline, the
latter checked in a real headless browser (Debian's chromium) when one is installed."""

from __future__ import annotations

import re
import shutil
import subprocess

import orjson
import pytest

from streamdet.cli import main
from streamdet.config import parse_config
from streamdet.core.engine import Engine
from streamdet.events import rfc3339
from tests.integration.streams import DAEMON_RULES, as_batch, waterflow_points

SERIES = 'waterflow{site="s0"}'


def their(start, end, fp, site="s0"):
    return {"status": "resolved", "labels": {"alertname": "FlowLow", "site": site}, "annotations": {},
            "startsAt": rfc3339(start), "endsAt": rfc3339(end), "fingerprint": fp, "generatorURL": ""}


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    points = waterflow_points(sites=1)
    events = Engine(parse_config(DAEMON_RULES)).ingest(as_batch(points))
    assert len(events) == 8  # four breaches (see tests/integration/test_daemon.py)
    (d / "data.jsonl").write_bytes(b"\n".join(orjson.dumps(p) for p in points) + b"\n")
    (d / "events.jsonl").write_bytes(b"\n".join(e.to_json() for e in events) + b"\n")
    first = events[0]
    payloads = [
        {"version": "4", "status": "resolved", "receiver": "r",
         "alerts": [their(first.time - 600, first.time + 7200, "a1")]},          # both, lead +10 min
        {"version": "4", "status": "resolved", "receiver": "r",
         "alerts": [their(1649000000.0, 1649003600.0, "a2")]},                   # only theirs
        {"version": "4", "status": "resolved", "receiver": "r",
         "alerts": [their(1649000000.0, 1649003600.0, "a3", site="elsewhere")]}, # unmatched
    ]
    (d / "alerts.jsonl").write_bytes(b"\n".join(orjson.dumps(p) for p in payloads) + b"\nnot json\n")
    (d / "cfg.yaml").write_text("rules: [{name: flow, step: auto}]\nshadow: {match: {labels: [site]}}\n")
    return d


def run_report(files, *extra):
    return main(["shadow", "report", "--config", str(files / "cfg.yaml"), "--since", "60d",
                 "--events", str(files / "events.jsonl"), "--alerts", str(files / "alerts.jsonl"),
                 "--data", str(files / "data.jsonl"), *extra])


def test_report_table_counts(files, capsys):
    assert run_report(files) == 0
    out, err = capsys.readouterr()
    row = next(line for line in out.splitlines() if line.startswith("flow "))
    # both, only theirs, only ours (breaches 2-4), median lead +10.0 min
    assert row.split()[1:5] == ["1", "1", "3", "+10.0"]
    assert "1 alert(s) match no known series" in out and "site=elsewhere" in out
    assert "alerts.jsonl:4: not valid JSON" in err


def test_report_refuses_bad_arguments(files, tmp_path, capsys):
    assert main(["shadow", "report", "--since", "soon", "--events", str(files / "events.jsonl")]) == 2
    assert main(["shadow", "report", "--events", str(tmp_path / "missing.jsonl")]) == 2
    cfg = tmp_path / "c.yaml"
    cfg.write_text(f"state: {{dir: {tmp_path}}}\n")
    assert main(["shadow", "report", "--config", str(cfg)]) == 2
    assert "no comparison state" in capsys.readouterr().err


def test_html_is_self_contained_and_has_the_bars(files):
    page = files / "report.html"
    assert run_report(files, "--html", str(page)) == 0
    text = page.read_text()
    assert "<script" not in text.lower() and "http://" not in text.replace('xmlns="http://www.w3.org/2000/svg"', "")
    section = re.search(r'<section id="series-0" data-series="([^"]+)">(.*?)</section>', text, re.S)
    assert section and section.group(1) == SERIES.replace('"', "&quot;")
    assert section.group(2).count('class="bar theirs') == 2
    assert section.group(2).count('class="bar ours') == 4


def test_html_renders_in_headless_chromium(files, tmp_path):
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        pytest.skip("chromium is not installed (apt-get install chromium; .ci/run does)")
    page = files / "report.html"
    assert run_report(files, "--html", str(page)) == 0
    try:
        done = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                               f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", page.as_uri()],
                              capture_output=True, timeout=60, text=True)
    except (OSError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"chromium could not start: {exc}")
    if done.returncode != 0 or "<html" not in done.stdout:
        pytest.skip(f"chromium could not start (exit {done.returncode}): {done.stderr[-300:]}")
    dom = done.stdout
    # The browser parsed the page into a DOM holding the timeline of the known series: two amber
    # bars (one both, one only theirs) and four teal bars (one both, three only ours).
    section = re.search(r'<section id="series-0"[^>]*>(.*?)</section>', dom, re.S).group(1)
    theirs = re.findall(r'<rect class="bar theirs( only)?" data-kind="(\w+)"', section)
    ours = re.findall(r'<rect class="bar ours( only)?" data-kind="(\w+)"', section)
    assert sorted(k for _, k in theirs) == ["both", "only_theirs"]
    assert sorted(k for _, k in ours) == ["both", "only_ours", "only_ours", "only_ours"]
    assert "<polyline" in section and "<script" not in dom
