"""A chain on paper: what the front end, the digital stages and the detector will do
before anything runs.  The design report and the window's design view both read
their numbers from here, so a number reads the same in both.

API
---
- :class:`DesignSpec`: the ``[design]`` table (extra interferer lines, a measured
  point for predictions).
- :func:`interferer_lines`: DC, mains and harmonics, lamp flicker, the listed lines.
- :func:`detector_figures`: ENBW, settling and the baseband response of one
  detector (one function per detector type; see :data:`DETECTOR_FIGURES`).
- :func:`digital_response`, :func:`digital_group_delay`: the chain's digital stages.
- :func:`chain_on_paper`: every figure of one chain (:class:`ChainPaper`).
- :func:`step_response`: the amplitude at the detector output after the
  modulation switches on (simulated through front end, stages and detector).
- :func:`fold_hz`, :func:`alias_lines`: where lines above Nyquist land.
- :func:`predicted_snr_db`, :func:`range_at_m`: SNR against distance from a
  measured point (``amplitude ~ d^-k``, noise ``e sqrt(ENBW)``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, NamedTuple, Sequence

import numpy as np
import scipy  # its submodules load on first use: scipy.signal alone takes ~1 s, kept off the start-up path

from livefilt.dsp import frontend as front
from livefilt.dsp.design import StageSpec, chain_sos, frequency_response
from livefilt.dsp.detect import DetectorSpec, ReferenceSpec, make_detector
from livefilt.errors import SettingError

__all__ = ["DesignSpec", "Line", "interferer_lines", "MAINS_WANDER_HZ", "DetectorFigures", "detector_figures",
           "DETECTOR_FIGURES", "digital_response", "digital_group_delay", "ChainPaper",
           "chain_on_paper", "step_response", "fold_hz", "alias_lines",
           "predicted_snr_db", "range_at_m", "to_db", "FLOOR_DB", "SETTLE_FRACTION"]

#: Attenuations below this are written as this: blocked (a zero of the response, or
#: deeper than double-precision sections can tell apart from one).
FLOOR_DB = -200.0
#: "Settled": within 1 % of the final amplitude and staying there (99 % settling).
SETTLE_FRACTION = 0.99
#: How far the mains frequency wanders, +-Hz (REFERENCES row 8, the wider end).
MAINS_WANDER_HZ = 0.2
#: The detection band's edge: where the detector's own low-pass rejects 40 dB.
BAND_REJECTION_DB = 40.0


@dataclass(frozen=True)
class DesignSpec:
    """The ``[design]`` table.

    Attributes
    ----------
    interferers_hz : tuple of float
        Extra lines the user knows about (a PWM driver, a switching supply), Hz.
    signal_at : (distance_m, amplitude) or None
        A measured point: the signal's RMS amplitude at the digitizer input (input
        units, as a lock-in with unit gain at the reference reads it) at a distance.
    noise_density : float or None
        White noise near the reference at the digitizer input, one-sided, input
        units per root hertz.
    exponent : float
        Amplitude falls as ``d^-exponent`` (about 2: the target fills the beam;
        about 4: a small target inside the spot; common practice, REFERENCES row 9).
    snr_db : float
        The detection threshold for the predicted range, dB.
    """

    interferers_hz: tuple[float, ...] = ()
    signal_at: tuple[float, float] | None = None
    noise_density: float | None = None
    exponent: float = 2.0
    snr_db: float = 10.0

    @classmethod
    def from_mapping(cls, table: Mapping[str, Any]) -> "DesignSpec":
        """Validate ``[design]``; fields relative to it."""
        known = ("interferers_hz", "signal_at", "noise_density", "exponent", "snr_db")
        if not isinstance(table, Mapping):
            raise SettingError("", table, "must be a table")
        for k in table:
            if k not in known:
                raise SettingError(k, table[k], "unknown key; [design] takes: " + ", ".join(known))
        lines = table.get("interferers_hz", [])
        if not isinstance(lines, list):
            raise SettingError("interferers_hz", lines, "must be a list of frequencies in Hz, e.g. [1000, 25000]")
        hz = []
        for i, f in enumerate(lines):
            if isinstance(f, bool) or not isinstance(f, (int, float)) or not 0 < f < 1e9:
                raise SettingError(f"interferers_hz[{i}]", f, "must be a frequency above 0 and below 1e9 Hz")
            hz.append(float(f))
        point = table.get("signal_at")
        sig = None
        if point is not None:
            if not isinstance(point, Mapping) or set(point) != {"distance_m", "amplitude"}:
                raise SettingError("signal_at", point, "must be a table {distance_m = 1.0, amplitude = 0.002} "
                                   "(RMS amplitude at the digitizer input, input units)")
            sig = (_pos(point["distance_m"], "signal_at.distance_m", "m"),
                   _pos(point["amplitude"], "signal_at.amplitude", "(input units, RMS)"))
        noise = table.get("noise_density")
        if noise is not None:
            noise = _pos(noise, "noise_density", "(input units per root hertz)")
        if (sig is None) != (noise is None):
            missing = "noise_density" if noise is None else "signal_at"
            raise SettingError(missing, None, "required for a prediction: give both signal_at and noise_density")
        exponent = table.get("exponent", 2.0)
        if isinstance(exponent, bool) or not isinstance(exponent, (int, float)) or not 0.5 <= exponent <= 8:
            raise SettingError("exponent", exponent, "must be a number from 0.5 to 8 (amplitude ~ distance^-exponent)")
        snr = table.get("snr_db", 10.0)
        if isinstance(snr, bool) or not isinstance(snr, (int, float)) or not -20 <= snr <= 80:
            raise SettingError("snr_db", snr, "must be a number from -20 to 80 dB")
        return cls(tuple(hz), sig, noise, float(exponent), float(snr))

    def to_mapping(self) -> dict[str, Any]:
        out: dict[str, Any] = {}
        if self.interferers_hz:
            out["interferers_hz"] = list(self.interferers_hz)
        if self.signal_at is not None:
            out["signal_at"] = {"distance_m": self.signal_at[0], "amplitude": self.signal_at[1]}
            out["noise_density"] = self.noise_density
        if self.exponent != 2.0:
            out["exponent"] = self.exponent
        if self.snr_db != 10.0:
            out["snr_db"] = self.snr_db
        return out


class Line(NamedTuple):
    """A line to check: label, frequency (Hz) and how far it wanders (+- Hz)."""

    label: str
    hz: float
    wander_hz: float = 0.0


def interferer_lines(mains_hz: float, listed: Sequence[float] = ()) -> list[Line]:
    """Lines to check: DC, mains and its harmonics up to the 10th (the 2nd is also the
    lamps' flicker), then the listed lines.

    The grid's frequency wanders by +-0.1 to 0.2 Hz (REFERENCES row 8), so mains
    harmonic k is checked over +-k x 0.2 Hz: a notch's exact zero at 50.000 Hz is
    not what the bench sees.
    """
    out = [Line("DC (sunlight, offsets)", 0.0)]
    for k in range(1, 11):
        label = (f"mains {mains_hz:g} Hz" if k == 1 else
                 "lamp flicker / mains x2" if k == 2 else f"mains x{k}")
        out.append(Line(label, k * float(mains_hz), k * MAINS_WANDER_HZ))
    for f in listed:
        out.append(Line(f"listed line {_hz(f)}", float(f)))
    return out


@dataclass(frozen=True)
class DetectorFigures:
    """What a detector costs and gives: ENBW (one-sided, Hz), its own 99 % settling
    after an amplitude step (s), and its baseband response (a function of the
    offset from the reference in Hz, or None when it does not select frequency)."""

    kind: str
    enbw_hz: float
    settling_s: float
    baseband: Callable[[np.ndarray], np.ndarray] | None

    @property
    def enbw_settling(self) -> float:
        """ENBW x settling: the lag-noise figure of merit (lower is better)."""
        return self.enbw_hz * self.settling_s


def _lowpass_detector(det, spec: DetectorSpec, fs: float) -> DetectorFigures:
    """Lock-in and RMS detector: n equal output sections (livefilt.dsp.detect)."""
    b, a, n = det.b, det.a, det.n_sections

    def baseband(offset_hz):
        h = scipy.signal.freqz(b, a, worN=np.abs(np.atleast_1d(offset_hz)), fs=fs)[1]
        return h ** n

    return DetectorFigures(spec.type, float(det.enbw_hz), float(det.settling_s(SETTLE_FRACTION)),
                           baseband if spec.type == "lockin" else None)


def _generic_detector(det, spec: DetectorSpec, fs: float) -> DetectorFigures:
    """Any detector with ``enbw_hz``, ``settling_s(fraction)`` and, if it selects
    frequency, ``baseband_response(offset_hz)``."""
    fn = getattr(det, "baseband_response", None)
    return DetectorFigures(spec.type, float(det.enbw_hz), float(det.settling_s(SETTLE_FRACTION)), fn)


#: One function per detector type; a new detector adds its row (or offers the
#: generic contract: enbw_hz, settling_s(fraction), baseband_response(offset_hz)).
DETECTOR_FIGURES: dict[str, Callable[[Any, DetectorSpec, float], DetectorFigures]] = {
    "lockin": _lowpass_detector,
    "rms": _lowpass_detector,
}


def detector_figures(spec: DetectorSpec, ref_hz: float, fs: float) -> DetectorFigures:
    """ENBW, settling and baseband response of the detector ``spec`` at rate ``fs``,
    read from the detector itself (:func:`livefilt.dsp.detect.make_detector`)."""
    det = make_detector(spec, ReferenceSpec(frequency_hz=ref_hz), fs, 1, exact_path=True)
    return DETECTOR_FIGURES.get(spec.type, _generic_detector)(det, spec, fs)


def digital_response(stages: Sequence[StageSpec], freqs_hz, fs: float) -> np.ndarray:
    """Complex response of the digital stages (:func:`scipy.signal.sosfreqz` of the
    sections the chain runs)."""
    return frequency_response(chain_sos(stages, fs), freqs_hz, fs)


def digital_group_delay(stages: Sequence[StageSpec], freqs_hz, fs: float) -> np.ndarray:
    """Group delay (s) of the digital stages from their sections' roots.

    For ``prod (1 - z_k e^{-jw}) / prod (1 - p_k e^{-jw})`` the delay in samples is
    ``sum_p Re(p e^{-jw} / (1 - p e^{-jw})) - sum_z Re(z e^{-jw} / (1 - z e^{-jw}))``
    (the derivative of the phase; closed form), plus one sample per leading zero
    coefficient of a numerator.
    """
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    e = np.exp(-2j * np.pi * f / fs)
    tau = np.zeros(f.shape)
    for row in chain_sos(stages, fs):
        b, a = np.trim_zeros(row[:3], "b"), np.trim_zeros(row[3:], "b")
        lead = 0
        while b.size and b[0] == 0:
            b, lead = b[1:], lead + 1
        tau += lead
        for roots, sign in ((np.roots(a), 1.0), (np.roots(b), -1.0)):
            for r in roots:
                with np.errstate(divide="ignore", invalid="ignore"):
                    tau += sign * np.real(r * e / (1 - r * e))
    return tau / fs


@dataclass
class ChainPaper:
    """Every figure of one chain at its reference (see :func:`chain_on_paper`)."""

    name: str
    ref_hz: float
    gain: complex
    group_delay_s: float
    detector: DetectorFigures
    interferers: list[dict] = field(default_factory=list)
    band_hz: tuple[float, float] = (0.0, 0.0)
    settling_s: float = math.nan
    ripple_pct: float = math.nan
    step: tuple[np.ndarray, np.ndarray] | None = None

    @property
    def gain_db(self) -> float:
        return to_db(abs(self.gain))


def chain_on_paper(name: str, stages: Sequence[StageSpec], detector: DetectorSpec,
                   frontend_: front.Frontend | None, fs: float, ref_hz: float,
                   lines: Sequence[Line], simulate: bool = True) -> ChainPaper:
    """Gain, group delay, ENBW, settling and interferer rejection of one chain.

    Gain and group delay at the reference are front end x digital stages.  Each
    line below Nyquist gets ``attenuation_db`` (front end and stages, relative to
    the reference, the worst over the line's wander) and, for a frequency-selective detector, ``lockin_rejection_db``
    (the detector's low-pass at the line's offset from the reference), kept apart.
    With ``simulate`` the chain's own 99 % settling after an amplitude step at the
    reference (:func:`step_response`).
    """
    nyq = fs / 2
    det = detector_figures(detector, ref_hz, fs)
    h_ref = front.response(frontend_, [ref_hz])[0] * digital_response(stages, [ref_hz], fs)[0]
    gd = float(front.group_delay(frontend_, [ref_hz])[0] + digital_group_delay(stages, [ref_hz], fs)[0])
    rows = []
    for ln in lines:
        if ln.hz >= nyq:
            continue
        # worst case over the line's wander: the largest gain, the smallest offset
        f = np.unique(np.clip(np.linspace(ln.hz - ln.wander_hz, ln.hz + ln.wander_hz,
                                          41 if ln.wander_hz else 1), 0.0, nyq * 0.99999))
        h = np.abs(front.response(frontend_, f) * digital_response(stages, f, fs))
        row = {"label": ln.label, "hz": ln.hz, "attenuation_db": to_db(float(h.max()) / abs(h_ref))}
        if ln.wander_hz:
            row["wander_hz"] = ln.wander_hz
        if det.baseband is not None:
            off = float(np.min(np.abs(f - ref_hz)))
            row["lockin_rejection_db"] = to_db(abs(det.baseband(np.array([off]))[0]))
        rows.append(row)
    band = detection_band(det, stages, frontend_, fs, ref_hz)
    paper = ChainPaper(name, ref_hz, complex(h_ref), gd, det, rows, band)
    if simulate:
        t, amp, settle, ripple = step_response(stages, detector, frontend_, fs, ref_hz, det)
        paper.step, paper.settling_s, paper.ripple_pct = (t, amp), settle, ripple
    return paper


def detection_band(det: DetectorFigures, stages, frontend_, fs: float,
                   ref_hz: float) -> tuple[float, float]:
    """Frequencies the detector reads as signal: for a frequency-selective detector
    the offsets where its low-pass rejects less than 40 dB; otherwise the chain's
    -3 dB band around the reference (an RMS detector reads all it passes)."""
    nyq = fs / 2
    if det.baseband is not None:
        off = np.geomspace(1e-3, nyq, 4000)
        rej = -_db_arr(np.abs(det.baseband(off)))
        half = off[np.argmax(rej >= BAND_REJECTION_DB)] if np.any(rej >= BAND_REJECTION_DB) else nyq
        return (max(0.0, ref_hz - half), min(nyq, ref_hz + half))
    f = np.geomspace(min(1.0, ref_hz / 10), nyq * 0.9999, 6000)
    h = np.abs(front.response(frontend_, f) * digital_response(stages, f, fs))
    href = abs(front.response(frontend_, [ref_hz])[0] * digital_response(stages, [ref_hz], fs)[0])
    inside = h >= href / math.sqrt(2)
    i = int(np.searchsorted(f, ref_hz))
    lo_i, hi_i = i, min(i, f.size - 1)
    while lo_i > 0 and inside[lo_i - 1]:
        lo_i -= 1
    while hi_i < f.size - 1 and inside[hi_i + 1]:
        hi_i += 1
    return (float(f[lo_i]) if lo_i > 0 else 0.0, float(f[hi_i]))


def step_response(stages: Sequence[StageSpec], detector: DetectorSpec,
                  frontend_: front.Frontend | None, fs: float, ref_hz: float,
                  det: DetectorFigures | None = None, max_s: float = 60.0):
    """Amplitude at the detector output after a sine at the reference switches on.

    Simulated: ``sin(2 pi f k / fs)`` from sample 0 through the front end
    (:func:`livefilt.dsp.frontend.discrete`, gain matched at the reference), the
    chain's sections (:func:`scipy.signal.sosfilt` from rest) and the detector
    itself (:func:`livefilt.dsp.detect.make_detector`, internal reference).

    Returns
    -------
    t_s, amplitude : ndarray
        Time and amplitude relative to the final value ``|H(f_ref)| / sqrt 2``.
    settling_s : float
        Last time outside 1 % of the final value; NaN when the output never stays
        inside (a ripple at twice the reference larger than the band).
    ripple_pct : float
        Largest departure from the final value over the last tenth, percent.
    """
    det = det or detector_figures(detector, ref_hz, fs)
    sos_front = front.discrete(frontend_, fs, match_hz=ref_hz)
    sos = chain_sos(stages, fs)
    # long enough for the detector and the slowest pole of any filter to settle
    slow = _slowest_s(np.vstack([sos_front, sos]), fs)
    dur = min(max_s, max(4 * det.settling_s, 12 * slow, 40.0 / ref_hz, 0.02))
    n = int(dur * fs)
    every = max(1, n // 200_000)
    x = np.sin(2 * np.pi * ref_hz * np.arange(n) / fs)
    y = scipy.signal.sosfilt(sos, scipy.signal.sosfilt(sos_front, x))
    d = make_detector(detector, ReferenceSpec(frequency_hz=ref_hz), fs, every)
    rows = d.process(y, 0)
    final = abs(front.response(frontend_, [ref_hz])[0] * digital_response(stages, [ref_hz], fs)[0]) / math.sqrt(2)
    t = rows["index"] / fs
    rel = rows["amplitude"] / final
    out = np.abs(rel - 1) > 1 - SETTLE_FRACTION
    tail = rel[int(0.9 * rel.size):]
    ripple = float(np.max(np.abs(tail - 1)) * 100)
    if out[int(0.9 * out.size):].any():
        settle = math.nan
    else:
        last = np.flatnonzero(out)
        settle = float(t[last[-1] + 1]) if last.size else 0.0
    return t, rel, settle, ripple


def fold_hz(f: float, fs: float) -> float:
    """Where a line at ``f`` lands after sampling at ``fs`` (0 to Nyquist)."""
    r = math.fmod(f, fs)
    return r if r <= fs / 2 else fs - r


def alias_lines(lines: Sequence[Line], frontend_: front.Frontend | None,
                fs: float, ref_hz: float) -> list[dict]:
    """Lines at or above Nyquist: where each folds to and how much the front end
    leaves of it relative to the reference (``front_end_db``)."""
    href = abs(front.response(frontend_, [ref_hz])[0])
    out = []
    for label, f, _ in lines:
        if f >= fs / 2:
            out.append({"label": label, "hz": f, "folds_to_hz": fold_hz(f, fs),
                        "front_end_db": to_db(abs(front.response(frontend_, [f])[0]) / href)})
    return out


def predicted_snr_db(distance_m, point: tuple[float, float], noise_density: float,
                     exponent: float, enbw_hz: float) -> np.ndarray:
    """SNR (dB) against distance: ``20 log10(A0 (d0/d)^k / (e sqrt(ENBW)))``.

    The amplitude scales from the measured point ``(d0, A0)`` as ``d^-k``; the
    noise of white input of one-sided density ``e`` behind a detector of ENBW B
    is ``e sqrt(B)`` (one-sided, REFERENCES row 3a; the range report reads noise
    the same way).
    """
    d = np.asarray(distance_m, dtype=float)
    d0, a0 = point
    return 20 * np.log10(a0 * (d0 / d) ** exponent / (noise_density * math.sqrt(enbw_hz)))


def range_at_m(threshold_db: float, point: tuple[float, float], noise_density: float,
               exponent: float, enbw_hz: float) -> float:
    """Distance (m) where :func:`predicted_snr_db` falls to ``threshold_db``."""
    d0, a0 = point
    ratio = a0 / (noise_density * math.sqrt(enbw_hz) * 10 ** (threshold_db / 20))
    return d0 * ratio ** (1.0 / exponent)


# --------------------------------------------------------------------------- private

def _slowest_s(sos: np.ndarray, fs: float) -> float:
    radius = 0.0
    for row in sos:
        for p in np.roots(row[3:]):
            radius = max(radius, abs(p))
    if radius <= 0:
        return 0.0
    if radius >= 1:
        return math.inf
    return -1.0 / (fs * math.log(radius))


def to_db(x: float) -> float:
    """``20 log10(x)``, no lower than :data:`FLOOR_DB` (0 gives the floor)."""
    return float(max(FLOOR_DB, 20 * math.log10(x))) if x > 0 else FLOOR_DB


def _db_arr(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.maximum(FLOOR_DB, 20 * np.log10(x))


def _pos(v: Any, field: str, unit: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
        raise SettingError(field, v, f"must be a number > 0 {unit}")
    return float(v)


def _hz(f: float) -> str:
    from livefilt.units import si
    return si(f, "Hz", 4)
