"""The range report against outside facts: the Rice distribution's mean, the
closed-form ENBW and settling of n RC sections, and the walk-away scene's own
true range (its physical parameters, not the report's code).

Every run here is real: the simulated bench through the engine into a run
folder on disk, then the report reads that folder.
"""

from __future__ import annotations

import math
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

from livefilt.analysis.range_report import (analyse, effective_samples,
                                            row_correlation, segment_amplitudes)
from livefilt.cli import main as cli_main
from livefilt.config import parse_config
from livefilt.drivers.simulated import Scene
from livefilt.stream.engine import Engine

ROOT = Path(__file__).resolve().parents[2]
FS = 12000  # a lower rate keeps these runs short; the LED at 1370 Hz is far below Nyquist
CANOPY_WALK = [0.7, 1.0, 1.4, 2.0, 2.8, 4.0, 5.6, 8.0, 11.0]
LEAF_WALK = [0.3, 0.42, 0.6, 0.85, 1.2, 1.7, 2.4]


def _doc(seed, target, walk, hold=2.0, move=0.5, fs=FS, tau=0.05, slope=24):
    return {"source": {"driver": "simulated", "rate_hz": fs, "block": 256, "seed": seed,
                       "pace": "fast", "target": target, "sky": "clear", "walk_m": walk,
                       "hold_s": hold, "move_s": move, "adc_bits": 24},
            "reference": {"frequency_hz": 1370.0},
            "chains": [{"name": "A", "input": 0, "stages": [
                {"type": "highpass", "design": "butterworth", "order": 2, "cutoff_hz": 300},
                {"type": "bandpass", "design": "butterworth", "order": 4, "band_hz": [1200, 1550]}],
                "detector": {"type": "lockin", "time_constant_s": tau, "slope_db_oct": slope}}],
            "output": {"interval_s": 0.05}}


def _record(folder: Path, doc: dict, duration=None) -> Path:
    e = Engine(parse_config(doc))
    rec = e.start_recording(folder=folder)
    e.run(duration)
    e.stop()
    return rec.folder


def _truth(doc: dict, enbw_hz: float, snr_db: float = 10.0) -> float:
    """The scene's true range from its own parameters: signal rms over density x
    sqrt(ENBW) (Scene.true_range_m), 24-bit ADC so quantisation is negligible."""
    s = doc["source"]
    sc = Scene(s["rate_hz"], 1370.0, 50.0, s["target"], None, s["seed"])
    sc.adc_bits = s["adc_bits"]
    return sc.true_range_m(snr_db, enbw_hz)


# -- statistics against published and closed-form results ---------------------------------
def test_vector_mean_is_unbiased_where_the_mean_of_magnitudes_follows_rice():
    """Mean of |I + jQ| with Gaussian noise sigma per component is the Rice mean
    (S. O. Rice, Bell Syst. Tech. J. 23, 1944; scipy.stats.rice with b = A/sigma,
    scale = sigma); the vector mean tends to A itself."""
    rng = np.random.default_rng(3)
    sigma, n = 1.0, 400_000
    for amp in (0.0, 0.5, 1.0, 2.0, 5.0):
        i = amp + sigma * rng.standard_normal(n)
        q = sigma * rng.standard_normal(n)
        vec, scal = segment_amplitudes(i, q)
        rice = stats.rice.mean(amp / sigma, scale=sigma)
        assert scal == pytest.approx(rice, abs=4 * sigma / math.sqrt(n) + 1e-3)
        assert abs(vec - amp) < 5 * sigma / math.sqrt(n)
        if amp <= 1.0:
            assert scal - amp > 0.3  # the bias the report avoids


@pytest.mark.parametrize("n", [1, 2, 3, 4])
def test_row_correlation_integrates_to_the_closed_form_enbw(n):
    """Two-sided integral of the normalised autocorrelation = 1 / (2 ENBW) for n
    identical RC sections, ENBW = Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau)
    (REFERENCES row 3a: Meade 1983, from memory; closed form by integration)."""
    tau = 0.07
    enbw = math.gamma(n - 0.5) / (4 * math.sqrt(math.pi) * math.gamma(n) * tau)
    area, _ = integrate.quad(lambda s: row_correlation(np.array([s]), tau, n)[0], 0, 80 * tau)
    assert 2 * area == pytest.approx(1 / (2 * enbw), rel=1e-6)
    assert row_correlation(np.array([0.0]), tau, n)[0] == pytest.approx(1.0)


