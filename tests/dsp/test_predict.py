"""A chain on paper against outside sources: scipy.signal.sosfreqz and group_delay,
the closed forms of ENBW and settling for n RC sections, folding, the SNR law."""

import math

import numpy as np
import pytest
from scipy import signal
from scipy.special import gamma, gammainc

from livefilt.dsp import predict
from livefilt.dsp.design import StageSpec
from livefilt.dsp.detect import DetectorSpec
from livefilt.dsp.frontend import Frontend
from livefilt.errors import SettingError

FS = 48000.0
STAGES = [StageSpec.from_mapping(t, FS) for t in (
    {"type": "highpass", "design": "butterworth", "order": 2, "cutoff_hz": 300},
    {"type": "notch", "at_hz": 50, "harmonics": 3, "q": 25},
    {"type": "bandpass", "design": "butterworth", "order": 4, "band_hz": [1200, 1550]},
)]


def test_digital_response_equals_sosfreqz_of_scipy_designs():
    # reference: scipy.signal.sosfreqz of butter / iirnotch designed by scipy directly
    f = np.geomspace(1, 23000, 500)
    sos = np.vstack([signal.butter(2, 300, "highpass", fs=FS, output="sos"),
                     *[np.concatenate(signal.iirnotch(k * 50, 25, fs=FS))[None] for k in (1, 2, 3)],
                     signal.butter(4, [1200, 1550], "bandpass", fs=FS, output="sos")])
    want = signal.sosfreqz(sos, worN=f, fs=FS)[1]
    np.testing.assert_allclose(predict.digital_response(STAGES, f, FS), want, rtol=1e-8, atol=1e-12)


