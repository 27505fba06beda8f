"""`livefilt design` as a user runs it: printed table, design.toml, figures, design.html."""

import math
import subprocess
import sys
import tomllib

import pytest

from livefilt.analysis import design_report
from livefilt.config import demo_config, parse_config

ROOT = __import__("pathlib").Path(__file__).resolve().parents[2]


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "livefilt", "design", *args], capture_output=True,
                          text=True, cwd=cwd or ROOT, timeout=300)


def test_design_command_writes_the_report(tmp_path, artifacts):
    out = tmp_path / "d"
    r = run("--config", "configs/soundcard-bench.toml", "--out", str(out))
    assert r.returncode == 0, r.stderr
    assert "Traceback" not in r.stderr
    assert "chain" in r.stdout and "ENBW" in r.stdout and "parts DC block" in r.stdout
    doc = tomllib.loads((out / "design.toml").read_text())
    part = doc["frontend"]["parts"][0]
    for key in ("stage", "r_ohm", "c_farad", "cutoff_hz", "cutoff_low_hz", "cutoff_high_hz"):
        assert key in part
    # E12 pair for 200 Hz: the RC law gives the cutoff those parts give (common practice)
    assert part["cutoff_hz"] == pytest.approx(1 / (2 * math.pi * part["r_ohm"] * part["c_farad"]))
    assert part["cutoff_low_hz"] < part["cutoff_hz"] < part["cutoff_high_hz"]
    assert doc["frontend"]["alias_attenuation_db"] < 0
    a = doc["chains"]["A"]
    for key in ("gain", "group_delay_s", "enbw_hz", "settling_s", "interferers"):
        assert key in a
    # chain A: lock-in at tau 50 ms, 24 dB/oct: ENBW 5/(64 tau) (REFERENCES 3a)
    assert a["enbw_hz"] == pytest.approx(5 / (64 * 0.05))
    labels = [i["label"] for i in a["interferers"]]
    assert labels[0].startswith("DC") and sum(lab.startswith("mains") for lab in labels) == 9
    assert all("lockin_rejection_db" in i for i in a["interferers"])
    assert all("lockin_rejection_db" not in i for i in doc["chains"]["B"]["interferers"])  # RMS
    for name in ("front_end.png", "response_A.png", "response_B.png", "group_delay.png", "step.png"):
        data = (out / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
        (artifacts / f"design-{name}").write_bytes(data)
    rows = (out / "interferers.csv").read_text().splitlines()
    assert rows[0] == "chain,label,hz,wander_hz,attenuation_db,lockin_rejection_db"
    assert len(rows) == 1 + 2 * 11
    assert (out / "parts.csv").read_text().startswith("stage,r_ohm,c_farad,cutoff_hz")
    page = (out / "design.html").read_text()
    assert page.count("data:image/png;base64,") == 5 and "<img" in page and "http" not in page.split("<body>")[1]
    assert "Cautions" in page and "Interferers, chain A" in page
    (artifacts / "design.html").write_text(page)


def test_demo_prediction_and_warnings(tmp_path):
    d = design_report.design(demo_config(), simulate=False)  # the step is the CLI test's
    doc = design_report.to_document(d)
    # the demo has no anti-alias filter: the report must say the image folds in
    assert any("image" in w for w in d.warnings)
    a = doc["chains"]["A"]
    ds = demo_config().design
    # range at the threshold from the closed form of predict (amplitude ~ d^-k)
    snr1 = 20 * math.log10(ds.signal_at[1] / (ds.noise_density * math.sqrt(a["enbw_hz"])))
    assert a["range_m"] == pytest.approx(10 ** ((snr1 - 10) / 40), rel=1e-9)
    assert a["snr_db_threshold"] == 10
    out = design_report.write_report(d, tmp_path / "demo")
    assert (out / "snr.png").exists()


def test_a_line_folding_into_the_band_is_warned_in_words(tmp_path):
    doc = demo_config().to_mapping()
    # a switching supply at 2 x 48 kHz + 1371 Hz folds to 1371 Hz, 1 Hz from the reference
    doc["design"]["interferers_hz"] = [96000 + 1371]
    d = design_report.design(parse_config(doc), simulate=False)
    im = d.images[0]
    assert im["folds_to_hz"] == pytest.approx(1371.0)
    assert set(im["inside"]) == {"A", "B"}
    assert any("folds to 1.371 kHz, inside the detection band" in w for w in d.warnings)


def test_bad_config_is_one_line(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text((ROOT / "configs" / "greenhouse-demo.toml").read_text().replace(
        'r_ohm = "20k", c_farad = "47p"', 'cutoff_hz = 1000, series = "E5"'))
    r = run("--config", str(p), "--out", str(tmp_path / "x"))
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0
    assert "frontend.stages[0].series = 'E5'" in r.stderr and "E6, E12, E24, E96" in r.stderr


def test_lines_near_or_on_the_reference_are_warned():
    doc = demo_config().to_mapping()
    doc["design"]["interferers_hz"] = [1372.0]  # 2 Hz from the reference
    d = design_report.design(parse_config(doc), simulate=False)
    assert any(w.startswith("chain A: listed line 1.372 kHz is inside the detection band") for w in d.warnings)
    # the serial bench modulates at 500 Hz, the 10th harmonic of 50 Hz mains
    from livefilt.config import load_config
    d = design_report.design(load_config(ROOT / "configs" / "serial-bench.toml"), simulate=False)
    assert any(w.startswith("mains x10 (500 Hz) sits on the reference") for w in d.warnings)
