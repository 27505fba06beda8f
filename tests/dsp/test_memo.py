"""The design cache: what comes back from disk is bit for bit what was designed,
and a bad entry or an unwritable folder only costs a new design."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy import signal

from livefilt.config import demo_config
from livefilt.dsp import memo
from livefilt.dsp.design import StageSpec, _design_stage, chain_sos, stage_sos
from livefilt.dsp.sections import steady_state


@pytest.fixture
def folder(tmp_path, monkeypatch):
    monkeypatch.setenv("LIVEFILT_CACHE_DIR", str(tmp_path))
    monkeypatch.setattr(memo, "_MEMORY", {})
    return tmp_path


def _spec(**kw):
    table = {"type": "lowpass", "design": "butterworth", "order": 4, "cutoff_hz": 1234.5}
    table.update(kw)
    return StageSpec.from_mapping(table, 48000.0)


def test_sections_from_disk_are_bit_identical(folder):
    spec = _spec()
    first = stage_sos(spec, 48000.0)
    files = list((folder / "sections").glob("*.npy"))
    assert len(files) == 1
    memo._MEMORY.clear()  # a new run: only the disk is left
    again = stage_sos(spec, 48000.0)
    assert again.tobytes() == first.tobytes() == _design_stage(spec, 48000.0).tobytes()
    again[0, 0] = 99.0  # callers get their own copy
    assert stage_sos(spec, 48000.0)[0, 0] != 99.0


def test_each_input_has_its_own_entry(folder):
    a = stage_sos(_spec(), 48000.0)
    b = stage_sos(_spec(cutoff_hz=1234.6), 48000.0)
    c = stage_sos(_spec(), 96000.0)
    assert not np.array_equal(a, b) and not np.array_equal(a, c)
    assert len(list((folder / "sections").glob("*.npy"))) == 3


def test_a_damaged_entry_is_designed_again(folder):
    spec = _spec()
    want = stage_sos(spec, 48000.0)
    (path,) = (folder / "sections").glob("*.npy")
    path.write_bytes(b"\x93NUMPY cut short")
    memo._MEMORY.clear()
    assert stage_sos(spec, 48000.0).tobytes() == want.tobytes()


def test_an_unwritable_folder_only_designs_each_time(tmp_path, monkeypatch):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    monkeypatch.setenv("LIVEFILT_CACHE_DIR", str(blocker / "cache"))
    monkeypatch.setattr(memo, "_MEMORY", {})
    assert stage_sos(_spec(), 48000.0).tobytes() == _design_stage(_spec(), 48000.0).tobytes()


def test_empty_folder_setting_keeps_nothing_on_disk(monkeypatch):
    monkeypatch.setenv("LIVEFILT_CACHE_DIR", "")
    assert memo.cache_folder() is None
    assert stage_sos(_spec(), 48000.0).shape == (2, 6)


def test_steady_state_equals_sosfilt_zi():
    """Reference library: scipy.signal.sosfilt_zi solves the same rest state
    numerically; the closed form agrees to its conditioning (1e-11 for poles
    close to DC at 192 kHz), and holds a constant input at least as steadily."""
    cases = [signal.butter(6, [100, 2000], "bandpass", fs=48000, output="sos"),
             signal.ellip(5, 1, 60, 3000, fs=48000, output="sos"),
             signal.cheby2(4, 40, 50, "highpass", fs=192000, output="sos")]
    cases += [chain_sos(c.stages, 192000.0) for c in demo_config().chains]
    for sos in cases:
        want, got = signal.sosfilt_zi(sos), steady_state(sos)
        assert np.max(np.abs(got - want)) <= 1e-10 * max(1.0, np.max(np.abs(want)))
        ours = np.ptp(signal.sosfilt(sos, np.ones(256), zi=got)[0])
        theirs = np.ptp(signal.sosfilt(sos, np.ones(256), zi=want)[0])
        assert ours <= max(theirs, 1e-14)


def test_steady_state_holds_a_constant_input():
    """Closed form: from the rest state a constant input gives the DC gain at once."""
    sos = signal.butter(4, 300, fs=48000, output="sos")
    y, _ = signal.sosfilt(sos, np.full(64, 2.5), zi=steady_state(sos) * 2.5)
    assert np.allclose(y, 2.5, rtol=0, atol=1e-12)


def test_live_start_does_not_import_scipy_signal(tmp_path):
    """With a warm cache the engine builds and runs its first block without
    scipy.signal, scipy.special or scipy.optimize (their imports take about
    1.2 s here, more than the whole start-up target)."""
    env = dict(os.environ, LIVEFILT_CACHE_DIR=str(tmp_path))
    code = ("import sys, json; from livefilt.config import parse_config; "
            "from livefilt.stream.engine import Engine; "
            "e = Engine(parse_config(json.loads(sys.argv[1]))); e.run(e.block / e.rate_hz); "
            "print(json.dumps(sorted(m for m in ('scipy.signal', 'scipy.special', 'scipy.optimize') "
            "if m in sys.modules)))")
    doc = json.dumps(demo_config().to_mapping())
    cold = subprocess.run([sys.executable, "-c", code, doc], env=env, check=True,
                          capture_output=True, text=True)
    warm = subprocess.run([sys.executable, "-c", code, doc], env=env, check=True,
                          capture_output=True, text=True)
    assert json.loads(cold.stdout.splitlines()[-1])  # the first run designs
    assert json.loads(warm.stdout.splitlines()[-1]) == []
