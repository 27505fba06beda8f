"""The analog front-end model against outside sources: scipy.signal.freqs of the same
prototypes, handbook denominators, the nodal solution of a loaded ladder."""

import math

import numpy as np
import pytest
from scipy import signal

from livefilt.dsp import frontend as fe
from livefilt.errors import SettingError


def one(table):
    return fe.Frontend.from_mapping({"stages": [table]})


F = np.geomspace(1.0, 1e6, 400)


@pytest.mark.parametrize("design, ftype, kw", [
    ("butterworth", "butter", {}),
    ("bessel", "bessel", {"norm": "mag"}),
    ("chebyshev1", "cheby1", {"rp": 0.5}),
    ("chebyshev2", "cheby2", {"rs": 40}),
    ("elliptic", "ellip", {"rp": 0.5, "rs": 40}),
])
@pytest.mark.parametrize("btype, edge", [("lowpass", 2000.0), ("highpass", 300.0),
                                         ("bandpass", [800.0, 3000.0])])
@pytest.mark.parametrize("order", [1, 2, 4])
def test_active_stages_equal_scipy_freqs_of_the_same_prototype(design, ftype, kw, btype, edge, order):
    # reference: scipy.signal.freqs of the analog prototype in (b, a) form
    table = {"type": btype, "design": design, "order": order}
    table.update({"band_hz": edge} if btype == "bandpass" else {"cutoff_hz": edge})
    if "rp" in kw:
        table["ripple_db"] = kw["rp"]
    if "rs" in kw:
        table["stop_db"] = kw["rs"]
    wn = np.array(edge) * 2 * np.pi if btype == "bandpass" else 2 * np.pi * edge
    design_fn = getattr(signal, ftype)
    args = [order] + ([kw["rp"]] if "rp" in kw else []) + ([kw["rs"]] if "rs" in kw else []) + [wn]
    extra = {"norm": "mag"} if ftype == "bessel" else {}
    b, a = design_fn(*args, btype=btype, analog=True, output="ba", **extra)
    want = signal.freqs(b, a, worN=2 * np.pi * F)[1]
    got = fe.response(one(table), F)
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-9 * np.max(np.abs(want)))


@pytest.mark.parametrize("n, denominator", [
    # Butterworth denominators, Williams & Taylor, Electronic Filter Design Handbook
    # (REFERENCES row 2a, from memory; rounded to 4 decimals there)
    (2, [1, 1.4142, 1]),
    (3, [1, 2, 2, 1]),
    (4, [1, 2.6131, 3.4142, 2.6131, 1]),
    (5, [1, 3.2361, 5.2361, 5.2361, 3.2361, 1]),
])
def test_butterworth_stage_has_the_handbook_denominator(n, denominator):
    z, p, k = fe.stage_zpk(one({"type": "lowpass", "order": n, "cutoff_hz": 1 / (2 * math.pi)}).stages[0])
    np.testing.assert_allclose(np.real(np.poly(p)), denominator, atol=6e-5)


def test_rc_law_single_section():
    # fc = 1/(2 pi R C): -3 dB and 45 degrees there (common practice)
    f = one({"type": "rc", "r_ohm": "10k", "c_farad": "1n"})
    fc = 1 / (2 * math.pi * 1e4 * 1e-9)
    h = fe.response(f, [fc])[0]
    assert 20 * math.log10(abs(h)) == pytest.approx(-10 * math.log10(2), abs=1e-9)
    assert math.degrees(np.angle(h)) == pytest.approx(-45.0, abs=1e-9)
    assert f.stages[0].minus3db_hz == pytest.approx(fc, rel=1e-10)


def test_loaded_two_section_ladder_worked_example():
    # REFERENCES row 4 (nodal analysis): H = 1/((sRC)^2 + 3 sRC + 1), -3 dB at
    # 0.37424/(2 pi R C); R = 10 kOhm, C = 1 nF: unbuffered ~6 kHz, buffered ~10.2 kHz
    loaded = one({"type": "rc", "r_ohm": "10k", "c_farad": "1n", "sections": 2, "buffered": False})
    buffered = one({"type": "rc", "r_ohm": "10k", "c_farad": "1n", "sections": 2})
    rc = 1e-5
    assert loaded.stages[0].minus3db_hz == pytest.approx(0.37424 / (2 * math.pi * rc), rel=1e-4)
    assert loaded.stages[0].minus3db_hz == pytest.approx(5956, rel=1e-3)
    # buffered: fc sqrt(2^(1/2) - 1) (REFERENCES row 3b) = 10.24 kHz
    assert buffered.stages[0].minus3db_hz == pytest.approx(
        math.sqrt(2 ** 0.5 - 1) / (2 * math.pi * rc), rel=1e-9)
    s = 2j * np.pi * F
    np.testing.assert_allclose(fe.response(loaded, F), 1 / ((s * rc) ** 2 + 3 * s * rc + 1), rtol=1e-9)


