"""Sine fits (IEEE Std 1057) against scipy.optimize.least_squares, and the
IEEE Std 1241 figures against closed forms.  The records are invented for the test."""

import math

import numpy as np
import pytest
from scipy import optimize

from livefilt.dsp import sinefit
from livefilt.errors import SettingError

FS = 48000.0


def noisy_sine(n=20000, f=997.3, amp=0.7, phase=0.4, offset=0.05, noise=1e-3, seed=1):
    k = np.arange(n)
    rng = np.random.default_rng(seed)
    return amp * np.cos(2 * np.pi * f * k / FS + phase) + offset + noise * rng.standard_normal(n)


def test_four_parameter_fit_equals_scipy_least_squares():
    x = noisy_sine()
    fit = sinefit.fit4(x, FS, 990.0)
    k = np.arange(x.size)

    def resid(p):
        a, b, c, f = p
        w = 2 * np.pi * f / FS * k
        return a * np.cos(w) + b * np.sin(w) + c - x

    # scipy's trust-region solver on the same model and data, started elsewhere
    ref = optimize.least_squares(resid, [0.5, 0.0, 0.0, 997.0], x_scale=[1, 1, 1, 0.01],
                                 xtol=1e-15, ftol=1e-15, gtol=1e-15).x
    assert fit.frequency_hz == pytest.approx(ref[3], abs=1e-7)
    assert (fit.a, fit.b, fit.offset) == pytest.approx(tuple(ref[:3]), abs=1e-8)
    assert fit.amplitude == pytest.approx(0.7, abs=1e-4)
    assert fit.residual_rms == pytest.approx(1e-3, rel=0.02)


def test_three_parameter_fit_equals_scipy_least_squares():
    x = noisy_sine(f=1234.5)
    fit = sinefit.fit3(x, FS, 1234.5)
    k = np.arange(x.size)
    w = 2 * np.pi * 1234.5 / FS * k
    ref = optimize.least_squares(lambda p: p[0] * np.cos(w) + p[1] * np.sin(w) + p[2] - x,
                                 [0, 0, 0], xtol=1e-15, ftol=1e-15, gtol=1e-15).x
    assert (fit.a, fit.b, fit.offset) == pytest.approx(tuple(ref), abs=1e-9)
    assert fit.phase_rad == pytest.approx(0.4, abs=1e-3)


@pytest.mark.parametrize("bits", [8, 12, 16])
def test_ideally_quantised_full_scale_sine_gives_6_02n_plus_1_76(bits):
    # the textbook result (IEEE Std 1241, quantisation noise q^2/12): SINAD of an
    # ideal N-bit quantiser with a full-scale sine = 6.02 N + 1.76 dB
    q = 2.0 / 2 ** bits
    k = np.arange(2 ** 17)
    x = (1 - q / 2) * np.sin(2 * np.pi * 997.0 / FS * k + 0.3)
    xq = np.clip(np.floor(x / q) + 0.5, -2 ** (bits - 1) + 0.5, 2 ** (bits - 1) - 0.5) * q
    t = sinefit.tone_figures(xq, FS, full_scale=1.0)
    assert t.sinad_db == pytest.approx(6.02 * bits + 1.76, abs=0.1)
    assert sinefit.ideal_sinad_db(bits) == pytest.approx(6.02 * bits + 1.76, abs=0.02)
    assert t.enob_bits == pytest.approx(bits, abs=0.02)
    assert t.fit.frequency_hz == pytest.approx(997.0, abs=1e-6)


def test_enob_formula_of_ieee_1241():
    # ENOB = (SINAD - 1.76) / 6.02 (IEEE Std 1241)
    assert sinefit.enob(74.0) == pytest.approx((74.0 - 1.76) / 6.02)
    assert sinefit.enob(6.02 * 12 + 1.76) == pytest.approx(12.0)


def test_thd_and_sfdr_of_known_harmonics_including_a_folded_one():
    # closed form: harmonics of 1e-3 and 5e-4 of the fundamental's amplitude give
    # THD = 10 log10(1e-6 + 2.5e-7) = -59.03 dB; the largest spur is 60 dB down
    k = np.arange(96000)
    f = 9001.0  # its 3rd harmonic, 27003 Hz, folds to 20997 Hz
    w = 2 * np.pi * f / FS * k
    x = np.sin(w) + 1e-3 * np.sin(2 * w + 1) + 5e-4 * np.sin(3 * w + 2)
    t = sinefit.tone_figures(x, FS)
    hs = {h: (hz, a) for h, hz, a in t.harmonics}
    assert hs[3][0] == pytest.approx(20997.0, abs=1e-3)
    assert hs[2][1] == pytest.approx(1e-3, rel=1e-6) and hs[3][1] == pytest.approx(5e-4, rel=1e-6)
    assert t.thd_db == pytest.approx(10 * math.log10(1e-6 + 2.5e-7), abs=1e-4)
    assert t.sfdr_db == pytest.approx(60.0, abs=0.05)  # the flat-top reads amplitudes within 0.01 dB
    assert t.spur_hz == pytest.approx(18002.0, abs=1.0)


def test_enob_below_full_scale_is_also_referred_to_full_scale():
    q = 2.0 / 2 ** 16
    k = np.arange(2 ** 17)
    a = 10 ** (-6 / 20)
    xq = np.round(a * np.sin(2 * np.pi * 997.0 / FS * k) / q) * q
    t = sinefit.tone_figures(xq, FS)
    assert t.sinad_db == pytest.approx(98.09 - 6.0, abs=0.15)
    assert t.enob_fs_bits == pytest.approx(16.0, abs=0.03)
    assert t.amplitude_fs == pytest.approx(a, abs=1e-5)


def test_bad_input_names_the_field():
    with pytest.raises(SettingError, match=r"^frequency_hz = 30000: must be above 0 and below Nyquist"):
        sinefit.fit3(np.zeros(100), FS, 30000)
    with pytest.raises(SettingError, match=r"^samples = 3: a sine fit needs at least 16 samples"):
        sinefit.fit4(np.zeros(3), FS)
