"""``livefilt survey`` on synthetic ambient recordings with known lines and a
known floor (invented for the test: no real scene was recorded), and its Welch
density against scipy.signal.welch."""

import math
import tomllib

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from livefilt.analysis.survey import run_survey
from livefilt.cli import main

FS = 48000
FLOOR = 2e-6        # FS/rtHz above 9 kHz: the known quiet floor
SPUR_QUIET = 12340.0  # a spur inside the quiet region (a switching supply, say)
LINES = [(50.02, 3e-3), (100.04, 2e-3), (150.06, 6e-4), (250.1, 3e-4), (3330.0, 1e-3),
         (SPUR_QUIET, 2e-4)]


def invented_ambient(path, seconds=10.0, seed=8):
    """White floor FLOOR, plus noise 5x stronger below 8 kHz (order-8 low-pass),
    mains 50.02 Hz with harmonics and flicker, two spurs."""
    rng = np.random.default_rng(seed)
    n = np.arange(int(seconds * FS))
    x = rng.standard_normal(n.size) * FLOOR * math.sqrt(FS / 2)
    sos = signal.butter(8, 8000, fs=FS, output="sos")
    x += signal.sosfilt(sos, rng.standard_normal(n.size)) * 5 * FLOOR * math.sqrt(FS / 2)
    for f, rms in LINES:
        x += rms * math.sqrt(2) * np.sin(2 * np.pi * f * n / FS + f)
    sf.write(path, x, FS, subtype="FLOAT")
    return x


@pytest.fixture(scope="module")
def surveyed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("survey")
    x = invented_ambient(folder / "ambient.wav")
    doc = run_survey(folder / "ambient.wav", folder / "out")
    return folder, x, doc, tomllib.loads((folder / "out" / "survey.toml").read_text())


def test_mains_and_lines_found_and_labelled(surveyed):
    _, _, _, got = surveyed
    assert got["mains_hz"] == 50 and got["mains_found"]
    assert got["mains_measured_hz"] == pytest.approx(50.02, abs=0.03)
    by = {round(ln["hz"]): ln for ln in got["lines"]}
    assert by[50]["kind"] == "mains" and by[100]["label"] == "lamp flicker (2 x mains)"
    assert by[150]["label"].startswith("mains harmonic 3") and by[250]["kind"] == "mains"
    assert by[3330]["label"] == "spur 3.33 kHz" and by[12340]["kind"] == "spur"
    for f, rms in LINES:
        assert by[round(f)]["level"] == pytest.approx(rms, rel=0.05)


def test_candidates_sit_in_the_quiet_floor_clear_of_every_line(surveyed):
    _, _, doc, got = surveyed
    cands = got["candidates"]
    assert len(cands) == 5 and got["recommended_hz"] == cands[0]["hz"]
    enbw = got["detector_enbw_hz"]  # the demo chain's lock-in: 5/(64 tau), REFERENCES row 3a
    assert enbw == pytest.approx(5 / (64 * 0.05))
    for c in cands:
        assert c["hz"] >= 9000 and c["hz"] <= 0.45 * FS
        assert (c["hz"] / 50) % 1 == pytest.approx(0.5)  # midway between mains harmonics
        assert c["floor"] == pytest.approx(FLOOR, rel=0.06)  # the invented quiet floor
        for f, _ in LINES:
            assert abs(c["hz"] - f) >= 10 * enbw
        assert c["why"].startswith(f"{c['hz']:g} Hz: floor ") and "away" in c["why"]
    # the spur in the quiet region is the nearest line of a candidate beside it
    assert any(c["nearest_line_hz"] == pytest.approx(SPUR_QUIET, abs=1) for c in cands) or \
        all(abs(c["hz"] - SPUR_QUIET) > 500 for c in cands)
    assert doc["verdict"][1] == f"recommended modulation: {cands[0]['hz']:g} Hz"


