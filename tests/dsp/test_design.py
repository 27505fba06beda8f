"""Stage designs against scipy.signal, handbook prototype tables and closed forms.

Row numbers refer to /work/shared/REFERENCES.md; each check carries that row's
status (C confirmed, K recomputed with scipy, M from memory).
"""

import math

import numpy as np
import pytest
from scipy import integrate, signal

from livefilt.dsp.design import (StageSpec, analog_cutoff_hz, chain_sos, describe,
                             frequency_response, parse_si, rc_analog, stage_sos)
from livefilt.errors import SettingError

FS = 48000.0
DB3 = 10 * math.log10(2)  # 3.0103 dB


def spec(fs=FS, **table):
    return StageSpec.from_mapping(table, fs)


def gain_db(sos, f, fs=FS):
    return 20 * np.log10(np.abs(frequency_response(sos, f, fs)))


# --------------------------------------------------------------------------- equal to scipy.signal

SCIPY_CASES = [
    ({"type": "lowpass", "order": 4, "cutoff_hz": 1200},
     lambda: signal.butter(4, 1200, "lowpass", fs=FS, output="sos")),
    ({"type": "highpass", "design": "bessel", "order": 5, "cutoff_hz": 300},
     lambda: signal.bessel(5, 300, "highpass", norm="mag", fs=FS, output="sos")),
    ({"type": "lowpass", "design": "chebyshev1", "order": 6, "cutoff_hz": 2000, "ripple_db": 0.5},
     lambda: signal.cheby1(6, 0.5, 2000, fs=FS, output="sos")),
    ({"type": "highpass", "design": "chebyshev2", "order": 4, "cutoff_hz": 500, "stop_db": 60},
     lambda: signal.cheby2(4, 60, 500, "highpass", fs=FS, output="sos")),
    ({"type": "bandpass", "design": "elliptic", "order": 3, "band_hz": [1200, 1550]},
     lambda: signal.ellip(3, 1.0, 40.0, [1200, 1550], "bandpass", fs=FS, output="sos")),
    ({"type": "bandstop", "order": 2, "band_hz": [45, 55]},
     lambda: signal.butter(2, [45, 55], "bandstop", fs=FS, output="sos")),
    ({"type": "bandpass", "design": "bessel", "order": 4, "band_hz": [1000, 2000]},
     lambda: signal.bessel(4, [1000, 2000], "bandpass", norm="mag", fs=FS, output="sos")),
]


@pytest.mark.parametrize("table, reference", SCIPY_CASES)
def test_designs_equal_scipy(table, reference):
    # source: scipy.signal butter / bessel(norm='mag') / cheby1 / cheby2 / ellip
    np.testing.assert_allclose(stage_sos(spec(**table), FS), reference(), rtol=1e-12, atol=1e-15)


def test_notch_equals_iirnotch_per_harmonic():
    # source: scipy.signal.iirnotch, one biquad per harmonic
    sos = stage_sos(spec(type="notch", at_hz=60, harmonics=3, q=20), FS)
    for k in range(3):
        b, a = signal.iirnotch(60 * (k + 1), 20, fs=FS)
        np.testing.assert_allclose(sos[k], np.r_[b, a], rtol=1e-12)


def test_notch_reference_coefficients():
    # REFERENCES 10a: scipy docs (Orfanidis 1996) and scipy's own tests (C; K)
    sos = stage_sos(spec(fs=1000.0, type="notch", at_hz=50, q=30), 1000.0)
    assert sos[0, 0] == pytest.approx(0.99479124, abs=1e-8)
    np.testing.assert_allclose(sos[0, 3:], [1, -1.89220538, 0.98958248], atol=1e-8)
    sos = stage_sos(spec(fs=2.0, type="notch", at_hz=0.06, q=30), 2.0)
    np.testing.assert_allclose(sos[0], [0.99686824, -1.9584219, 0.99686824,
                                        1, -1.9584219, 0.99373647], atol=1e-8)


def test_mains_notch_acceptance():
    # Issue acceptance check: {at_hz=50, harmonics=3, q=25} at 48 kHz takes
    # >= 40 dB off 50, 100, 150 Hz and passes the 1370 Hz carrier within 0.1 dB.
    sos = stage_sos(spec(type="notch", at_hz=50, harmonics=3, q=25), FS)
    assert np.all(gain_db(sos, [50.0, 100.0, 150.0]) <= -40)
    assert abs(gain_db(sos, [1370.0])[0]) <= 0.1


