"""livefilt tune: the grid, the plan, and sweeps on recorded walk-away runs."""

from __future__ import annotations

import pathlib

import pytest

from livefilt.analysis.tune import load_grid, plan_units
from livefilt.config import demo_config
from livefilt.errors import SettingError


def _grid(tmp_path: pathlib.Path, text: str) -> pathlib.Path:
    p = tmp_path / "grid.toml"
    p.write_text(text)
    return p


@pytest.fixture
def base():
    return demo_config().chains[0]


def test_full_product_and_candidates(tmp_path, base):
    g = load_grid(_grid(tmp_path, """
[vary]
"detector.time_constant_s" = [0.03, 0.1, 0.3]
"detector.slope_db_oct" = [12, 24]
[[candidate]]
name = "plain"
stages = []
detector = { type = "lockin", time_constant_s = 0.1 }
"""), base, 48000.0, 2)
    assert len(g.trials) == 3 * 2 + 1
    assert g.trials[0].values == {"detector.time_constant_s": 0.03, "detector.slope_db_oct": 12}
    assert g.trials[0].chain["detector"]["time_constant_s"] == 0.03
    assert g.trials[-1].values == {"candidate": "plain"}
    assert "3 detector.time_constant_s x 2 detector.slope_db_oct x 1 whole candidate" in g.describe()


@pytest.mark.parametrize("text,match", [
    ('[vary]\n"stages.9.q" = [10]\n', r'vary."stages.9.q".*has no stages.9'),
    ('[vary]\n"detector.tau" = [1]\n', r'vary."detector.tau"\[0\].*unknown key'),
    ('[vary]\n"detector.time_constant_s" = [0.1, -1]\n', r'vary."detector.time_constant_s"\[1\] = -1'),
    ('[vary]\n"detector.time_constant_s" = []\n', r"non-empty list"),
    ('[vari]\n', r"unknown table"),
    ('[vary]\n"nothing" = [1]\n', r'vary."nothing"'),
])
def test_bad_grid_is_one_line_naming_the_key(tmp_path, base, text, match):
    with pytest.raises(SettingError, match=match) as e:
        load_grid(_grid(tmp_path, text), base, 48000.0, 2)
    assert "\n" not in str(e.value)


def test_trials_sharing_stages_share_one_replay(tmp_path, base):
    g = load_grid(_grid(tmp_path, """
[vary]
"detector.time_constant_s" = [0.03, 0.1, 0.3]
"detector.slope_db_oct" = [12, 24]
"""), base, 48000.0, 2)
    runs = []
    for name in ("r1", "r2"):
        d = tmp_path / name
        d.mkdir()
        (d / "raw.wav").write_bytes(b"RIFF")
        runs.append(d)
    jobs, keys = plan_units(runs, g.trials, None)
    assert len(jobs) == 2                      # one replay per run: the stages are the same
    assert all(len(j["detectors"]) == 6 for j in jobs)
    assert len(set(keys.values())) == 12


# -- sweeps over a recorded walk-away run ---------------------------------------------------
import math  # noqa: E402

import numpy as np  # noqa: E402
from scipy.special import gamma  # noqa: E402

from livefilt.analysis.tune import sweep  # noqa: E402
from livefilt.config import parse_config  # noqa: E402
from livefilt.stream.engine import Engine  # noqa: E402

FS = 12000
WALK = [0.7, 1.0, 1.4, 2.0, 2.8, 4.0, 5.6, 8.0, 11.0, 16.0]
TAUS = [0.01, 0.03, 0.09]
SLOPES = [12, 24]  # ENBWs 1.6x apart or more (12.5, 7.8, 4.2, 2.6, 1.4, 0.87 Hz); one section (6 dB/oct) passes the 2 f0 ripple, not white noise
GRID = f"""
[vary]
"detector.time_constant_s" = {TAUS}
"detector.slope_db_oct" = {SLOPES}
"""


def _walk_doc(seed=11):
    # invented scene (the simulated greenhouse bench), 24-bit ADC and steady sky so the
    # noise near the reference is white: the assumption of the derivation below
    return {"source": {"driver": "simulated", "rate_hz": FS, "block": 256, "seed": seed,
                       "pace": "fast", "target": "canopy", "sky": "clear", "walk_m": WALK,
                       "hold_s": 3.0, "move_s": 0.5, "adc_bits": 24},
            "reference": {"frequency_hz": 1370.0},
            "chains": [{"name": "A", "input": 0, "stages": [
                {"type": "highpass", "design": "butterworth", "order": 2, "cutoff_hz": 300},
                # the grow lights' 1 kHz PWM lines out, so what reaches the lock-in is white
                {"type": "notch", "at_hz": 1000, "harmonics": 3, "q": 8},
                {"type": "bandpass", "design": "butterworth", "order": 4, "band_hz": [1200, 1550]}],
                "detector": {"type": "lockin", "time_constant_s": 0.03, "slope_db_oct": 24}}],
            "output": {"interval_s": 0.02}}