def test_density_is_scipy_welch_of_the_recording(surveyed):
    folder, x, _, got = surveyed
    table = np.loadtxt(folder / "out" / "density.csv", delimiter=",", skiprows=1)
    n = got["noise"]
    f, p = signal.welch(x.astype(np.float32).astype(np.float64), fs=FS, window=n["window"],
                        nperseg=n["segment"], noverlap=n["segment"] // 2, scaling="density")
    np.testing.assert_allclose(table[:, 0], f)
    np.testing.assert_allclose(table[:, 1], np.sqrt(p), rtol=1e-9)
    assert n["enbw_bins"] == pytest.approx(2.004, abs=1e-3)  # Blackman-Harris, Harris 1978


def test_front_end_gain_keeps_candidates_in_its_pass_band(tmp_path):
    invented_ambient(tmp_path / "a.wav", seconds=6.0)

    def gain(f):  # an invented first-order anti-alias corner at 11 kHz
        return 1 / (1 + 1j * np.asarray(f) / 11000.0)

    got = run_survey(tmp_path / "a.wav", tmp_path / "out", frontend_gain=gain)
    assert got["candidates"]
    for c in got["candidates"]:
        assert c["hz"] <= 11000 and c["frontend_gain_db"] >= -3.0
        assert c["referred_floor"] >= c["floor"]


def test_bad_input_is_one_line(tmp_path, capsys):
    assert main(["survey", str(tmp_path / "none.wav")]) == 2
    assert capsys.readouterr().err.strip() == f"livefilt: {tmp_path / 'none.wav'}: no such file or folder"
    sf.write(tmp_path / "short.wav", np.zeros(1000), FS)
    assert main(["survey", str(tmp_path / "short.wav")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "a survey needs at least 4096" in err[0]
    assert main(["survey", str(tmp_path / "short.wav"), "--drift-pct", "-1"]) == 2
    assert "--drift-pct = -1.0: must be from 0 to 10" in capsys.readouterr().err


def test_a_run_folder_is_surveyed_and_the_report_lands_beside_it(tmp_path, capsys):
    # a run of the simulated greenhouse bench (invented scene), recorded by the CLI
    assert main(["run", "--fast", "--duration", "3", "--out", str(tmp_path)]) == 0
    (run,) = [p for p in tmp_path.iterdir() if p.name.startswith("run-")]
    capsys.readouterr()
    assert main(["survey", str(run)]) == 0
    out = tmp_path / f"{run.name}-survey"
    got = tomllib.loads((out / "survey.toml").read_text())
    assert got["channel"] == "photodiode" and got["mains_hz"] == 50
    assert not (run / f"{run.name}-survey").exists()  # nothing written into the run
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith("mains 50 Hz") and lines[1] == f"recommended modulation: {got['recommended_hz']:g} Hz"


def test_a_config_front_end_keeps_candidates_below_its_corner(tmp_path):
    """A ``[frontend]`` table (an invented 15 kOhm / 1 nF low-pass after a DC block):
    fc = 1/(2 pi R C) = 10.61 kHz (the RC law, common practice); every candidate
    stays within 3 dB of the front end's largest gain, so below that corner."""
    from livefilt.config import demo_config, parse_config
    from livefilt.dsp import frontend

    invented_ambient(tmp_path / "a.wav", seconds=6.0)
    doc = demo_config().to_mapping()
    doc["frontend"] = {"stages": [
        {"type": "rc", "name": "DC block", "response": "highpass", "r_ohm": "10k", "c_farad": "100n"},
        {"type": "rc", "name": "amplifier pole", "r_ohm": "15k", "c_farad": "1n"}]}
    settings = parse_config(doc)
    got = run_survey(tmp_path / "a.wav", tmp_path / "out", settings)
    fc = 1 / (2 * math.pi * 15e3 * 1e-9)
    assert got["candidates"]
    for c in got["candidates"]:
        assert c["hz"] <= fc and c["frontend_gain_db"] >= -3.0
        # the floor before the front end: divided by the gain relative to its largest
        assert c["referred_floor"] == pytest.approx(c["floor"] * 10 ** (-c["frontend_gain_db"] / 20))
    g = np.abs(frontend.response(settings.frontend, [c["hz"] for c in got["candidates"]]))
    assert np.all(g >= 0.5 * np.abs(frontend.response(settings.frontend, [2000.0]))[0])
