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
