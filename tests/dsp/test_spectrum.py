"""Welch densities and line finding, against scipy.signal.welch, Harris 1978 and
closed forms.  Every record here is invented for the test (synthetic ambient
scenes with known lines and a known floor)."""

import math

import numpy as np
import pytest
from scipy import signal

from livefilt.dsp import spectrum
from livefilt.errors import SettingError

FS = 48000.0


def ambient(seconds=8.0, mains=50.0, floor=2e-6, seed=3, extra=()):
    """An invented ambient scene: white floor of ``floor`` FS/rtHz, mains and
    odd harmonics, lamp flicker at 2x mains, and ``extra`` (hz, rms) spurs."""
    n = np.arange(int(seconds * FS))
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n.size) * floor * math.sqrt(FS / 2)
    tones = [(mains, 1e-3), (3 * mains, 3e-4), (5 * mains, 1e-4), (2 * mains, 5e-4)] + list(extra)
    for f, rms in tones:
        x += rms * math.sqrt(2) * np.sin(2 * np.pi * f * n / FS + f)
    return x, tones


@pytest.mark.parametrize("window", ["hann", "blackmanharris", "flattop"])
def test_density_is_the_root_of_scipy_welch(window):
    # scipy.signal.welch is the reference library (density scaling, 50 % overlap)
    x = np.random.default_rng(1).standard_normal(30000)
    d = spectrum.welch_density(x, FS, window=window, segment=4096)
    f, p = signal.welch(x, fs=FS, window=window, nperseg=4096, noverlap=2048, scaling="density")
    np.testing.assert_allclose(d.freqs_hz, f)
    np.testing.assert_allclose(d.density, np.sqrt(p), rtol=1e-12)
    assert d.averages == 1 + (30000 - 4096) // 2048


@pytest.mark.parametrize("window, enbw", [("boxcar", 1.000), ("hann", 1.50), ("hamming", 1.363),
                                          ("blackmanharris", 2.004), ("flattop", 3.770)])
def test_window_enbw_matches_harris_1978(window, enbw):
    # Harris, Proc. IEEE 66(1), 1978, Table 1 (REFERENCES rows 1a-1e; from memory,
    # recomputed); the flat-top is the ISO 18431-2 form scipy uses
    assert spectrum.window_enbw_bins(window, 4096) == pytest.approx(enbw, abs=2e-3)


def test_white_noise_reads_its_known_density():
    # closed form: white noise of variance s^2 has one-sided density s^2 / (fs/2)
    s = 0.01
    x = np.random.default_rng(2).standard_normal(int(20 * FS)) * s
    d = spectrum.welch_density(x, FS, resolution_hz=4.0)
    expected = s / math.sqrt(FS / 2)
    assert np.mean(d.density[10:-10] ** 2) == pytest.approx(expected ** 2, rel=0.01)
    assert spectrum.median_floor(d, 100, 20000) == pytest.approx(expected, rel=0.02)


def test_line_level_is_the_sines_rms_off_bin_too():
    # Parseval: the density squared summed over the line's bins is the sine's power
    n = np.arange(int(4 * FS))
    for f in (1000.0, 1001.37):
        x = 0.1 * math.sqrt(2) * np.sin(2 * np.pi * f * n / FS) \
            + 1e-6 * np.random.default_rng(4).standard_normal(n.size)
        d = spectrum.welch_density(x, FS, resolution_hz=2.0)
        line = spectrum.find_lines(d, mains_hz=50)[0]
        assert line.level == pytest.approx(0.1, rel=0.01)
        assert line.hz == pytest.approx(f, abs=0.1 * d.bin_hz)


@pytest.mark.parametrize("mains", [50.0, 60.0])
def test_synthetic_ambient_lines_found_labelled_and_mains_measured(mains):
    x, tones = ambient(mains=mains, extra=[(2330.0, 2e-4)])
    d = spectrum.welch_density(x, FS, resolution_hz=1.0)
    nominal, measured = spectrum.measure_mains(d, spectrum.find_lines(d, mains_hz=50))
    assert nominal == int(mains)
    assert measured == pytest.approx(mains, abs=0.05)
    lines = spectrum.find_lines(d, mains_hz=measured)
    by = {round(ln.hz): ln for ln in lines}
    assert by[round(mains)].kind == "mains" and by[round(mains)].label.startswith("mains")
    assert by[round(2 * mains)].label == "lamp flicker (2 x mains)"
    assert by[round(3 * mains)].label.startswith("mains harmonic 3")
    assert by[2330].kind == "spur" and by[2330].label == "spur 2.33 kHz"
    for f, rms in tones:
        assert by[round(f)].level == pytest.approx(rms, rel=0.03)
    assert len([ln for ln in lines if ln.kind != "hump"]) == len(tones)  # no leakage lines
    # the floor away from lines is the invented floor (median of a chi-square
    # estimate sits slightly under its mean: allow 3 %)
    assert spectrum.median_floor(d, 500, 20000, lines) == pytest.approx(2e-6, rel=0.03)


def test_a_spur_family_is_named_by_its_fundamental():
    x, _ = ambient(extra=[(1000.0, 3e-3), (3000.0, 1e-3), (5000.0, 6e-4)])
    d = spectrum.welch_density(x, FS, resolution_hz=1.0)
    labels = {round(ln.hz): ln.label for ln in spectrum.find_lines(d, mains_hz=50)}
    assert labels[3000] == "spur 3.00 kHz (3 x 1.00 kHz)"
    assert labels[1000] == "spur 1.00 kHz (on 20 x mains)"


def test_a_broad_hump_is_found():
    # invented: white floor plus band-limited noise 3-4 kHz, 20 dB above it
    rng = np.random.default_rng(5)
    x = rng.standard_normal(int(8 * FS)) * 1e-6 * math.sqrt(FS / 2)
    sos = signal.butter(4, [3000, 4000], "bandpass", fs=FS, output="sos")
    x += signal.sosfilt(sos, rng.standard_normal(x.size)) * 1e-5 * math.sqrt(FS / 2)
    d = spectrum.welch_density(x, FS, resolution_hz=2.0)
    humps = [ln for ln in spectrum.find_lines(d, mains_hz=50) if ln.kind == "hump"]
    assert len(humps) == 1 and 3000 <= humps[0].hz <= 4000
    assert humps[0].label.startswith("broadband hump around")


def test_bad_input_is_one_clear_line():
    with pytest.raises(SettingError, match=r"^samples = 10: need at least 64 samples"):
        spectrum.welch_density(np.zeros(10), FS)
    with pytest.raises(SettingError, match=r"^window = 'kaiser': allowed: blackmanharris"):
        spectrum.welch_density(np.zeros(1000), FS, window="kaiser")
