"""Tests of livefilt.dsp.detect against closed forms and the trade's known figures.

Each check names its source: REFERENCES.md rows (3a ENBW, 3c settling, 11
chopped light), closed forms, scipy.signal as the reference library.
"""

import logging
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy.signal import freqz

from livefilt.dsp.detect import (READING_DTYPE, DetectorSpec, LockIn, ReferenceSpec, RmsDetector,
                             make_detector)
from livefilt.errors import SettingError

FS = 48000.0
FLOATS = ("in_phase", "quadrature", "amplitude", "phase_deg", "noise", "snr_db", "ref_hz")


def lockin(tau=0.05, slope=24, out=480, fs=FS, window=None, **ref):
    table = {"time_constant_s": tau, "slope_db_oct": slope}
    if window is not None:
        table["noise_window_s"] = window
    ref.setdefault("frequency_hz", 1370.0)
    return make_detector(DetectorSpec.from_mapping(table, fs),
                         ReferenceSpec.from_mapping(ref, fs, 2), fs, out)


def run(det, x, block=256, ref=None):
    """Feed ``x`` in blocks of ``block`` (int) or of the sizes listed."""
    sizes = block if isinstance(block, list) else [block] * (len(x) // block + 1)
    rows, i = [], 0
    for size in sizes:
        if i >= len(x):
            break
        j = min(len(x), i + size)
        rows.append(det.process(x[i:j], i, None if ref is None else ref[i:j]))
        i = j
    if i < len(x):
        rows.append(det.process(x[i:], i, None if ref is None else ref[i:]))
    return np.concatenate(rows)


def tone(n, f, amp=1.0, deg=0.0, fs=FS):
    return amp * np.cos(2 * np.pi * f * np.arange(n) / fs + np.radians(deg))


# -- lock-in accuracy --------------------------------------------------------
def test_tone_60db_under_dc_hum_and_flicker():
    # closed form: a sine A cos(wt) reads A/sqrt(2) (rms, our stated convention)
    n = int(2 * FS)
    t = np.arange(n) / FS
    clutter = 1.0 + 0.5 * np.sin(2 * np.pi * 50 * t) + 0.3 * np.sin(2 * np.pi * 100 * t)
    clutter_rms = math.sqrt(1.0 + 0.5 ** 2 / 2 + 0.3 ** 2 / 2)
    amp = math.sqrt(2) * clutter_rms * 10 ** (-60 / 20)  # tone rms 60 dB below the clutter
    rows = run(lockin(tau=0.1), clutter + tone(n, 1370.0, amp), block=1024)
    settled = rows[rows["index"] >= 1.5 * FS]  # 99.9 % at 13.06 tau = 1.31 s (row 3c)
    np.testing.assert_allclose(settled["amplitude"], amp / math.sqrt(2), rtol=0.005)


@pytest.mark.parametrize("slope", [6, 12, 18, 24])
def test_white_noise_reads_density_times_sqrt_enbw(slope):
    # closed form: white input of one-sided density e gives output rms e*sqrt(ENBW)
    # (ENBW one-sided, REFERENCES row 3a and its pitfall note)
    rng = np.random.default_rng(1057)
    sigma = 0.1
    density = sigma * math.sqrt(2 / FS)  # one-sided V/sqrt(Hz) of white samples
    det = lockin(tau=0.001, slope=slope, out=480, window=2.0)
    rows = run(det, rng.normal(0, sigma, int(8 * FS)), block=4096)
    # read-outs at the ends of four disjoint 2 s windows
    ends = rows[np.isin(rows["index"], (np.arange(1, 5) * 2 * FS - 480).astype(int))]
    assert len(ends) == 4
    measured = np.sqrt(np.mean(ends["noise"] ** 2))
    expected = density * math.sqrt(det.enbw_hz)
    assert abs(20 * math.log10(measured / expected)) < 0.5


@pytest.mark.parametrize("signal_amp", [0.0, 0.5])
def test_noise_with_a_moving_target_still_reads_density_times_sqrt_enbw(signal_amp):
    # closed form as above (e*sqrt(ENBW), REFERENCES row 3a); the signal's
    # amplitude ramps 4:1 within each noise window, as when the target is
    # moved: motion changes (I, Q) along the signal's direction only, so the
    # noise read-out, taken across that direction, must not count it.
    rng = np.random.default_rng(1241)
    sigma = 0.1
    density = sigma * math.sqrt(2 / FS)
    n = int(8 * FS)
    ramp = signal_amp * (1 - 0.75 * ((np.arange(n) / FS) % 2.0) / 2.0)
    x = rng.normal(0, sigma, n) + ramp * np.cos(2 * np.pi * 1370.0 * np.arange(n) / FS + 0.7)
    det = lockin(tau=0.001, slope=24, out=480, window=2.0)
    rows = run(det, x, block=4096)
    ends = rows[np.isin(rows["index"], (np.arange(1, 5) * 2 * FS - 480).astype(int))]
    measured = np.sqrt(np.mean(ends["noise"] ** 2))
    assert abs(20 * math.log10(measured / (density * math.sqrt(det.enbw_hz)))) < 0.5
    if signal_amp:  # while the plain spread of (I, Q) over a window is dominated by the ramp
        last = rows[rows["index"] >= 6 * FS]
        spread = np.sqrt((np.var(last["in_phase"]) + np.var(last["quadrature"])) / 2)
        assert 20 * math.log10(spread / (density * math.sqrt(det.enbw_hz))) > 10


def test_phase_convention_signal_leading_reads_positive():
    # our stated convention: signal at +30 deg relative to the reference reads +30
    for ref_deg, sig_deg in ((0.0, 30.0), (10.0, 40.0), (-170.0, -140.0)):
        rows = run(lockin(phase_deg=ref_deg), tone(int(1.0 * FS), 1370.0, 1.0, sig_deg))
        last = rows[-1]
        assert last["phase_deg"] == pytest.approx(30.0, abs=1e-3)
        assert last["quadrature"] > 0
        assert last["in_phase"] == pytest.approx(math.cos(math.radians(30)) / math.sqrt(2),
                                                 rel=1e-4)


def test_phase_wraps_into_half_open_interval():
    rows = run(lockin(), tone(int(0.6 * FS), 1370.0, 1.0, 180.0))
    assert -180.0 < rows[-1]["phase_deg"] <= 180.0
    assert abs(rows[-1]["phase_deg"]) == pytest.approx(180.0, abs=1e-3)


def test_chopped_square_reads_fundamental():
    # REFERENCES row 11 (Fourier series, common practice): a 0..A square wave
    # has a fundamental of 2A/pi peak = 0.4502 A rms
    a = 2.0
    on = (tone(int(FS), 1370.0) > 0).astype(float) * a
    rows = run(lockin(tau=0.05), on, block=512)
    assert rows[-1]["amplitude"] == pytest.approx(0.4502 * a, rel=0.003)
    assert rows[-1]["amplitude"] == pytest.approx(2 * a / math.pi / math.sqrt(2), rel=0.003)


def test_internal_reference_stays_in_phase_across_a_gap():
    # the reference phase is 2 pi f k / fs + phase at acquired index k, so a
    # signal that went on during lost samples still reads the same phase
    det = lockin(tau=0.02)
    n, lost = int(0.5 * FS), 12345
    x = tone(n + lost + 24000, 1370.0, 1.0, 30.0)
    run(det, x[:n])
    det.note_gap(lost)
    rows = det.process(x[n + lost:], n + lost)
    # 0.02 deg: the triangle-hold section interpolates its input across the
    # gap, a one-sample blip of about 1/(2 fs tau) that the state then forgets
    assert np.all(np.abs(rows["phase_deg"] - 30.0) < 0.02)
    assert abs(rows[-1]["phase_deg"] - 30.0) < 1e-4


def test_internal_reference_exact_after_ten_hours_at_192k():
    # closed form (k f / fs) mod 1 in exact rational arithmetic
    fs = 192000.0
    det = lockin(fs=fs, frequency_hz=1370.3, tau=0.01)
    start = int(fs * 3600 * 10) + 17
    cycles = det._internal_cycles(start, 4096).copy()
    ratio = Fraction(1370.3) / Fraction(fs)
    for j in (0, 1, 2047, 4095):
        exact = ((start + j) * ratio) % 1
        err = (Fraction(cycles[j]) - exact + Fraction(1, 2)) % 1 - Fraction(1, 2)
        assert abs(err) < 1e-12


# -- output low-pass: ENBW and settling -------------------------------------
@pytest.mark.parametrize("slope,enbw_tau", [(6, 1 / 4), (12, 1 / 8), (18, 3 / 32), (24, 5 / 64)])
def test_enbw_closed_form_and_numerical(slope, enbw_tau):
    # REFERENCES row 3a (Meade 1983, from memory; numbers confirmed): ENBW of n RC sections
    tau = 0.01
    det = lockin(tau=tau, slope=slope)
    assert det.enbw_hz == pytest.approx(enbw_tau / tau, rel=1e-12)
    # integrate |H|^2 of the discrete filter at fs*tau = 480 (scipy.signal.freqz)
    w, h = freqz(det.b, det.a, worN=2 ** 18, fs=FS)
    h2 = np.abs(h) ** (2 * det.n_sections)
    assert np.trapezoid(h2, w) == pytest.approx(det.enbw_hz, rel=0.005)


STEP_99 = {6: 4.605, 12: 6.638, 18: 8.406, 24: 10.045}
STEP_999 = {6: 6.908, 12: 9.233, 18: 11.229, 24: 13.062}


@pytest.mark.parametrize("slope", [6, 12, 18, 24])
def test_step_settling(slope):
    # REFERENCES row 3c (DLMF 8.2, regularised incomplete gamma P(n, t/tau))
    tau = 0.005
    det = make_detector(DetectorSpec.from_mapping(
        {"type": "rms", "time_constant_s": tau, "slope_db_oct": slope}, FS), None, FS, 1)
    for fraction, table in ((0.99, STEP_99), (0.999, STEP_999)):
        assert det.settling_s(fraction) == pytest.approx(table[slope] * tau, rel=2e-4)
    # the detector's own step response: RMS of a unit DC step is sqrt(step response)
    step = run(det, np.ones(int(20 * tau * FS)), block=1000)["amplitude"] ** 2
    for fraction in (0.99, 0.999):
        first = np.argmax(step >= fraction) / FS
        assert abs(first - det.settling_s(fraction)) <= 1 / FS


# -- measured reference ------------------------------------------------------
def test_measured_square_reference_tracks_and_relocks(caplog):
    f, ref_deg, sig_deg, amp = 1370.3, 40.0, 70.0, 0.2
    n = int(3.0 * FS)
    k = np.arange(n)
    ref = np.sign(np.cos(2 * np.pi * f * k / FS + np.radians(ref_deg)))
    off0, off1 = int(1.5 * FS), int(2.0 * FS)
    ref[off0:off1] = 0.0  # reference removed for 0.5 s
    sig = tone(n, f, amp, sig_deg)
    det = lockin(tau=0.05, out=480, frequency_hz=1370.0, channel=1)
    with caplog.at_level(logging.WARNING, logger="livefilt.dsp.detect"):
        rows = run(det, sig, block=256, ref=ref)
    settled = rows[(rows["index"] >= 1.0 * FS) & (rows["index"] < off0)]
    assert settled["locked"].all()
    # tracked frequency within 0.01 Hz, amplitude (closed form A/sqrt2) within 0.5 %,
    # phase (signal minus reference) within 1 degree
    assert np.all(np.abs(settled["ref_hz"] - f) < 0.01)
    np.testing.assert_allclose(settled["amplitude"], amp / math.sqrt(2), rtol=0.005)
    assert np.all(np.abs(settled["phase_deg"] - (sig_deg - ref_deg)) < 1.0)
    gone = rows[(rows["index"] >= off0 + 0.01 * FS) & (rows["index"] < off1)]
    assert not gone["locked"].any()
    back = rows[rows["index"] >= off1 + 0.5 * FS]
    assert back["locked"].all()
    assert np.all(np.abs(back["ref_hz"] - f) < 0.01)
    assert sum("lost lock" in r.message for r in caplog.records) == 1


def test_measured_sine_reference_without_expected_frequency():
    f = 977.7
    n = int(1.5 * FS)
    ref = 0.3 * np.sin(2 * np.pi * f * np.arange(n) / FS) + 0.05  # sine, offset
    sig = tone(n, f, 1.0, -90.0 + 25.0)  # sin is cos at -90 deg; signal leads by 25
    det = lockin(tau=0.05, frequency_hz=None, channel=1, waveform="sine")
    rows = run(det, sig, ref=ref)
    last = rows[-1]
    assert last["locked"]
    assert last["ref_hz"] == pytest.approx(f, abs=0.01)
    assert last["phase_deg"] == pytest.approx(25.0, abs=1.0)


def test_frequency_outside_lock_range_is_not_locked():
    n = int(0.5 * FS)
    ref = np.sign(tone(n, 2000.0))
    det = lockin(frequency_hz=1370.0, channel=1, lock_range=0.2)
    rows = run(det, tone(n, 2000.0), ref=ref)
    assert not rows["locked"].any()


# -- block-split invariance --------------------------------------------------
N_SPLIT = 12000
_rng = np.random.default_rng(7)
X_SPLIT = tone(N_SPLIT, 1370.3, 0.5, 20.0) + _rng.normal(0, 0.1, N_SPLIT)
REF_SPLIT = np.sign(tone(N_SPLIT, 1370.3, 1.0, -15.0))


def _same(a, b):
    np.testing.assert_array_equal(a["index"], b["index"])
    np.testing.assert_array_equal(a["locked"], b["locked"])
    for name in FLOATS:
        np.testing.assert_allclose(a[name], b[name], rtol=1e-9, atol=1e-12, equal_nan=True)


@settings(max_examples=15, deadline=None)
@given(st.lists(st.integers(1, 3000), min_size=1, max_size=30),
       st.sampled_from([1, 7, 480]))
def test_rows_do_not_depend_on_block_split(sizes, out):
    # scipy.signal's own habit: split-and-continue equals one shot
    makers = [
        lambda: lockin(tau=0.005, out=out, window=0.05),
        lambda: lockin(tau=0.005, out=out, window=0.05, frequency_hz=1370.0, channel=1),
        lambda: make_detector(DetectorSpec.from_mapping(
            {"type": "rms", "time_constant_s": 0.005, "noise_window_s": 0.05}, FS), None, FS, out),
    ]
    for make in makers:
        one = make().process(X_SPLIT, 0, REF_SPLIT)
        split = run(make(), X_SPLIT, block=sizes, ref=REF_SPLIT)
        assert one.dtype == READING_DTYPE
        assert len(one) == len(range(0, N_SPLIT, out))
        _same(one, split)


# -- RMS detector ------------------------------------------------------------
def test_rms_detector_reads_sine_rms():
    # closed form: a sine of amplitude A has rms A/sqrt(2)
    # window 1.5 s (was 0.3 s: at tau 0.05 s, 24 dB/oct that holds half an
    # independent sample, and the noise estimate now reads NaN below 2 degrees
    # of freedom instead of a biased number; livefilt.dsp.noise)
    det = make_detector(DetectorSpec.from_mapping(
        {"type": "rms", "time_constant_s": 0.05, "noise_window_s": 1.5}, FS), None, FS, 480)
    assert isinstance(det, RmsDetector)
    rows = run(det, tone(int(2.5 * FS), 733.0, 0.8))
    last = rows[-1]
    assert last["amplitude"] == pytest.approx(0.8 / math.sqrt(2), rel=1e-4)
    assert last["quadrature"] == 0.0 and math.isnan(last["phase_deg"])
    assert last["snr_db"] > 40  # steady tone: little spread of the amplitude


def test_noise_and_snr_never_raise_on_silence():
    # 20000 samples (was 1000): the noise estimate now needs 2 effective degrees
    # of freedom (livefilt.dsp.noise), and 373 settled rows of a 1 ms low-pass
    # sampled every sample hold far fewer
    det = lockin(tau=0.001, out=1)  # settles (99.9 %) within 627 samples (REFERENCES row 3c)
    rows = det.process(np.zeros(20000), 0)
    assert math.isnan(rows[0]["noise"])  # still settling
    assert rows[-1]["noise"] == 0.0
    assert math.isnan(rows[-1]["snr_db"])
    det.reset()
    assert det.process(np.zeros(3), 0)["index"].tolist() == [0, 1, 2]


def test_noise_window_uses_what_there_is():
    # the sample variance (ddof 1) of the rows so far, then of the last window
    # only, times the correlation factor (m - 1) / (m - A/m) of WindowTables
    # (was the plain ddof-1 figure, biased low for correlated rows: issue 13);
    # NaN below 2 effective degrees of freedom
    det = make_detector(DetectorSpec.from_mapping(
        {"type": "rms", "time_constant_s": 2 / FS, "slope_db_oct": 6,
         "noise_window_s": 10 / FS}, FS), None, FS, 1)
    # rows while the output low-pass settles (99.9 %, REFERENCES row 3c) read NaN
    # and stay out of the window
    k = int(np.ceil(det.settling_s(0.999) * FS))
    x = np.random.default_rng(3).normal(size=k + 40)
    rows = det.process(x, 0)
    amp = rows["amplitude"]
    tab = det.tables
    assert np.isnan(rows["noise"][:k]).all() and np.isnan(rows["snr_db"][:k]).all()
    assert math.isnan(rows["noise"][k])  # one row: no variance yet
    for j, m in ((5, 6), (30, 10)):
        got = rows["noise"][k + j]
        if tab.dof[m] < 2:
            assert math.isnan(got)
            continue
        want = np.std(amp[k + j + 1 - m:k + j + 1], ddof=1) * math.sqrt(tab.factor[m])
        assert got == pytest.approx(want, rel=1e-9)
        assert rows["noise_u"][k + j] == pytest.approx(1 / math.sqrt(2 * tab.dof[m]))
    assert tab.dof[10] >= 2  # the full window does read
    mean = np.mean(amp[k + 21:k + 31])
    assert rows["snr_db"][k + 30] == pytest.approx(20 * np.log10(mean / rows["noise"][k + 30]))


# -- settings ----------------------------------------------------------------
def test_specs_round_trip_and_defaults():
    ref = ReferenceSpec.from_mapping({"frequency_hz": 1370, "channel": 1}, FS, 2)
    assert ref == ReferenceSpec(1370.0, 0.0, 1, "square", 0.2)
    assert ReferenceSpec.from_mapping(ref.to_mapping(), FS, 2) == ref
    det = DetectorSpec.from_mapping({"time_constant_s": 0.2}, FS)
    # default window: 32 effective degrees of freedom (livefilt.dsp.noise), 149.8
    # time constants at 24 dB/oct (was 20 time constants, 4 s: 3 independent rows)
    assert (det.type, det.slope_db_oct, det.sections) == ("lockin", 24, 4)
    assert det.noise_window_s == pytest.approx(149.8 * 0.2, rel=1e-3)
    assert DetectorSpec.from_mapping(det.to_mapping(), FS) == det
    assert DetectorSpec.from_mapping({"time_constant_s": 0.01}, FS).noise_window_s == 2.0
    assert isinstance(make_detector(det, ref, FS, 100), LockIn)


@pytest.mark.parametrize("table,field,match", [
    ({"frequency_hz": 1370, "colour": 1}, "colour", "unknown key; a \\[reference\\] table takes: frequency_hz"),
    ({"frequency_hz": "fast"}, "frequency_hz", "must be a finite number"),
    ({"frequency_hz": True}, "frequency_hz", "must be a finite number"),
    ({"frequency_hz": 0}, "frequency_hz", "above 0 and below Nyquist, 24000 Hz"),
    ({"frequency_hz": 24000}, "frequency_hz", "below Nyquist, 24000 Hz"),
    ({"frequency_hz": float("nan")}, "frequency_hz", "must be a finite number"),
    ({"frequency_hz": 1370, "phase_deg": "x"}, "phase_deg", "must be a finite number"),
    ({"channel": 1.0}, "channel", "must be an input channel number"),
    ({"channel": True}, "channel", "must be an input channel number"),
    ({"channel": 2}, "channel", "must be an input channel, 0 to 1"),
    ({"channel": -1}, "channel", "must be an input channel, 0 to 1"),
    ({}, "frequency_hz", "a lock-in needs frequency_hz or channel"),
    ({"phase_deg": 10}, "frequency_hz", "a lock-in needs frequency_hz or channel"),
    ({"channel": 1, "waveform": "triangle"}, "waveform", '"square" or "sine"'),
    ({"frequency_hz": 1370, "lock_range": 0}, "lock_range", "above 0 and below 1"),
    ({"frequency_hz": 1370, "lock_range": 1.5}, "lock_range", "above 0 and below 1"),
])
def test_reference_setting_errors(table, field, match):
    with pytest.raises(SettingError, match=match) as info:
        ReferenceSpec.from_mapping(table, FS, 2)
    assert info.value.field == field
    assert info.value.within("reference").field == f"reference.{field}"


@pytest.mark.parametrize("table,field,match", [
    ({"time_constant_s": 0.1, "order": 2}, "order", "unknown key; a detector takes: type"),
    # (the allowed list grew by "boxcar", issue 13 section 5)
    ({"type": "peak", "time_constant_s": 0.1}, "type", 'must be one of: lockin, rms, boxcar'),
    ({"type": "boxcar"}, "settling_s", "is required for a boxcar"),
    ({"type": "boxcar", "settling_s": 0.1, "time_constant_s": 0.1}, "time_constant_s",
     "unknown key; a boxcar detector takes: type, settling_s"),
    ({"type": "rms"}, "time_constant_s", "is required"),
    ({"time_constant_s": "slow"}, "time_constant_s", "must be a finite number"),
    ({"time_constant_s": -1}, "time_constant_s", "at least 2 sample periods, 4.16667e-05 s"),
    ({"time_constant_s": 1 / FS}, "time_constant_s", "at least 2 sample periods"),
    ({"time_constant_s": 0.1, "slope_db_oct": 20}, "slope_db_oct", "6, 12, 18 or 24"),
    ({"time_constant_s": 0.1, "slope_db_oct": True}, "slope_db_oct", "6, 12, 18 or 24"),
    ({"time_constant_s": 0.1, "slope_db_oct": "24"}, "slope_db_oct", "6, 12, 18 or 24"),
    ({"time_constant_s": 0.1, "noise_window_s": 0}, "noise_window_s", "above 0 s"),
    ({"time_constant_s": 0.1, "noise_window_s": None}, "noise_window_s", "finite number"),
])
def test_detector_setting_errors(table, field, match):
    with pytest.raises(SettingError, match=match) as info:
        DetectorSpec.from_mapping(table, FS)
    assert info.value.field == field


def test_make_detector_and_settling_errors():
    spec = DetectorSpec.from_mapping({"time_constant_s": 0.1}, FS)
    with pytest.raises(SettingError, match="a lock-in needs frequency_hz or channel") as info:
        make_detector(spec, None, FS, 10)
    assert info.value.field == "reference"
    ref = ReferenceSpec.from_mapping({"frequency_hz": 1000}, FS, 1)
    with pytest.raises(SettingError, match="output_every = 0: must be a whole number"):
        make_detector(spec, ref, FS, 0)
    with pytest.raises(SettingError, match="fraction = 1.0: must be above 0 and below 1"):
        make_detector(spec, ref, FS, 10).settling_s(1.0)
