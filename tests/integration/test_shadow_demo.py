"""`streamdet demo --shadow` runs end to end: warm start, the live day in shadow mode, the report."""

import subprocess
import sys

import orjson
import pytest

pytestmark = pytest.mark.broker


def test_shadow_demo_compares_and_writes_the_page(tmp_path):
    out = tmp_path / "demo-out"
    proc = subprocess.run([sys.executable, "-m", "streamdet", "demo", "--shadow", "--out", str(out)],
                          capture_output=True, text=True, timeout=150)
    assert proc.returncode == 0, proc.stderr[-2000:]
    rows = {line.split()[0]: line.split()[1:4] for line in proc.stdout.splitlines()
            if line.startswith(("orders_per_minute", "cpu_utilisation", "packing_queue_depth"))}
    assert rows['orders_per_minute{shop="larkspur-web"}'] == ["1", "0", "0"]    # both
    assert rows['cpu_utilisation{host="web-2"}'] == ["0", "1", "0"]             # only theirs
    assert rows['packing_queue_depth{site="warehouse-1"}'] == ["0", "0", "1"]   # only ours
    (events,) = out.glob("shadow-events-*.jsonl")
    docs = [orjson.loads(x) for x in events.read_bytes().splitlines()]
    assert docs and all(d["shadow"] is True for d in docs)
    assert "<svg" in (out / "shadow-report.html").read_text()