@pytest.fixture(scope="module")
def walk_run(tmp_path_factory):
    e = Engine(parse_config(_walk_doc()))
    rec = e.start_recording(folder=tmp_path_factory.mktemp("walk") / "run")
    e.run()
    e.stop()
    return rec.folder


@pytest.fixture(scope="module")
def pool_result(walk_run, tmp_path_factory):
    d = tmp_path_factory.mktemp("tune")
    grid = _grid(d, GRID)
    return sweep([walk_run], grid, workers=2, out=d / "out", say=lambda s: None), d


def _enbw(tau, slope):
    n = slope // 6  # REFERENCES row 3a: Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau)
    return gamma(n - 0.5) / (4 * math.sqrt(math.pi) * gamma(n) * tau)


def test_range_follows_enbw_to_the_minus_quarter(pool_result):
    """Derivation (closed forms, white noise near the reference, 1/d^2 target):
    the lock-in's noise is e sqrt(ENBW) (e the one-sided density), the signal
    c d^-2; at the threshold T, c d^-2 = T e sqrt(ENBW), so
    d = (c / (T e))^(1/2) ENBW^(-1/4). Ranking trials by range is ranking them
    by ENBW (smallest first), and range ratios are ENBW ratios to the -1/4."""
    result, _ = pool_result
    ok = [r for r in result["trials"] if r["status"] == "ok"]
    assert len(ok) == len(TAUS) * len(SLOPES)
    enbw = {id(r): _enbw(r["values"]["detector.time_constant_s"], r["values"]["detector.slope_db_oct"])
            for r in ok}
    by_range = sorted(ok, key=lambda r: -r["range_m"])
    assert [enbw[id(r)] for r in by_range] == sorted(enbw.values())
    ref = by_range[0]
    for r in ok:
        predicted = ref["range_m"] * (enbw[id(r)] / enbw[id(ref)]) ** -0.25
        assert r["range_m"] == pytest.approx(predicted, rel=0.08)


def test_lag_budget_changes_the_winner(walk_run, pool_result):
    result, d = pool_result
    free = result["best"]
    assert free["values"]["detector.time_constant_s"] == max(TAUS)
    budget = 0.5 * free["settling_s"]
    tight = sweep([walk_run], d / "grid.toml", workers=1, out=d / "out", max_settling_s=budget,
                  say=lambda s: None)  # the same folder: every replay is already there
    assert tight["best"]["settling_s"] <= budget
    assert tight["best"]["trial"] != free["trial"]
    assert tight["best"]["range_m"] < free["range_m"]
    # the front: sorted by settling, range strictly grows
    fr = tight["front"]
    assert all(a["range_m"] < b["range_m"] and a["settling_s"] <= b["settling_s"]
               for a, b in zip(fr, fr[1:]))


def test_reports_are_written_and_a_second_run_resumes(walk_run, pool_result):
    import tomllib
    result, d = pool_result
    out = d / "out"
    said = []
    again = sweep([walk_run], d / "grid.toml", workers=1, out=out, say=said.append)
    assert "0 replay(s) to do" in said[0]   # every replay is read back from out/units
    assert [r["range_m"] for r in again["trials"]] == [r["range_m"] for r in result["trials"]]
    for name in ("tune.toml", "tune.csv", "tune-front.png", "tune.html"):
        assert (out / name).is_file(), name
    doc = tomllib.loads((out / "tune.toml").read_text())
    assert doc["best"]["range_m"] == pytest.approx(result["best"]["range_m"], rel=1e-12)
    assert set(doc["best"]) >= {"detector.time_constant_s", "detector.slope_db_oct", "range_m"}
    assert len(doc["trials"]) == len(TAUS) * len(SLOPES)


def test_a_failing_run_is_reported_and_never_hangs(walk_run, tmp_path):
    import shutil
    bad = tmp_path / "bad"
    shutil.copytree(walk_run, bad)
    (bad / "raw.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVE")  # a damaged recording
    said = []
    res = sweep([bad], _grid(tmp_path, '[vary]\n"detector.slope_db_oct" = [12, 24]\n'),
                workers=1, say=said.append)
    assert all(r["status"].startswith("failed") for r in res["trials"])
    assert res["best"] is None
    assert any("failed twice" in s for s in said)


def test_dask_cluster_gives_the_same_table(walk_run, pool_result, tmp_path):
    """A real dask.distributed LocalCluster with worker processes: the same jobs
    through the same function, so the same numbers."""
    from tests.system import need_module
    need_module("distributed", "pip install 'livefilt[cluster]'")
    from distributed import LocalCluster
    result, d = pool_result
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc:
        res = sweep([walk_run], d / "grid.toml", cluster=lc.scheduler_address, say=lambda s: None)
    a = [(r["trial"], r["range_m"], r["range_low_m"], r["range_high_m"], r["exponent"]) for r in result["trials"]]
    b = [(r["trial"], r["range_m"], r["range_low_m"], r["range_high_m"], r["exponent"]) for r in res["trials"]]
    assert [x[0] for x in a] == [x[0] for x in b]
    np.testing.assert_allclose(np.array(b)[:, 1:], np.array(a)[:, 1:], rtol=1e-9)
    assert res["best"]["trial"] == result["best"]["trial"]