def test_gain_db_in_first_section():
    plain = stage_sos(spec(type="lowpass", cutoff_hz=1000), FS)
    loud = stage_sos(spec(type="lowpass", cutoff_hz=1000, gain_db=6), FS)
    np.testing.assert_allclose(loud[0, :3], plain[0, :3] * 10 ** 0.3, rtol=1e-14)
    np.testing.assert_array_equal(loud[1:], plain[1:])
    np.testing.assert_array_equal(loud[0, 3:], plain[0, 3:])


def test_chain_concatenates_and_empty_passes_through():
    a = spec(type="highpass", cutoff_hz=300)
    b = spec(type="notch", at_hz=50, harmonics=2)
    np.testing.assert_array_equal(chain_sos([a, b], FS),
                                  np.vstack([stage_sos(a, FS), stage_sos(b, FS)]))
    np.testing.assert_array_equal(chain_sos([], FS), [[1, 0, 0, 1, 0, 0]])


def test_frequency_response_equals_freqz():
    # REFERENCES 10b: sosfreqz equals freqz for butter(4, 0.2), rtol 1e-10 (C)
    sos = signal.butter(4, 0.2, output="sos")
    b, a = signal.butter(4, 0.2)
    f = np.linspace(0, 1, 50, endpoint=False)
    np.testing.assert_allclose(frequency_response(sos, f, 2.0),
                               signal.freqz(b, a, worN=f, fs=2.0)[1], rtol=1e-10, atol=1e-13)


# --------------------------------------------------------------------------- prototype tables

BUTTER_DEN = {  # REFERENCES 2a: Williams & Taylor; Butterworth 1930 (M; K)
    2: [1, 1.4142, 1],
    3: [1, 2, 2, 1],
    4: [1, 2.6131, 3.4142, 2.6131, 1],
    5: [1, 3.2361, 5.2361, 5.2361, 3.2361, 1],
}


@pytest.mark.parametrize("n", sorted(BUTTER_DEN))
def test_butterworth_prototype_denominators(n):
    z, p, k = signal.buttap(n)
    np.testing.assert_allclose(np.real(np.poly(p)), BUTTER_DEN[n], atol=1e-4)


@pytest.mark.parametrize("design", ["butterworth", "bessel"])
@pytest.mark.parametrize("n", [2, 3, 4, 5])
def test_our_digital_lowpass_is_3db_down_at_cutoff(design, n):
    # Butterworth: -3.0103 dB at cutoff exactly (prewarped, REFERENCES 2a/10c);
    # Bessel norm='mag': -3.01 dB within 0.01 dB at fs >> fc (REFERENCES 2d/2e)
    sos = stage_sos(spec(type="lowpass", design=design, order=n, cutoff_hz=100), FS)
    assert gain_db(sos, [100.0])[0] == pytest.approx(-DB3, abs=0.01)


BESSEL_DELAY_DEN = {  # REFERENCES 2b: Blinchikoff & Zverev (C for the n=6 form; K)
    2: [1, 3, 3],
    3: [1, 6, 15, 15],
    4: [1, 10, 45, 105, 105],
    5: [1, 15, 105, 420, 945, 945],
}
BESSEL_DELAY_POLES = {  # REFERENCES 2c: Thomson normalisation pole lists (C; K)
    2: [-1.5 + 0.8660j, -1.5 - 0.8660j],
    3: [-2.3222, -1.8389 + 1.7544j, -1.8389 - 1.7544j],
    4: [-2.8962 + 0.8672j, -2.8962 - 0.8672j, -2.1038 + 2.6574j, -2.1038 - 2.6574j],
}
BESSEL_DELAY_3DB = {2: 1.3617, 3: 1.7557, 4: 2.1139, 5: 2.4274}  # REFERENCES 2d: Winder Table 3.3 (C; K)
BESSEL_MAG_POLES = {  # REFERENCES 2e: Williams & Taylor (M), Winder Table 3.4 (C, ~0.3 %); K
    2: [-1.1016 + 0.6360j, -1.1016 - 0.6360j],
    3: [-1.3227, -1.0474 + 0.9993j, -1.0474 - 0.9993j],
    4: [-1.3701 + 0.4103j, -1.3701 - 0.4103j, -0.9952 + 1.2571j, -0.9952 - 1.2571j],
}


def _sorted(p):
    return np.array(sorted(np.asarray(p, complex), key=lambda c: (round(c.real, 3), c.imag)))