def _nodal(r1, c1, r2, c2, f, highpass=False):
    """Node equations of a two-section ladder from an ideal source, open output."""
    out = []
    for fi in f:
        s = 2j * np.pi * fi
        y1, y2 = (1 / r1, 1 / r2) if not highpass else (s * c1, s * c2)   # series admittances
        g1, g2 = (s * c1, s * c2) if not highpass else (1 / r1, 1 / r2)   # shunt admittances
        m = np.array([[y1 + g1 + y2, -y2], [-y2, y2 + g2]])
        v = np.linalg.solve(m, np.array([y1, 0.0]))  # Vin = 1
        out.append(v[1])
    return np.array(out)


@pytest.mark.parametrize("highpass", [False, True])
def test_ladder_with_unequal_parts_equals_the_nodal_solution(highpass):
    # REFERENCES row 4: nodal analysis of a loaded ladder, here with unequal parts
    r, c = [4.7e3, 22e3], [10e-9, 3.3e-9]
    want = _nodal(r[0], c[0], r[1], c[1], F, highpass)
    got = fe.ladder_response(r, c, F, "highpass" if highpass else "lowpass")
    np.testing.assert_allclose(got, want, rtol=1e-9)
    # equal parts: the stage model (ABCD chain of design.rc_analog) agrees with the nodes
    stage = one({"type": "rc", "r_ohm": 4.7e3, "c_farad": 10e-9, "sections": 2, "buffered": False,
                 "response": "highpass" if highpass else "lowpass"})
    np.testing.assert_allclose(fe.response(stage, F), _nodal(4.7e3, 10e-9, 4.7e3, 10e-9, F, highpass),
                               rtol=1e-9)


def test_front_end_group_delay_is_minus_the_phase_slope():
    # tau = -d(phase)/d(omega), numerically from scipy.signal.freqs_zpk's phase
    f = one({"type": "lowpass", "design": "bessel", "order": 4, "cutoff_hz": 5000})
    z, p, k = fe.stage_zpk(f.stages[0])
    w = 2 * np.pi * np.geomspace(10, 1e5, 2001)
    ph = np.unwrap(np.angle(signal.freqs_zpk(z, p, k, worN=w)[1]))
    numeric = -np.gradient(ph, w)
    got = fe.group_delay(f, w / (2 * np.pi))
    np.testing.assert_allclose(got[5:-5], numeric[5:-5], rtol=2e-3)


def test_picked_parts_meet_the_asked_cutoff():
    f = one({"type": "rc", "cutoff_hz": 8000, "series": "E24", "c_series": "E12"})
    st = f.stages[0]
    assert st.picked and abs(math.log(st.minus3db_hz / 8000)) < 0.05
    assert fe.Frontend.from_mapping(f.to_mapping()) == f


@pytest.mark.parametrize("table, field, allowed", [
    ({"type": "rc", "cutoff_hz": 1000}, "series", "required with cutoff_hz"),
    ({"type": "rc", "cutoff_hz": 1000, "series": "E7"}, "series", "E6, E12, E24, E96"),
    ({"type": "rc", "cutoff_hz": 1000, "series": "E12", "r_ohm": "1k"}, "r_ohm", "not both"),
    ({"type": "rc", "r_ohm": "1k"}, "c_farad", "required"),
    ({"type": "rc", "r_ohm": "1k", "c_farad": "1n", "tolerance_pct": [1, 80]}, "tolerance_pct", "0 to 50"),
    ({"type": "rc", "r_ohm": "1k", "c_farad": "1n", "design": "bessel"}, "design", "unknown key"),
    ({"type": "lowpass", "order": 9, "cutoff_hz": 10}, "order", "1 to 8"),
    ({"type": "lowpass"}, "cutoff_hz", "required"),
    ({"type": "bandpass", "band_hz": [3000, 800]}, "band_hz", "low < high"),
    ({"type": "notch"}, "type", "rc, lowpass"),
])
def test_bad_stage_tables_name_the_field_in_one_line(table, field, allowed):
    with pytest.raises(SettingError, match=r"stages\[0\]\." + field) as e:
        fe.Frontend.from_mapping({"stages": [table]})
    assert allowed in str(e.value) and "\n" not in str(e.value)


def test_discrete_model_matches_the_analog_gain_at_the_matched_frequency():
    f = one({"type": "rc", "r_ohm": "10k", "c_farad": "4.7n", "sections": 2, "buffered": False})
    sos = fe.discrete(f, 48000, match_hz=1370)
    got = signal.sosfreqz(sos, worN=[1370], fs=48000)[1][0]
    assert abs(got) == pytest.approx(abs(fe.response(f, [1370])[0]), rel=1e-12)
    # the triangle hold keeps the phase close too (within 0.5 degree at 1.37 kHz, 48 kHz)
    assert abs(np.degrees(np.angle(got / fe.response(f, [1370])[0]))) < 0.5
