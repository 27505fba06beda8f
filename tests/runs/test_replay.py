"""Replaying a run folder: same numbers, its markers carried, its origin recorded."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np

from livefilt.runs.record import read_run

ROOT = Path(__file__).resolve().parents[2]
CMD = [sys.executable, "-m", "livefilt"]


def _run(*args):
    p = subprocess.run(CMD + list(args), capture_output=True, text=True, timeout=120,
                       stdin=subprocess.DEVNULL)
    assert "Traceback" not in p.stderr, p.stderr
    return p


def test_replay_with_its_own_settings_reproduces_results_and_carries_markers(tmp_path):
    p = _run("run", "--config", str(ROOT / "configs/walk-away.toml"), "--fast", "--duration", "11",
             "--out", str(tmp_path / "orig"))
    assert p.returncode == 0, p.stderr
    (orig,) = (tmp_path / "orig").iterdir()
    p = _run("run", "--input", str(orig), "--fast", "--out", str(tmp_path / "again"))
    assert p.returncode == 0, p.stderr
    (again,) = (tmp_path / "again").iterdir()
    a, b = read_run(orig, raw=False), read_run(again, raw=False)
    for chain in ("A", "B"):
        x, y = a.chain_rows(chain), b.chain_rows(chain)
        assert np.array_equal(x["sample_index"], y["sample_index"]) and len(x["sample_index"]) == 220
        for col in ("amplitude", "in_phase", "quadrature", "noise", "snr_db", "phase_deg"):
            fin = np.isfinite(x[col])
            assert np.array_equal(fin, np.isfinite(y[col]))
            np.testing.assert_allclose(y[col][fin], x[col][fin], rtol=1e-9, atol=0)
    strip = lambda ms: [(m["time_s"], m.get("distance_m"), m.get("note")) for m in ms]
    assert strip(b.markers) == strip(a.markers) and len(a.markers) == 5
    info = b.meta["source_info"]
    assert info["driver"] == "file" and info["replay_of"] == str(orig.resolve())
    assert info["replay_of_started_utc"] == a.meta["run"]["started_utc"]
    assert b.config["chains"] == a.config["chains"]  # its own settings, not the demo's


def test_replay_with_a_marks_schedule_replaces_the_markers(tmp_path):
    p = _run("run", "--duration", "4", "--fast", "--out", str(tmp_path / "orig"))
    (orig,) = (tmp_path / "orig").iterdir()
    marks = tmp_path / "stage.csv"
    marks.write_text("time_s,distance_m,note\n0.5,0.40,stage home\n2.0,,\n2.5,0.8,stage out\n")
    p = _run("run", "--input", str(orig), "--fast", "--marks", str(marks), "--out", str(tmp_path / "m"))
    assert p.returncode == 0, p.stderr
    (m,) = (tmp_path / "m").iterdir()
    got = [(x["time_s"], x.get("distance_m"), x.get("note")) for x in read_run(m, raw=False).markers]
    assert got == [(0.5, 0.4, "stage home"), (2.0, None, "moving"), (2.5, 0.8, "stage out")]
    marks.write_text("time_s,distance_m\n1,0.4\n9,0.8\n")
    p = _run("run", "--input", str(orig), "--fast", "--marks", str(marks))
    assert p.returncode == 2
    assert p.stderr.strip() == f"livefilt: {marks} row 3: time_s = 9 is outside the run (its data ends at 4 s)"