@pytest.mark.parametrize("n", sorted(BESSEL_DELAY_DEN))
def test_bessel_delay_normalised_polynomial_and_3db(n):
    z, p, k = signal.besselap(n, norm="delay")
    den = np.real(np.poly(p))
    np.testing.assert_allclose(den / den[0], np.array(BESSEL_DELAY_DEN[n]) / 1.0, rtol=1e-9)
    # the -3 dB point found by our analog_cutoff_hz, in rad/s
    w3 = 2 * math.pi * analog_cutoff_hz([k], den)
    assert w3 == pytest.approx(BESSEL_DELAY_3DB[n], abs=1e-4)


@pytest.mark.parametrize("n", sorted(BESSEL_DELAY_POLES))
def test_bessel_poles(n):
    np.testing.assert_allclose(_sorted(signal.besselap(n, norm="delay")[1]),
                               _sorted(BESSEL_DELAY_POLES[n]), atol=1e-4)
    np.testing.assert_allclose(_sorted(signal.besselap(n, norm="mag")[1]),
                               _sorted(BESSEL_MAG_POLES[n]), atol=1e-4)


CHEBY1_POLES = {  # REFERENCES 2f (0.5 dB: Winder tables, C; K), 2g (1 dB: K; M)
    (0.5, 3): [-0.6265, -0.3132 + 1.0219j, -0.3132 - 1.0219j],
    (0.5, 4): [-0.1754 + 1.0163j, -0.1754 - 1.0163j, -0.4233 + 0.4209j, -0.4233 - 0.4209j],
    (1.0, 3): [-0.4942, -0.2471 + 0.9660j, -0.2471 - 0.9660j],
    (1.0, 4): [-0.1395 + 0.9834j, -0.1395 - 0.9834j, -0.3369 + 0.4073j, -0.3369 - 0.4073j],
}


@pytest.mark.parametrize("ripple, n", sorted(CHEBY1_POLES))
def test_chebyshev1_poles_and_our_ripple_edge(ripple, n):
    np.testing.assert_allclose(_sorted(signal.cheb1ap(n, ripple)[1]),
                               _sorted(CHEBY1_POLES[ripple, n]), atol=1e-4)
    # our digital design: the cutoff is the ripple-band edge (-ripple_db there)
    sos = stage_sos(spec(type="lowpass", design="chebyshev1", order=n, cutoff_hz=1000,
                         ripple_db=ripple), FS)
    assert gain_db(sos, [1000.0])[0] == pytest.approx(-ripple, abs=1e-6)


BUTTER_ENBW = {1: 1.5708, 2: 1.1107, 3: 1.0472, 4: 1.0262, 5: 1.0166}  # REFERENCES 2h (C)
BESSEL_ENBW = {2: 1.154, 3: 1.074, 4: 1.046, 5: 1.039}  # REFERENCES 2h (K)


def _analog_enbw_ratio(z, p, k):
    def power(w):
        return abs(signal.freqs_zpk(z, p, k, worN=[w])[1][0]) ** 2
    return integrate.quad(power, 0, np.inf, limit=200)[0]  # w3 = 1 rad/s


@pytest.mark.parametrize("n", sorted(BUTTER_ENBW))
def test_butterworth_enbw_ratio(n):
    # REFERENCES 2h: Winder App. A Table A.3 citing Carlson; = (pi/2n)/sin(pi/2n) (C)
    assert _analog_enbw_ratio(*signal.buttap(n)) == pytest.approx(BUTTER_ENBW[n], abs=1e-4)
    # our digital Butterworth at fs >> fc: integral of |H|^2 up to Nyquist / fc
    # (the digital response ends at Nyquist: n = 1 loses about fc / (fs/2))
    fc = 10.0
    sos = stage_sos(spec(type="lowpass", order=n, cutoff_hz=fc), FS)
    f = np.r_[0.0, np.geomspace(fc * 1e-4, FS / 2, 40001)]
    h2 = np.abs(frequency_response(sos, f, FS)) ** 2
    assert integrate.trapezoid(h2, f) / fc == pytest.approx(BUTTER_ENBW[n], rel=1e-3)


@pytest.mark.parametrize("n", sorted(BESSEL_ENBW))
def test_bessel_enbw_ratio(n):
    assert _analog_enbw_ratio(*signal.besselap(n, norm="mag")) == pytest.approx(
        BESSEL_ENBW[n], abs=1.5e-3)


