"""SosFilter: block processing, state handling and retuning.

Reference library: scipy.signal (sosfilt on the whole array, sosfilt_zi).
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import signal

from livefilt.dsp.design import StageSpec, chain_sos
from livefilt.errors import SettingError
from livefilt.dsp.sections import SosFilter

FS = 48000.0

# --------------------------------------------------------------------------- strategies


@st.composite
def stage_tables(draw):
    kind = draw(st.sampled_from(["lowpass", "highpass", "bandpass", "bandstop", "notch", "rc"]))
    if kind == "notch":
        return {"type": kind, "at_hz": draw(st.floats(20.0, 2000.0)),
                "harmonics": draw(st.integers(1, 4)), "q": draw(st.floats(1.0, 60.0))}
    if kind == "rc":
        return {"type": kind, "r_ohm": draw(st.floats(100.0, 1e5)),
                "c_farad": draw(st.floats(1e-9, 1e-6)), "sections": draw(st.integers(1, 4)),
                "buffered": draw(st.booleans()),
                "response": draw(st.sampled_from(["lowpass", "highpass"]))}
    table = {"type": kind,
             "design": draw(st.sampled_from(["butterworth", "bessel", "chebyshev1",
                                             "chebyshev2", "elliptic"])),
             "order": draw(st.integers(1, 8))}
    if kind in ("lowpass", "highpass"):
        table["cutoff_hz"] = draw(st.floats(50.0, 20000.0))
    else:
        lo = draw(st.floats(50.0, 15000.0))
        table["band_hz"] = [lo, lo * draw(st.floats(1.1, 1.5))]
    return table


@st.composite
def splits(draw, n):
    cuts = draw(st.lists(st.integers(0, n), max_size=8))
    return sorted(cuts)


# --------------------------------------------------------------------------- block-split equality


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tables=st.lists(stage_tables(), min_size=1, max_size=3), data=st.data(),
       seed=st.integers(0, 2**32 - 1))
def test_blocks_equal_whole_array(tables, data, seed):
    # source: scipy.signal.sosfilt on the whole array (reference library)
    try:
        sos = chain_sos([StageSpec.from_mapping(t, FS) for t in tables], FS)
    except SettingError:
        assume(False)
    x = np.random.default_rng(seed).standard_normal(1500)
    cuts = data.draw(splits(x.size))
    f = SosFilter(sos)
    got = np.concatenate([f.process(block) for block in np.split(x, cuts)])
    want = signal.sosfilt(sos, x)
    scale = np.max(np.abs(want))
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * scale)


def test_out_argument_and_empty_block():
    sos = signal.butter(4, 0.1, output="sos")
    x = np.random.default_rng(1).standard_normal(300)
    f = SosFilter(sos)
    out = np.full(400, np.nan)
    y0 = f.process(x[:0], out=out)
    y1 = f.process(x[:100], out=out)
    first = y1.copy()
    y2 = f.process(x[100:], out=out)
    assert y0.shape == (0,) and f.process(np.empty(0)).shape == (0,)
    assert np.shares_memory(y2, out)
    # source: scipy.signal.sosfilt (reference library)
    want = signal.sosfilt(sos, x)
    np.testing.assert_allclose(np.concatenate([first, y2]), want, rtol=1e-12, atol=1e-15)


def test_state_arrays_are_kept_in_place():
    f = SosFilter(signal.butter(4, 0.1, output="sos"))
    zi, sos = f.zi, f.sos
    assert zi.shape == (2, 2) and zi.dtype == np.float64 and zi.flags.c_contiguous
    assert sos.flags.c_contiguous and sos.dtype == np.float64 and f.sections == 2
    f.process(np.ones(50))
    f.settle(0.3)
    f.reset()
    f.retune(signal.butter(4, 0.2, output="sos"))
    assert f.zi is zi and f.sos is sos
    f.retune(signal.butter(6, 0.2, output="sos"))  # more sections: new arrays
    assert f.sections == 3 and f.zi.shape == (3, 2)


def test_reset_zeroes_state():
    f = SosFilter(signal.butter(2, 0.1, output="sos"))
    f.process(np.ones(20))
    f.reset()
    assert not f.zi.any()


def test_settle_gives_steady_state():
    # REFERENCES 10b: scipy docs and tests (confirmed): butter(6, 0.2) with
    # sosfilt_zi, 40 ones give output 1 and zf == zi within 1e-13.
    sos = signal.butter(6, 0.2, output="sos")
    f = SosFilter(sos)
    f.settle(1.0)
    zi = f.zi.copy()
    y = f.process(np.ones(40))
    np.testing.assert_allclose(y, 1.0, rtol=1e-13)
    np.testing.assert_allclose(f.zi, zi, rtol=1e-13)


def test_step_response_settles_at_dc_gain_and_leaves_state():
    # scipy.signal convention: a step settles at the DC gain (here 1)
    f = SosFilter(signal.butter(4, 0.05, output="sos"))
    f.process(np.ones(10))
    before = f.zi.copy()
    step = f.step_response(2000)
    assert step.shape == (2000,)
    assert step[-1] == pytest.approx(1.0, abs=1e-9)
    np.testing.assert_array_equal(f.zi, before)


@pytest.mark.parametrize("old_hz, new_hz", [(3000, 1500), (1500, 3000), (5000, 300), (300, 5000)])
def test_retune_transient_within_step_overshoot(old_hz, new_hz):
    # Acceptance check of the brief: after a 1 kHz tone through a low-pass and
    # a cutoff change, the peak stays within the new filter's own step
    # response overshoot of the input level (amplitude 1).
    t = np.arange(4800) / FS
    x = np.sin(2 * np.pi * 1000 * t)
    cut = 2407  # mid-cycle, input far from zero

    def lowpass(fc):
        return chain_sos([StageSpec.from_mapping(
            {"type": "lowpass", "order": 4, "cutoff_hz": fc}, FS)], FS)

    f = SosFilter(lowpass(old_hz))
    f.process(x[:cut])
    new = lowpass(new_hz)
    keep_state = SosFilter(new)
    keep_state.zi[...] = f.zi  # what a naive swap would do
    f.retune(new)
    y = f.process(x[cut:])
    overshoot_peak = np.max(np.abs(f.step_response(4000)))
    assert np.max(np.abs(y)) <= overshoot_peak + 1e-9
    if (old_hz, new_hz) == (5000, 300):  # the naive swap is far worse here
        assert np.max(np.abs(keep_state.process(x[cut:]))) > 10


def test_rejects_bad_shapes():
    with pytest.raises(ValueError, match="shape"):
        SosFilter(np.zeros((2, 5)))
    with pytest.raises(ValueError, match="a0 = 1"):
        SosFilter([[1, 0, 0, 2, 0, 0]])
    f = SosFilter([[1, 0, 0, 1, 0, 0]])
    with pytest.raises(ValueError, match="1-D"):
        f.process(np.zeros((3, 2)))
    with pytest.raises(ValueError, match="out must"):
        f.process(np.zeros(4), out=np.zeros(2))
