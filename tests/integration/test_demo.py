"""`streamdet demo` (the README's first command) runs end to end and exits by itself."""

import subprocess
import sys

import pytest

pytestmark = pytest.mark.broker


def test_demo_shows_the_incidents_and_writes_plots(tmp_path):
    out = tmp_path / "demo-out"
    proc = subprocess.run([sys.executable, "-m", "streamdet", "demo", "--out", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    text = proc.stdout
    assert "OPENED  orders_per_minute{shop=\"larkspur-web\"}" in text and " below " in text
    assert "OPENED  checkout_latency_seconds{service=\"checkout\"}" in text
    assert "OPENED  packing_queue_depth{site=\"warehouse-1\"}" in text
    closed = [line for line in text.splitlines() if "CLOSED  packing_queue_depth" in line]
    assert closed and "re-levelled after a lasting shift" in closed[0]  # relearned: stops alerting
    assert "cpu_utilisation" not in text  # healthy hosts stay quiet
    _assert_one_fleet_outlier(text)
    assert len(list(out.glob("*.png"))) == 4
    assert [p.name for p in out.glob("group-*.png")] == ['group-tea-api-fleet_service=_tea-api.png']


def _assert_one_fleet_outlier(text: str) -> None:
    """The tea-api fleet: host 17 falls behind 09:30-12:00 (a quarter of the work); its outlier
    line names it, no other host appears anywhere, and the daemon's peer metrics moved."""
    fleet = [line for line in text.splitlines() if "requests_per_second" in line]
    assert [line.split()[1:3] for line in fleet] == [
        ["OUTLIER", 'requests_per_second{host="tea-api-17",service="tea-api"}'],
        ["BACK", 'requests_per_second{host="tea-api-17",service="tea-api"}']]
    opened = fleet[0]
    assert " below " in opened and 'tea-api-fleet{service="tea-api"} (30 members)' in opened
    # opened within confirm.steps (5) of 09:30, the first step it fell behind
    assert "T09:35:00Z" <= opened.split()[0][10:] <= "T09:55:00Z"
    assert "1 peer outlier(s) opened" in text
    summary = next(line for line in text.splitlines() if line.startswith("peer groups:"))
    judged = int(summary.split()[2].replace(",", ""))
    assert 200 <= judged <= 240  # one group, one step each 5 min of the 20-hour live day
    assert "0 outlier(s) open at the end, 0 group(s) split over partitions" in summary


def test_demo_through_otlp_finds_the_same_incidents(tmp_path):
    out = tmp_path / "demo-otlp"
    proc = subprocess.run([sys.executable, "-m", "streamdet", "demo", "--format", "otlp_proto",
                           "--out", str(out)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    text = proc.stdout
    assert "(otlp_proto)" in text
    assert "OPENED  orders_per_minute{shop=\"larkspur-web\"}" in text
    assert "OPENED  checkout_latency_seconds{service=\"checkout\"}" in text and " s  expected" in text
    assert "OPENED  packing_queue_depth{site=\"warehouse-1\"}" in text
    assert "cpu_utilisation" not in text
    _assert_one_fleet_outlier(text)
    assert len(list(out.glob("*.png"))) == 4
