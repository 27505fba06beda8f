"""The simulated bench against the physics it claims (REFERENCES rows 6b, 7a, 7b, 9, 11)."""

import numpy as np
import pytest
from scipy.signal import welch

from livefilt.drivers.simulated import CHUNK, Q_E, K_B, Scene, SimulatedSource
from livefilt.errors import SettingError


def make(**opts):
    return SimulatedSource.from_settings(opts, 48000.0, 256)


def test_deterministic_by_seed_and_independent_of_block_size():
    a = make(seed=5).generate(0, 4 * CHUNK)
    b = np.concatenate([make(seed=5).generate(k, CHUNK) for k in range(0, 4 * CHUNK, CHUNK)])
    assert np.array_equal(a[:CHUNK], b[:CHUNK])
    assert not np.array_equal(make(seed=6).generate(0, CHUNK), b[:CHUNK])


def test_reflection_laws():
    # Lambertian target (REFERENCES row 9): beam-filling ~1/d^2; smaller than the spot ~1/d^4.
    canopy = Scene(48000, 1370, 50, "canopy", None, 1)
    leaf = Scene(48000, 1370, 50, "leaf", None, 1)
    assert canopy.reflected_w(np.array(1.0)) / canopy.reflected_w(np.array(2.0)) == pytest.approx(4.0)
    assert leaf.reflected_w(np.array(2.0)) / leaf.reflected_w(np.array(4.0)) == pytest.approx(16.0)
    # P_r = P_t rho A_r / (pi d^2), closed form
    assert canopy.reflected_w(np.array(1.0)) == pytest.approx(
        canopy.p_led_w * canopy.rho * canopy.a_r_m2 / np.pi)


def test_noise_floor_matches_shot_thermal_and_quantisation():
    # Shot noise sqrt(2 q I) (row 7b), Johnson-Nyquist sqrt(4 k T R) (row 7a),
    # quantisation q^2/12 spread over fs/2 (IEEE Std 1241, row 6b): one-sided
    # densities add in power.  Measured with scipy.signal.welch in a band free
    # of every tone (7.2-7.8 kHz: PWM harmonics are at whole kHz, LED odd
    # harmonics at 6850 and 9590 Hz).
    src = make(seed=2, distance_m=1.0)
    x = src.generate(0, 48000 * 4)[:, 0].astype(np.float64)
    f, p = welch(x, fs=48000, nperseg=8192)
    band = (f > 7200) & (f < 7800)
    measured = np.sqrt(np.mean(p[band]))
    sc = src.scene
    # mean photocurrent over the record from the model's own terms
    i_total = x.mean() * sc.adc_fs_v / sc.r_f
    q = 2 * sc.adc_fs_v / 2 ** sc.adc_bits
    analog = np.sqrt((2 * Q_E * i_total) * sc.r_f ** 2 + 4 * K_B * sc.temp_k * sc.r_f + sc.e_amp ** 2)
    expected = np.sqrt(analog ** 2 + q ** 2 / 12 / 24000) / sc.adc_fs_v
    assert 20 * np.log10(measured / expected) == pytest.approx(0, abs=0.5)


def test_led_channel_is_an_exact_50_percent_square_at_led_hz():
    x = make(led_hz=1500.0).generate(0, 48000)[:, 1]
    assert x.mean() == pytest.approx(0.5, abs=1e-3)
    edges = np.flatnonzero(np.diff(x) > 0)
    assert np.mean(np.diff(edges)) == pytest.approx(32.0, abs=0.01)


@pytest.mark.parametrize("opts, field", [
    ({"seed": -1}, "source.seed"), ({"pace": "slow"}, "source.pace"),
    ({"led_hz": 20000}, "source.led_hz"), ({"mains_hz": 55}, "source.mains_hz"),
    ({"target": "moon"}, "source.target"), ({"distance_m": 0}, "source.distance_m"),
    ({"colour": 1}, "colour"),
])
def test_bad_options(opts, field):
    with pytest.raises(SettingError, match=field.replace(".", r"\.")):
        make(**opts)