# --------------------------------------------------------------------------- RC stages

R, C = 10e3, 1e-9
FC = 1 / (2 * math.pi * R * C)


def test_rc_law():
    # fc = 1/(2 pi R C) (common practice)
    assert analog_cutoff_hz(*rc_analog(R, C)) == pytest.approx(FC, rel=1e-10)
    assert analog_cutoff_hz(*rc_analog(R, C, response="highpass")) == pytest.approx(FC, rel=1e-10)


@pytest.mark.parametrize("n, factor", [(1, 1.0), (2, 0.6436), (3, 0.5098), (4, 0.4350)])
def test_buffered_sections_3db(n, factor):
    # REFERENCES 3b: fc * sqrt(2^(1/n) - 1) (K, follows from 3a)
    f3 = analog_cutoff_hz(*rc_analog(R, C, n, True))
    assert f3 == pytest.approx(FC * math.sqrt(2 ** (1 / n) - 1), rel=1e-9)
    assert f3 / FC == pytest.approx(factor, abs=1e-4)
    # high-pass: the mirror image, fc / factor
    f3h = analog_cutoff_hz(*rc_analog(R, C, n, True, "highpass"))
    assert f3h == pytest.approx(FC / math.sqrt(2 ** (1 / n) - 1), rel=1e-9)


def test_unbuffered_ladders():
    # REFERENCES 4: nodal analysis (C; K): two sections 1/((sRC)^2 + 3 sRC + 1),
    # -3 dB at 0.37424/(2 pi R C); three sections s^3 + 5 s^2 + 6 s + 1, ~0.194
    rc = R * C
    b, a = rc_analog(R, C, 2, False)
    np.testing.assert_allclose(a, [rc**2, 3 * rc, 1], rtol=1e-12)
    np.testing.assert_allclose(np.trim_zeros(b, "f"), [1])
    assert analog_cutoff_hz(b, a) / FC == pytest.approx(0.37424, abs=1e-5)
    b, a = rc_analog(1.0, 1.0, 3, False)
    np.testing.assert_allclose(a, [1, 5, 6, 1], rtol=1e-12)
    assert analog_cutoff_hz(*rc_analog(R, C, 3, False)) / FC == pytest.approx(0.194, abs=5e-4)
    # high-pass ladder (series C, shunt R): H(p) = p^2/(p^2 + 3p + 1), the
    # low-pass with p -> 1/p, so -3 dB at FC / 0.37424 (closed form)
    b, a = rc_analog(1.0, 1.0, 2, False, "highpass")
    np.testing.assert_allclose(a, [1, 3, 1], rtol=1e-12)
    np.testing.assert_allclose(b, [1, 0, 0])
    assert analog_cutoff_hz(*rc_analog(R, C, 2, False, "highpass")) * 0.37424 == \
        pytest.approx(FC, rel=1e-5)


def test_rc_worked_example_and_digital_3db():
    # REFERENCES 4 worked example: R = 10 kOhm, C = 1 nF, two sections:
    # unbuffered ~6 kHz, buffered ~10.2 kHz (C; K)
    for buffered, expected in ((False, 6000), (True, 10200)):
        f3 = analog_cutoff_hz(*rc_analog(R, C, 2, buffered))
        assert f3 == pytest.approx(expected, rel=0.01)
        # our digital stage is prewarped to the same -3 dB point
        s = spec(type="rc", r_ohm="10k", c_farad="1n", sections=2, buffered=buffered)
        assert gain_db(stage_sos(s, FS), [f3])[0] == pytest.approx(-DB3, abs=1e-9)
        assert gain_db(stage_sos(s, FS), [0.0])[0] == pytest.approx(0, abs=1e-9)