def test_digital_group_delay_equals_scipy_group_delay():
    # reference: scipy.signal.group_delay of each section, summed (samples -> s)
    f = np.geomspace(200, 20000, 300)
    f = f[np.min(np.abs(f[:, None] - np.array([50, 100, 150])[None]), axis=1) > 1]
    want = np.zeros(f.shape)
    for st in STAGES:
        from livefilt.dsp.design import stage_sos
        for row in stage_sos(st, FS):
            want += signal.group_delay((row[:3], row[3:]), w=f, fs=FS)[1]
    np.testing.assert_allclose(predict.digital_group_delay(STAGES, f, FS), want / FS, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("slope, enbw_tau, settle_tau", [
    # REFERENCES 3a (ENBW of n RC sections: 1/4, 1/8, 3/32, 5/64 over tau) and
    # 3c (99 % settling 4.605, 6.638, 8.406, 10.045 tau; DLMF 8.2)
    (6, 1 / 4, 4.605), (12, 1 / 8, 6.638), (18, 3 / 32, 8.406), (24, 5 / 64, 10.045),
])
def test_enbw_and_settling_against_the_closed_forms(slope, enbw_tau, settle_tau):
    tau = 0.05
    det = predict.detector_figures(DetectorSpec("lockin", tau, slope), 1370.0, FS)
    n = slope // 6
    assert det.enbw_hz == pytest.approx(enbw_tau / tau, rel=1e-12)
    assert det.enbw_hz == pytest.approx(gamma(n - 0.5) / (4 * math.sqrt(math.pi) * gamma(n) * tau), rel=1e-12)
    assert det.settling_s == pytest.approx(settle_tau * tau, abs=1e-3 * tau)
    assert gammainc(n, det.settling_s / tau) == pytest.approx(0.99, abs=1e-12)


@pytest.mark.parametrize("slope", [12, 18, 24])
def test_simulated_chain_settling_equals_the_regularised_gamma(slope):
    # no filter stages, no front end: the chain's simulated 99 % settling is the
    # detector's, tau P^-1(n, 0.99) (REFERENCES 3c), to a few output rows
    tau = 0.02
    spec = DetectorSpec("lockin", tau, slope)
    t, rel, settle, ripple = predict.step_response([], spec, None, FS, 1370.0)
    want = tau * predict.detector_figures(spec, 1370.0, FS).settling_s / tau
    assert settle == pytest.approx(want, abs=2e-4 + 3 * (t[1] - t[0]))
    assert ripple < 1.0
    assert rel[-1] == pytest.approx(1.0, abs=0.01)


def test_one_section_lockin_ripples_and_says_so():
    # one section (6 dB/oct) leaves the mixer's product at twice the reference as a
    # ripple of |H(2 f_ref)| = 1/sqrt(1 + (4 pi f tau)^2) of the amplitude (closed form
    # of one RC section); above 1 % the output never settles and the report says so
    spec = DetectorSpec("lockin", 0.002, 6)
    _, _, settle, ripple = predict.step_response([], spec, None, FS, 1370.0)
    lp = 1 / math.hypot(1, 2 * math.pi * 2 * 1370 * 0.002)
    assert ripple == pytest.approx(lp * 100, rel=0.1)  # |I + jQ| ripples by the 2f leak
    assert math.isnan(settle) == (lp > 0.01)


def test_lockin_rejection_is_the_output_lowpass_at_the_offset():
    # n RC sections: |H(f)| = (1 + (2 pi f tau)^2)^(-n/2) (closed form), offset << fs
    spec = DetectorSpec("lockin", 0.1, 24)
    lines = [predict.Line("x", 1000.0), predict.Line("y", 1370.0 + 7.0)]
    p = predict.chain_on_paper("A", [], spec, None, FS, 1370.0, lines, simulate=False)
    for row in p.interferers:
        off = abs(row["hz"] - 1370.0)
        want = -10 * 4 * math.log10(1 + (2 * math.pi * off * 0.1) ** 2)
        assert row["lockin_rejection_db"] == pytest.approx(want, abs=0.05)
        assert row["attenuation_db"] == pytest.approx(0.0, abs=1e-9)  # no filters


def test_attenuation_includes_the_front_end():
    fe = Frontend.from_mapping({"stages": [{"type": "rc", "response": "highpass", "r_ohm": "10k",
                                            "c_farad": "100n"}]})
    p = predict.chain_on_paper("A", [], DetectorSpec("rms", 0.1, 12), fe, FS, 1370.0,
                               predict.interferer_lines(50.0), simulate=False)
    dc = next(r for r in p.interferers if r["hz"] == 0)
    assert dc["attenuation_db"] == predict.FLOOR_DB  # a zero at DC: blocked
    mains = next(r for r in p.interferers if r["hz"] == 50)
    fc = 1 / (2 * math.pi * 1e4 * 1e-7)
    hp = lambda f: f / fc / math.hypot(1, f / fc)  # noqa: E731  (RC law, common practice)
    # the worst case over the grid's wander of +-0.2 Hz (REFERENCES row 8): at 50.2 Hz
    assert mains["wander_hz"] == 0.2
    assert mains["attenuation_db"] == pytest.approx(20 * math.log10(hp(50.2) / hp(1370)), abs=1e-9)
    assert "lockin_rejection_db" not in mains  # an RMS detector selects nothing itself


def test_interferer_lines_cover_mains_to_the_tenth_and_the_listed():
    lines = predict.interferer_lines(60.0, [1000.0])
    hz = [f for _, f, _ in lines]
    assert hz == [0.0] + [60.0 * k for k in range(1, 11)] + [1000.0]
    assert "flicker" in lines[2][0]  # lamps flicker at twice mains (REFERENCES row 8)


@pytest.mark.parametrize("f, fs, want", [(250e3, 48e3, 10e3), (46630.0, 48e3, 1370.0),
                                         (30e3, 48e3, 18e3), (96e3, 48e3, 0.0)])
def test_fold(f, fs, want):
    # sampling theorem: a line at f appears at |f - k fs| within 0..fs/2 (common practice)
    assert predict.fold_hz(f, fs) == pytest.approx(want)


def test_predicted_snr_and_range_closed_form():
    point, e, k, enbw = (1.0, 2e-3), 1e-6, 2.0, 0.78125
    snr0 = predict.predicted_snr_db(1.0, point, e, k, enbw)
    assert snr0 == pytest.approx(20 * math.log10(2e-3 / (1e-6 * math.sqrt(enbw))))
    # 1/d^2 amplitude: 40 dB per decade of distance
    assert predict.predicted_snr_db(10.0, point, e, k, enbw) == pytest.approx(snr0 - 40)
    r = predict.range_at_m(10.0, point, e, k, enbw)
    assert predict.predicted_snr_db(r, point, e, k, enbw) == pytest.approx(10.0)


def test_design_table_validation():
    assert predict.DesignSpec.from_mapping({}).interferers_hz == ()
    with pytest.raises(SettingError, match="noise_density.*both"):
        predict.DesignSpec.from_mapping({"signal_at": {"distance_m": 1, "amplitude": 1e-3}})
    with pytest.raises(SettingError, match=r"interferers_hz\[1\] = -5"):
        predict.DesignSpec.from_mapping({"interferers_hz": [1000, -5]})
    d = predict.DesignSpec.from_mapping({"signal_at": {"distance_m": 0.5, "amplitude": 1e-3},
                                         "noise_density": 2e-7, "exponent": 4})
    assert predict.DesignSpec.from_mapping(d.to_mapping()) == d


def test_a_mains_notch_is_judged_where_the_grid_wanders():
    # a notch's zero sits exactly at 50 Hz; the grid wanders +-0.2 Hz (REFERENCES row 8),
    # so the attenuation reported is the notch's at the nearer-passing edge, 49.8 or 50.2 Hz
    # (the bilinear notch is slightly asymmetric): scipy.signal.iirnotch and freqz
    notch = [StageSpec.from_mapping({"type": "notch", "at_hz": 50, "q": 30}, FS)]
    p = predict.chain_on_paper("A", notch, DetectorSpec("lockin", 0.1, 24), None, FS, 1370.0,
                               predict.interferer_lines(50.0), simulate=False)
    row = next(r for r in p.interferers if r["hz"] == 50)
    b, a = signal.iirnotch(50, 30, fs=FS)
    h = np.abs(signal.freqz(b, a, worN=[49.8, 50.2, 1370.0], fs=FS)[1])
    assert row["attenuation_db"] == pytest.approx(20 * math.log10(max(h[:2]) / h[2]), abs=1e-6)
    assert -14 < row["attenuation_db"] < -11  # not "blocked"