def test_independent_samples_tend_to_twice_enbw_times_duration():
    """For rows much denser than the correlation time, var(mean) = sigma^2 / (2 B T)
    (B the one-sided ENBW, REFERENCES row 3a; common practice)."""
    tau, n, dt, rows = 0.05, 4, 0.002, 20000
    enbw = 5 / (64 * tau)
    n_mean, _ = effective_samples(rows, dt, tau, n)
    assert n_mean == pytest.approx(2 * enbw * rows * dt, rel=0.01)
    # white rows (correlation negligible at the row spacing): every row counts
    n_mean, dof = effective_samples(50, 100 * tau, tau, n)
    assert n_mean == pytest.approx(50, rel=1e-6) and dof == pytest.approx(49, rel=1e-6)


# -- the walk-away scene: the report finds the scene's own numbers --------------------------
@pytest.mark.parametrize("target, walk, k_true", [("canopy", CANOPY_WALK, 2.0), ("leaf", LEAF_WALK, 4.0)])
def test_exponent_and_range_match_the_scene(tmp_path, target, walk, k_true):
    """k within 0.1 of the scene's law (1/d^2 beam-filling, 1/d^4 small target:
    REFERENCES row 9, common practice); range within 8 % of the true limit."""
    for seed in (0, 1):
        doc = _doc(seed, target, walk, hold=5.0)
        folder = _record(tmp_path / f"{target}-{seed}", doc)
        _, rep = analyse([folder], 10.0)
        r = rep["chains"]["A"]
        assert abs(r["exponent"] - k_true) < 0.1
        truth = _truth(doc, r["enbw_hz"])
        assert r["range_m"] == pytest.approx(truth, rel=0.08)
        assert r["range_low_m"] < r["range_m"] < r["range_high_m"]
        # the settling margin: filters + detector to 99 %, 10.045 tau for 4 sections (row 3c)
        assert r["settling_margin_s"] - r["filter_settling_s"] == pytest.approx(10.045 * 0.05, abs=1e-3)


@pytest.mark.slow
@pytest.mark.parametrize("target, walk", [("canopy", CANOPY_WALK), ("leaf", LEAF_WALK)])
def test_interval_holds_the_truth_in_18_of_20_seeds(tmp_path, target, walk):
    """A 95 % interval should hold the scene's true range in about 19 of 20
    independent runs; at least 18 is required (binomial, common practice)."""
    hits = 0
    for seed in range(20):
        doc = _doc(seed, target, walk)
        folder = _record(tmp_path / f"s{seed}", doc)
        _, rep = analyse([folder], 10.0)
        r = rep["chains"]["A"]
        truth = _truth(doc, r["enbw_hz"])
        hits += r["range_low_m"] <= truth <= r["range_high_m"]
    assert hits >= 18


def test_advisor_follows_enbw_scaling(tmp_path):
    """Asking for D = 1.5 R: the time constant scales as (D/R)^(2k), since the
    noise falls as sqrt(ENBW) and ENBW is proportional to 1/tau (REFERENCES row 3a)."""
    doc = _doc(4, "canopy", CANOPY_WALK[:7])
    folder = _record(tmp_path / "run", doc)
    _, rep = analyse([folder], 10.0)
    r = rep["chains"]["A"]
    want = 1.5 * r["range_m"]
    _, rep2 = analyse([folder], 10.0, want)
    adv = rep2["chains"]["A"]["advisor"]
    assert adv["slope_db_oct"] == 24
    assert adv["time_constant_s"] == pytest.approx(0.05 * 1.5 ** (2 * r["exponent"]), rel=1e-6)
    assert adv["settling_s"] == pytest.approx(r["filter_settling_s"] + 10.045 * adv["time_constant_s"],
                                              rel=1e-3)
    by_slope = {o["slope_db_oct"]: o for o in adv["alternatives"]}
    # same ENBW at every slope: 1/(4 tau1) = 5/(64 tau4)
    assert by_slope[6]["time_constant_s"] * 4 * adv["needed_enbw_hz"] == pytest.approx(1, rel=1e-9)