def test_rc_prewarping():
    # REFERENCES 10c: fc = 10 Hz, fs = 100 Hz: prewarped first-order RC is
    # -3.0103 dB at fc and equals butter(1, 10, fs=100); plain bilinear gives
    # -3.159 dB (scipy docs; C; K)
    fs, c = 100.0, 1 / (2 * math.pi * 10.0)
    sos = stage_sos(spec(fs=fs, type="rc", r_ohm=1, c_farad=c), fs)
    np.testing.assert_allclose(sos[0, [0, 1, 4]], [0.24523728, 0.24523728, -0.50952545], atol=1e-8)
    b, a = signal.butter(1, 10, fs=fs)
    np.testing.assert_allclose(sos[0, [0, 1, 3, 4]], np.r_[b, a], rtol=1e-12)
    assert gain_db(sos, [10.0], fs)[0] == pytest.approx(-3.0103, abs=1e-4)
    bz, az = signal.bilinear(*rc_analog(1, c), fs=fs)
    plain = 20 * np.log10(abs(signal.freqz(bz, az, worN=[10.0], fs=fs)[1][0]))
    assert plain == pytest.approx(-3.159, abs=1e-3)
    # high-pass likewise equals butter(1, 10, 'highpass', fs=100)
    sos = stage_sos(spec(fs=fs, type="rc", r_ohm=1, c_farad=c, response="highpass"), fs)
    b, a = signal.butter(1, 10, "highpass", fs=fs)
    np.testing.assert_allclose(sos[0, [0, 1, 3, 4]], np.r_[b, a], rtol=1e-12)


@pytest.mark.parametrize("text, value", [
    ("10k", 1e4), ("4.7k", 4.7e3), ("4k7", 4.7e3), ("1M", 1e6), ("100n", 1e-7),
    ("2.2u", 2.2e-6), ("2.2µ", 2.2e-6), ("470p", 470e-12), ("2n2", 2.2e-9), ("4R7", 4.7),
    ("100nF", 1e-7), ("10kΩ", 1e4), ("1e-9", 1e-9), ("33", 33.0), ("5m", 5e-3), (47, 47.0),
])
def test_parse_si(text, value):
    assert parse_si(text, "r_ohm") == pytest.approx(value, rel=1e-12)


# --------------------------------------------------------------------------- spec round trip, labels


@pytest.mark.parametrize("table", [t for t, _ in SCIPY_CASES] + [
    {"type": "notch", "at_hz": 50, "harmonics": 3, "q": 25},
    {"type": "rc", "r_ohm": "4.7k", "c_farad": "100n", "sections": 3, "buffered": False,
     "response": "highpass", "gain_db": -6},
    {"type": "lowpass", "cutoff_hz": 1000, "design": "butterworth", "order": 2},
])
def test_round_trip(table):
    s = spec(**table)
    assert StageSpec.from_mapping(s.to_mapping(), FS) == s
    assert "type" in s.to_mapping()


def test_to_mapping_is_fully_resolved_or_minimal():
    s = spec(type="highpass", cutoff_hz=300)
    assert s.to_mapping() == {"type": "highpass", "design": "butterworth", "order": 2,
                              "cutoff_hz": 300.0, "gain_db": 0.0}
    assert s.to_mapping(full=False) == {"type": "highpass", "cutoff_hz": 300.0}


def test_describe():
    assert describe(spec(type="lowpass", order=4, cutoff_hz=1200)) == \
        "Butterworth low-pass, order 4, 1.2 kHz"
    # an RC ladder names both corners (issue 13: fc alone misread two loaded
    # sections' -3 dB point, 0.374 fc: the root of (1 - x^2)^2 + 9 x^2 = 2)
    assert describe(spec(type="rc", r_ohm="10k", c_farad="1n", sections=2, buffered=False)) == \
        "RC low-pass 10 kΩ / 1 nF x2 (loaded), fc = 1/(2πRC) 15.9 kHz, −3 dB at 5.96 kHz"
    assert describe(spec(type="notch", at_hz=50, harmonics=3)) == "notch 50 Hz x3, Q 30"
    assert describe(spec(type="bandpass", design="chebyshev1", band_hz=[1200, 1550])) == \
        "Chebyshev I band-pass, order 2, 1 dB ripple, 1.2 kHz to 1.55 kHz"


# --------------------------------------------------------------------------- every error path

