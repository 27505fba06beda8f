"""`livefilt speed --quick --json F` runs and writes every measure with a number.

Timings are not asserted here (the benchmark itself reports pass/fail); the
exactness rows are, since they compare against scipy.signal.sosfilt and the
straightforward lock-in path (reference library and our own exact path).
"""

import json
import math
import subprocess
import sys


def test_speed_quick_writes_every_measure(tmp_path):
    out = tmp_path / "speed.json"
    proc = subprocess.run([sys.executable, "-m", "livefilt", "speed", "--quick", "--json", str(out)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    doc = json.loads(out.read_text())
    rows = doc["measures"]
    assert doc["quick"] is True and isinstance(doc["all_met"], bool)
    names = " | ".join(r["measure"] for r in rows)
    for part in ("start-up", "64-sample blocks", "256-sample blocks", "1024-sample blocks",
                 "4096-sample blocks", "at 48 kHz", "at 192 kHz", "real-time factor",
                 "allocations", "resident memory", "--quick: 60 s", "compiled vs straightforward"):
        assert part in names, part
    for r in rows:
        assert isinstance(r["value"], float) and math.isfinite(r["value"]), r
        assert r["pass"] in (True, False, None) and r["measure"] in proc.stdout
    for r in rows:
        if "relative difference" in r["measure"]:
            assert r["pass"] is True, r
