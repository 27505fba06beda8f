"""The boxcar detector (an average over whole reference periods) and the
per-detector figures for design reports.

Sources: the ENBW of an average over T, 1 / (2 T) one-sided, and its step
response reaching the final value exactly at T (closed forms, common
practice); the ENBW of n RC sections, Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n)
tau) (REFERENCES row 3a) and their settling tau P^-1(n, p) with the
regularised gamma function (row 3c, scipy.special.gammaincinv).
"""

import math

import numpy as np
import pytest

from livefilt.dsp.detect import BoxcarLockIn, DetectorSpec, ReferenceSpec, make_detector

FS = 48000.0


def boxcar(lag=0.1, f0=1500.0, out=48, **spec):
    return make_detector(DetectorSpec.from_mapping({"type": "boxcar", "settling_s": lag, **spec},
                                                   FS),
                         ReferenceSpec.from_mapping({"frequency_hz": f0}, FS, 1), FS, out)


def test_boxcar_spans_whole_periods_and_its_enbw_is_one_over_2t():
    det = boxcar(lag=0.1, f0=1500.0)  # 150 periods of 32 samples
    assert isinstance(det, BoxcarLockIn)
    assert (det.periods, det.length) == (150, 4800)
    assert det.enbw_hz == 1 / (2 * det.average_s) == 5.0
    det = boxcar(lag=0.1, f0=1370.0)  # 137 periods, 4800.0 samples: whole periods exactly
    assert det.length == 4800 and det.average_s == pytest.approx(137 / 1370.0)


def test_boxcar_step_settles_exactly_at_t_without_ripple():
    # a tone switched on at sample k0: the amplitude rises linearly and is
    # exact (to rounding) from k0 + N on, with no 2 f0 ripple
    det = boxcar(lag=0.05, f0=1500.0, out=1, noise_window_s=0.5)
    n, k0 = int(0.3 * FS), 4000
    x = np.zeros(n)
    x[k0:] = np.cos(2 * np.pi * 1500.0 * np.arange(n - k0) / FS + 0.3)
    rows = np.concatenate([det.process(x[i:i + 1000], i) for i in range(0, n, 1000)])
    amp = rows["amplitude"]
    N = det.length
    assert det.settling_s(0.5) == pytest.approx(0.5 * N / FS)
    np.testing.assert_allclose(amp[k0 + N:], 1 / math.sqrt(2), rtol=1e-9)
    assert amp[k0 + N - 2] < 1 / math.sqrt(2) * (1 - 1 / N)
    assert amp[k0 + N // 2] == pytest.approx(0.5 / math.sqrt(2), rel=0.02)


def test_boxcar_noise_reads_density_times_sqrt_of_one_over_2t():
    # closed form e * sqrt(1 / (2 T)); tolerance from the estimator's stated
    # uncertainty (livefilt.dsp.noise) over about 40 windows, three of them, plus 2 %
    rng = np.random.default_rng(17)
    det = boxcar(lag=0.01, f0=1500.0, out=480)
    total = int(60 * FS)
    rows = np.concatenate([det.process(rng.normal(0, 0.1, min(1 << 16, total - i)), i)
                           for i in range(0, total, 1 << 16)])
    steady = rows[rows["index"] > (det.spec.noise_window_s + 0.1) * FS]
    expected = 0.1 * math.sqrt(2 / FS) * math.sqrt(1 / (2 * det.average_s))
    k = 60 / det.spec.noise_window_s
    tol = 0.02 + 3 * steady["noise_u"][-1] / math.sqrt(k)
    assert math.sqrt(np.mean(steady["noise"] ** 2)) / expected == pytest.approx(1, abs=tol)


@pytest.mark.parametrize("slope", [6, 12, 18, 24])
def test_figures_per_detector(slope):
    # the design report's one function per detector (livefilt.dsp.predict)
    # picks the boxcar up through its enbw_hz / settling_s / baseband_response
    from livefilt.dsp import predict
    spec = DetectorSpec.from_mapping({"time_constant_s": 0.05, "slope_db_oct": slope}, FS)
    n = slope // 6
    box = predict.detector_figures(
        DetectorSpec.from_mapping({"type": "boxcar", "settling_s": 0.1}, FS), 1370.0, FS)
    assert box.enbw_hz == pytest.approx(1 / (2 * 0.1))  # 137 whole periods: T = 0.1 s
    assert box.settling_s == pytest.approx(0.99 * 0.1)
    assert box.baseband(np.array([0.0, 10.0]))[1] == pytest.approx(0.0, abs=1e-9)  # 1/T null
    # the lag-noise products issue 13 quotes: 1.151 (n = 1), 0.83 (n = 2),
    # 0.785 (n = 4) at the 1 % band, from the two closed forms; the boxcar 0.495
    lock = predict.detector_figures(spec, 1370.0, FS)
    if n != 3:
        assert lock.enbw_settling == pytest.approx({1: 1.151, 2: 0.830, 4: 0.785}[n], abs=0.003)
    assert box.enbw_settling == pytest.approx(0.495)


def test_one_section_ripple_is_accounted_in_settling():
    # tau 10 ms at 1370 Hz, one section: the 2 f0 ripple is 0.58 % of the
    # signal (gain of the section at 2740 Hz); the step's tail must then fall
    # to 0.42 %: 54.7 ms instead of the 46 ms a plain P^-1(1, 0.99) says; at a
    # 0.5 % band it never settles
    det = make_detector(DetectorSpec.from_mapping({"time_constant_s": 0.01, "slope_db_oct": 6},
                                                  FS), ReferenceSpec(1370.0), FS, 480)
    assert det.ripple_2f0 == pytest.approx(1 / math.hypot(1, 4 * math.pi * 1370 * 0.01))
    assert det.ripple_2f0 == pytest.approx(0.0058, abs=0.0001)
    assert det.settled_s(0.01) == pytest.approx(0.01 * math.log(1 / (0.01 - det.ripple_2f0)))
    assert det.settled_s(0.01) == pytest.approx(0.0547, abs=0.0005)
    assert det.settling_s(0.99) == pytest.approx(0.046, abs=0.0005)  # the tail alone
    assert det.settled_s(0.005) == math.inf