ERRORS = [
    ({"type": "lowpas"}, r"^type = 'lowpas': must be one of: lowpass, highpass, bandpass"),
    ({"cutoff_hz": 100}, r"^type = \(not set\): must be one of"),
    ({"type": "lowpass", "cutoff_hz": 100, "order": 0}, r"^order = 0: must be a whole number from 1 to 12$"),
    ({"type": "lowpass", "cutoff_hz": 100, "order": 13}, r"^order = 13: must be a whole number from 1 to 12$"),
    ({"type": "lowpass", "cutoff_hz": 100, "order": 2.5}, r"^order = 2.5: must be a whole number"),
    ({"type": "lowpass", "cutoff_hz": 100, "order": True}, r"^order = True: must be a whole number"),
    ({"type": "lowpass", "cutoff_hz": 24000},
     r"^cutoff_hz = 24000: must be between 0 and Nyquist \(24000 Hz\), exclusive$"),
    ({"type": "lowpass", "cutoff_hz": 30000},
     r"^cutoff_hz = 30000: must be between 0 and Nyquist \(24000 Hz\), exclusive$"),
    ({"type": "highpass", "cutoff_hz": -5}, r"^cutoff_hz = -5: must be between 0 and Nyquist"),
    ({"type": "highpass", "cutoff_hz": "1k"}, r"^cutoff_hz = '1k': must be between 0 and Nyquist"),
    ({"type": "lowpass"}, r"^cutoff_hz = \(not set\): required; must be between 0 and Nyquist"),
    ({"type": "bandpass", "band_hz": [1550, 1200]},
     r"^band_hz = \[1550, 1200\]: must be \[low, high\] in Hz with 0 < low < high < Nyquist \(24000 Hz\)"),
    ({"type": "bandpass", "band_hz": [1200, 25000]},
     r"^band_hz\[1\] = 25000: must be between 0 and Nyquist \(24000 Hz\), exclusive$"),
    ({"type": "bandstop", "band_hz": 50}, r"^band_hz = 50: must be two numbers \[low, high\]"),
    ({"type": "lowpass", "cutoff_hz": 100, "foo": 1},
     r"^foo = 1: unknown key; a lowpass stage takes: type, gain_db, cutoff_hz, design, order"),
    ({"type": "lowpass", "cutoff_hz": 100, "band_hz": [1, 2]},
     r"^band_hz = \[1, 2\]: not a key of a lowpass stage \(it belongs to bandpass, bandstop\)"),
    ({"type": "notch", "at_hz": 50, "order": 2},
     r"^order = 2: not a key of a notch stage \(it belongs to lowpass, highpass"),
    ({"type": "lowpass", "cutoff_hz": 100, "design": "gauss"},
     r"^design = 'gauss': must be one of: butterworth, bessel, chebyshev1, chebyshev2, elliptic$"),
    ({"type": "lowpass", "cutoff_hz": 100, "ripple_db": 1},
     r"^ripple_db = 1: only for designs chebyshev1 and elliptic \(this stage is butterworth\)$"),
    ({"type": "lowpass", "cutoff_hz": 100, "design": "chebyshev1", "stop_db": 40},
     r"^stop_db = 40: only for designs chebyshev2 and elliptic \(this stage is chebyshev1\)$"),
    ({"type": "lowpass", "cutoff_hz": 100, "design": "chebyshev1", "ripple_db": 0},
     r"^ripple_db = 0: must be a number > 0 dB$"),
    ({"type": "lowpass", "cutoff_hz": 100, "design": "elliptic", "ripple_db": 3, "stop_db": 2},
     r"^stop_db = 2: an elliptic design needs stop_db above ripple_db \(3 dB\)$"),
    ({"type": "lowpass", "cutoff_hz": 100, "gain_db": float("nan")},
     r"^gain_db = nan: must be a number from -200 to 200 dB$"),
    ({"type": "rc", "r_ohm": "10 kilo", "c_farad": "1n"},
     r"^r_ohm = '10 kilo': must be a number > 0 or a string with an SI prefix, e.g. \"10k\""),
    ({"type": "rc", "r_ohm": "10k", "c_farad": "1x"}, r"^c_farad = '1x': must be a number > 0 or"),
    ({"type": "rc", "r_ohm": -10, "c_farad": "1n"}, r"^r_ohm = -10: must be > 0 ohm$"),
    ({"type": "rc", "c_farad": "1n"}, r"^r_ohm = \(not set\): required; must be a number > 0"),
    ({"type": "rc", "r_ohm": "10k", "c_farad": "1n", "sections": 9},
     r"^sections = 9: must be a whole number from 1 to 8$"),
    ({"type": "rc", "r_ohm": "10k", "c_farad": "1n", "buffered": "yes"},
     r"^buffered = 'yes': must be true or false$"),
    ({"type": "rc", "r_ohm": "10k", "c_farad": "1n", "response": "bandpass"},
     r"^response = 'bandpass': must be \"lowpass\" or \"highpass\"$"),
    ({"type": "rc", "r_ohm": "100", "c_farad": "1n"},
     r"^c_farad = 1e-09: with r_ohm = 100 and c_farad = 1e-09, fc = 1/\(2 pi R C\) = 1.59 MHz "
     r"must be below Nyquist \(24000 Hz\)"),
    ({"type": "rc", "r_ohm": "1k", "c_farad": "10n", "sections": 3, "buffered": False,
      "response": "highpass"},
     r"^c_farad = 1e-08: .* the stage's -3 dB point 81.9 kHz must be below Nyquist"),
    ({"type": "notch", "at_hz": 50, "harmonics": 480},
     r"^harmonics = 480: harmonics of 50 Hz must stay below Nyquist \(24000 Hz\): at most 479$"),
    ({"type": "notch", "at_hz": 50, "harmonics": 0}, r"^harmonics = 0: must be a whole number >= 1$"),
    ({"type": "notch", "at_hz": 50, "q": 0}, r"^q = 0: must be a number > 0"),
    ({"type": "notch", "at_hz": 50, "q": 0.001},
     r"^q = 0.001: must be above 0.00208: the -3 dB width"),
    ({"type": "notch", "at_hz": 24000}, r"^at_hz = 24000: must be between 0 and Nyquist"),
    ({"type": "lowpass", "design": "elliptic", "order": 12, "cutoff_hz": 0.0001},
     r"^order = 12: Elliptic low-pass, order 12, .* is unstable at 48000 Hz sampling .*"
     r"use a lower order, a higher cutoff_hz, or a lower sample rate$"),
    ({"type": "lowpass", "order": 12, "cutoff_hz": 0.001},
     r"^order = 12: Butterworth low-pass, order 12, 0.001 Hz loses precision at 48000 Hz "
     r"sampling .*; use a lower order, a higher cutoff_hz, or a lower sample rate$"),
    ({"type": "rc", "r_ohm": "1G", "c_farad": 10, "sections": 8, "buffered": False},
     r"^sections = 8: RC low-pass .* is unstable at 48000 Hz sampling .*use fewer sections"),
]


