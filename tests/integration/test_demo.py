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
    assert len(list(out.glob("*.png"))) == 3


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
    assert len(list(out.glob("*.png"))) == 3