# -- the command as a newcomer uses it --------------------------------------------------
def test_walk_away_run_then_range_report_from_the_command_line(tmp_path):
    runs = tmp_path / "runs"
    cmd = [sys.executable, "-m", "livefilt"]
    p = subprocess.run(cmd + ["run", "--config", str(ROOT / "configs/walk-away.toml"), "--fast",
                              "--duration", "16", "--out", str(runs)],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    (run,) = list(runs.iterdir())
    meta = tomllib.loads((run / "run.toml").read_text())
    assert [m.get("distance_m") for m in meta["markers"] if "distance_m" in m][:3] == [0.5, 0.7, 1.0]
    assert all("simulat" in m["note"] for m in meta["markers"])
    out = tmp_path / "report"
    p = subprocess.run(cmd + ["range", str(run), "--want-m", "3", "--out", str(out)],
                       capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    assert "Traceback" not in p.stderr and "exponent" in p.stdout and "A " in p.stdout
    doc = tomllib.loads((out / "range.toml").read_text())
    for name in ("A", "B"):
        c = doc["chains"][name]
        for key in ("exponent", "exponent_err", "range_m", "range_low_m", "range_high_m",
                    "measured_range_m", "snr_db_threshold", "settings", "advisor"):
            assert key in c, (name, key)
    page = (out / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 2 and "src=\"http" not in page
    header = (out / "points.csv").read_text().splitlines()[0]
    assert header.startswith("run,chain,distance_m,note")
    for png in ("amplitude.png", "snr.png"):
        assert (out / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_runs_of_different_settings_are_rows_and_different_rates_one_line(tmp_path, capsys):
    a = _record(tmp_path / "a", _doc(1, "canopy", CANOPY_WALK[:4]))
    b = _record(tmp_path / "b", _doc(2, "canopy", CANOPY_WALK[:4], tau=0.1, slope=12))
    c = _record(tmp_path / "c", _doc(3, "canopy", CANOPY_WALK[:4]))
    _, rep = analyse([a, b, c], 10.0)
    assert set(rep["chains"]) == {"A", "A (b)"}
    assert len(rep["chains"]["A"]["runs"]) == 2  # a and c share settings: merged
    d = _record(tmp_path / "d", _doc(1, "canopy", CANOPY_WALK[:2], fs=16000), duration=3)
    assert cli_main(["range", str(a), str(d), "--out", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "16000 Hz" in err[0] and "12000 Hz" in err[0]


def test_bad_inputs_are_one_line(tmp_path, capsys):
    doc = _doc(1, "canopy", CANOPY_WALK[:2])
    del doc["source"]["walk_m"]
    doc["source"]["distance_m"] = 1.0
    bare = _record(tmp_path / "bare", doc, duration=2)
    assert cli_main(["range", str(bare)]) == 2
    assert "no distance markers" in capsys.readouterr().err
    assert cli_main(["range", str(tmp_path / "nothing")]) == 2
    err = capsys.readouterr().err
    assert "not a run folder" in err and len(err.strip().splitlines()) == 1


def test_tone_settling_is_kept_per_sections_and_tone():
    # the live range view asks twice a second: the answer is kept, and a strided view of
    # the same sections is the same question. Reference, closed form: a first-order
    # low-pass (time constant tau) driven by cos(w t) from rest gives the steady tone
    # minus Re(H) exp(-t / tau), |Re(H)| = |H| cos(atan(w tau)), so it is within 1 % of
    # |H| after tau ln(100 cos(atan(w tau))); within 1 ms (the digital pole of the
    # bilinear design sits slightly off exp(-1 / (fs tau)))
    from scipy import signal

    from livefilt.analysis import range_report as rr
    fs, tau = 8000.0, 0.01
    sos = signal.butter(1, 1 / (2 * np.pi * tau), fs=fs, output="sos")
    first = rr.tone_settling_s(sos, fs, 50.0)
    hits = rr._tone_settling.cache_info().hits
    wide = np.zeros((1, 12))
    wide[:, ::2] = sos
    assert rr.tone_settling_s(wide[:, ::2], fs, 50.0) == first
    assert rr._tone_settling.cache_info().hits == hits + 1
    assert rr.tone_settling_s(sos, fs, 60.0) != first  # another tone: computed anew
    assert first == pytest.approx(tau * math.log(100 * math.cos(math.atan(2 * math.pi * 50 * tau))), abs=1e-3)