@pytest.mark.parametrize("table, message", ERRORS)
def test_errors(table, message):
    with pytest.raises(SettingError, match=message):
        StageSpec.from_mapping(table, FS)


def test_error_prefix_from_loader():
    # the config loader prefixes the stage's place with SettingError.within
    with pytest.raises(SettingError) as info:
        StageSpec.from_mapping({"type": "bandpass", "band_hz": [1200, 30000]}, FS)
    assert str(info.value.within("chains[0].stages[2]")).startswith(
        "chains[0].stages[2].band_hz[1] = 30000: must be between 0 and Nyquist")


def test_stage_sos_rechecks_nyquist_at_other_rate():
    s = spec(type="lowpass", cutoff_hz=10000)
    with pytest.raises(SettingError, match=r"^cutoff_hz = 10000: .*Nyquist \(8000 Hz\)"):
        stage_sos(s, 16000.0)


def test_rc_label_corners_and_bilinear_departure():
    # two loaded 10 k / 4.7 n sections: fc = 1/(2 pi R C) = 3386 Hz; the ladder
    # 1 / ((sRC)^2 + 3 sRC + 1) is -3 dB where (1 - x^2)^2 + 9 x^2 = 2, x = w RC
    # (closed form), 1267 Hz.  The digital model against the analog one
    # (scipy.signal.freqs): within 1 dB to 7.5 kHz at 48 kHz, -7.7 dB at 15.8 kHz
    from livefilt.dsp.design import rc_corner_hz, rc_departure, rc_departure_hz
    s = spec(type="rc", r_ohm="10k", c_farad="4.7n", sections=2, buffered=False)
    fc, f3 = rc_corner_hz(s)
    x2 = (-7 + math.sqrt(49 + 4)) / 2  # x^4 + 7 x^2 - 1 = 0
    assert fc == pytest.approx(1 / (2 * math.pi * 10e3 * 4.7e-9))
    assert f3 == pytest.approx(math.sqrt(x2) * fc, rel=1e-9) and f3 == pytest.approx(1267.3, abs=0.1)
    d = rc_departure(s, 48000.0, [f3, 6300.0, 15800.0])
    assert abs(d[0]) < 1e-6  # prewarped at the -3 dB point
    assert -1 < d[1] < -0.5 and -8.5 < d[2] < -7
    assert rc_departure_hz(s, 48000.0) == pytest.approx(7460, rel=0.01)
    assert "digital model 1 dB off the analog from 7.4" in describe(s, 48000.0)
