"""The noise estimate against e * sqrt(ENBW), and its stated uncertainty.

Sources: the ENBW of n RC sections in closed form, Gamma(n - 1/2) /
(4 sqrt(pi) Gamma(n) tau) (REFERENCES row 3a); white samples of standard
deviation s have the one-sided density s * sqrt(2 / fs) (common practice);
the autocorrelation of n RC sections in closed form, checked here against a
numerical autocorrelation of the impulse response (numpy).
"""

import math

import numpy as np
import pytest
from scipy.special import gamma

from livefilt.dsp.detect import DetectorSpec, ReferenceSpec, make_detector
from livefilt.dsp.noise import WindowTables, correlation, default_window_s

# (time constant s, sample rate Hz, reference Hz, samples per row, run length s):
# rates scaled down for the long time constants (rows every 10 ms throughout;
# the estimator sees only rows), so each case is about a million samples
CASES = [(0.001, 48000.0, 1370.0, 480, 20.0), (0.01, 8000.0, 1370.0, 80, 150.0),
         (0.1, 4000.0, 1370.0, 40, 400.0), (1.0, 500.0, 137.0, 5, 3000.0)]


@pytest.mark.parametrize("slope", [6, 12, 18, 24])
@pytest.mark.parametrize("tau,fs,f0,every,length", CASES)
def test_noise_reads_density_times_sqrt_enbw_within_2_percent(tau, fs, f0, every, length, slope):
    # closed form: white input of one-sided density e reads e * sqrt(ENBW)
    # (REFERENCES row 3a).  Tolerance: the 2 % bias budget plus three standard
    # uncertainties of this run's average, u / sqrt(K) from the estimator's own
    # stated uncertainty u and K disjoint windows in the run (for tau = 1 s
    # about 19 windows: 3 u / sqrt(K) = 8.6 %; tighter cases below pin the method)
    det = make_detector(DetectorSpec.from_mapping(
        {"time_constant_s": tau, "slope_db_oct": slope}, fs),
        ReferenceSpec.from_mapping({"frequency_hz": f0}, fs, 1), fs, every)
    n = det.n_sections
    enbw = gamma(n - 0.5) / (4 * math.sqrt(math.pi) * gamma(n) * tau)
    assert det.enbw_hz == pytest.approx(enbw, rel=1e-12)
    rng = np.random.default_rng([1057, slope, int(tau * 1000)])
    sigma = 0.1
    expected = sigma * math.sqrt(2 / fs) * math.sqrt(enbw)
    total, rows, block = int(length * fs), [], 1 << 16
    for i in range(0, total, block):
        rows.append(det.process(rng.normal(0, sigma, min(block, total - i)), i))
    rows = np.concatenate(rows)
    window = det.spec.noise_window_s
    steady = rows[rows["index"] >= (det.settling_s(0.999) + window) * fs]
    u = float(steady["noise_u"][-1])
    # 32 degrees of freedom by default (more where the 2 s floor of the window rules)
    assert u < 0.125 + 0.01
    k = (length - det.settling_s(0.999) - window) / window
    tol = 0.02 + 3 * u / math.sqrt(k)
    ratio = steady["noise"] / expected
    assert abs(math.sqrt(np.mean(ratio ** 2)) - 1) < tol
    assert abs(np.median(ratio) - 1) < tol
    # SNR's uncertainty on pure noise: 20/ln 10 * sqrt(u^2 + (noise/amplitude)^2)
    last = steady[-1]
    rel = last["noise"] / last["amplitude"]
    assert last["snr_u_db"] == pytest.approx(20 / math.log(10) * math.hypot(u, rel))


def test_stated_uncertainty_matches_the_scatter():
    # the scatter of readings one window apart against the stated u (chi-square
    # with the effective degrees of freedom; Bendat and Piersol sec. 8.2, from
    # memory): within the sampling error of a standard deviation from 100
    # readings, 1/sqrt(2 * 100) = 7 % of u, three of them
    fs, f0, every, tau = 4000.0, 1370.0, 40, 0.05
    det = make_detector(DetectorSpec.from_mapping({"time_constant_s": tau}, fs),
                        ReferenceSpec.from_mapping({"frequency_hz": f0}, fs, 1), fs, every)
    window = det.spec.noise_window_s
    total = int((det.settling_s(0.999) + 101 * window) * fs)
    rng = np.random.default_rng(8)
    rows = np.concatenate([det.process(rng.normal(0, 0.1, min(1 << 16, total - i)), i)
                           for i in range(0, total, 1 << 16)])
    steady = rows[rows["index"] >= (det.settling_s(0.999) + window) * fs]
    readings = steady["noise"][::det.window_rows]
    spread = np.std(readings, ddof=1) / np.mean(readings)
    assert spread == pytest.approx(steady["noise_u"][-1], rel=3 / math.sqrt(2 * len(readings)))


@pytest.mark.parametrize("n", [1, 2, 3, 4])
def test_correlation_closed_form_against_impulse_response(n):
    # numpy: autocorrelation of the sampled impulse response t^(n-1) e^-t / (n-1)!
    dt = 0.002
    t = np.arange(0, 60, dt)
    h = t ** (n - 1) * np.exp(-t) / math.factorial(n - 1)
    lags = np.array([0, 100, 400, 1000, 2500])
    num = np.array([np.dot(h[:len(h) - k], h[k:]) for k in lags]) / np.dot(h, h)
    np.testing.assert_allclose(correlation(n, lags * dt), num, atol=2e-3)


@pytest.mark.parametrize("n", [1, 2, 3, 4])
def test_tables_reduce_to_independent_rows_and_window_gives_32_dof(n):
    # rows far apart are independent: factor 1 (the ddof-1 sample variance),
    # degrees of freedom (m - 1)^2 / m, m rows for a mean (common practice)
    tab = WindowTables(50, 1000.0, n, 1.0)
    m = np.arange(2, 51)
    np.testing.assert_allclose(tab.factor[m], 1.0, rtol=1e-12)
    np.testing.assert_allclose(tab.dof[m], (m - 1) ** 2 / m, rtol=1e-12)
    np.testing.assert_allclose(tab.n_mean[m], m, rtol=1e-12)
    # dense rows: int rho = 1 / (2 ENBW tau) (REFERENCES row 3a), and the
    # default window gives 32 degrees of freedom
    w = default_window_s(n, 1.0)
    rows = int(w / 0.01)
    tab = WindowTables(rows, 0.01, n, 1.0)
    assert tab.dof[rows] == pytest.approx(32, rel=0.02)
    enbw = gamma(n - 0.5) / (4 * math.sqrt(math.pi) * gamma(n))
    assert rows ** 2 / tab.n_mean[rows] * 0.01 / rows == pytest.approx(1 / (2 * enbw), rel=0.03)
