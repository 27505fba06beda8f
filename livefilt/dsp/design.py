"""Filter stages: validated settings and their second-order sections.

A chain's ``stages`` list in the config is a list of TOML tables; each becomes
a :class:`StageSpec` through :meth:`StageSpec.from_mapping`, which checks every
key against the sample rate and refuses anything that would not run (one-line
:class:`~livefilt.errors.SettingError` naming the key, the value and what is
allowed).  The designs are thin fronts to :mod:`scipy.signal`.

API
---
- :class:`StageSpec`: one stage's settings (frozen); ``from_mapping`` / ``to_mapping``.
- :func:`stage_sos`, :func:`chain_sos`: second-order sections, scipy layout (n, 6).
- :func:`rc_analog`, :func:`analog_cutoff_hz`: analog model of RC stages.
- :func:`frequency_response`: complex response of sections at given frequencies.
- :func:`describe`: a short human label of a stage.
- :func:`parse_si`: component values written as ``"4.7k"``, ``"4k7"``, ``"100n"``.

Stage tables (``type`` required; ``gain_db``, default 0, allowed on every stage)::

    {type = "lowpass" | "highpass", design = "butterworth", order = 2, cutoff_hz = ...,
     ripple_db = 1.0, stop_db = 40}
    {type = "bandpass" | "bandstop", design = ..., order = 2, band_hz = [low, high], ...}
    {type = "notch", at_hz = 50, harmonics = 1, q = 30}
    {type = "rc", r_ohm = "10k", c_farad = "1n", sections = 1, buffered = true,
     response = "lowpass" | "highpass"}

Designs: ``butterworth``, ``bessel``, ``chebyshev1`` (``ripple_db``),
``chebyshev2`` (``stop_db``), ``elliptic`` (both).  Cutoff meaning: Butterworth
and Bessel at -3 dB (Bessel with scipy's ``norm='mag'``, see Notes of
:func:`stage_sos`); Chebyshev I and elliptic at the edge of the ripple band;
Chebyshev II at the edge of the stop band (where ``stop_db`` is first reached),
all as :func:`scipy.signal.iirfilter`.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, fields as _dataclass_fields, replace
from typing import Any, Mapping, Sequence

import numpy as np
import scipy  # its submodules load on first use: scipy.signal alone takes ~1 s, kept off the start-up path

from livefilt import fields
from livefilt.dsp.memo import remembered
from livefilt.errors import SettingError
from livefilt.fields import MISSING as _MISSING, tidy as _tidy

__all__ = [
    "StageSpec",
    "stage_sos",
    "chain_sos",
    "rc_analog",
    "rc_corner_hz",
    "rc_departure",
    "rc_departure_hz",
    "analog_cutoff_hz",
    "frequency_response",
    "describe",
    "parse_si",
    "STAGE_TYPES",
    "DESIGNS",
]

log = logging.getLogger(__name__)

STAGE_TYPES = ("lowpass", "highpass", "bandpass", "bandstop", "notch", "rc")
DESIGNS = ("butterworth", "bessel", "chebyshev1", "chebyshev2", "elliptic")

#: scipy ``iirfilter`` ftype for each design (Bessel normalised at -3 dB).
_FTYPE = {
    "butterworth": "butter",
    "bessel": "bessel_mag",
    "chebyshev1": "cheby1",
    "chebyshev2": "cheby2",
    "elliptic": "ellip",
}
_RIPPLE_DESIGNS = ("chebyshev1", "elliptic")
_STOP_DESIGNS = ("chebyshev2", "elliptic")

_IIR_KEYS = ("design", "order", "ripple_db", "stop_db")
_KEYS = {
    "lowpass": ("cutoff_hz",) + _IIR_KEYS,
    "highpass": ("cutoff_hz",) + _IIR_KEYS,
    "bandpass": ("band_hz",) + _IIR_KEYS,
    "bandstop": ("band_hz",) + _IIR_KEYS,
    "notch": ("at_hz", "harmonics", "q"),
    "rc": ("r_ohm", "c_farad", "sections", "buffered", "response"),
}
_COMMON_KEYS = ("type", "gain_db")

#: Defaults filled in by ``from_mapping`` and left out by ``to_mapping``.
_DEFAULTS = {
    "design": "butterworth",
    "order": 2,
    "ripple_db": 1.0,
    "stop_db": 40.0,
    "harmonics": 1,
    "q": 30.0,
    "sections": 1,
    "buffered": True,
    "response": "lowpass",
    "gain_db": 0.0,
}
_MAX_ORDER = 12
_MAX_RC_SECTIONS = 8
_MAX_GAIN_DB = 200.0
#: A pole closer than this to the unit circle is refused (a time constant of
#: more than 1e10 samples, about 14 hours at 192 kHz: no live use, only risk).
_POLE_MARGIN = 1e-10
#: The cascade of rounded sections must reproduce the exact pole-zero design
#: within this many dB wherever the design is above -60 dB.
_PRECISION_DB = 0.1


@dataclass(frozen=True)
class StageSpec:
    """One filter stage, validated (build it with :meth:`from_mapping`).

    Keys that do not belong to the stage's type (or design) are ``None``;
    defaults are filled in, so two tables meaning the same stage give equal
    specs.  Frequencies in Hz, resistance in ohm, capacitance in farad.
    """

    type: str
    design: str | None = None
    order: int | None = None
    cutoff_hz: float | None = None
    band_hz: tuple[float, float] | None = None
    ripple_db: float | None = None
    stop_db: float | None = None
    at_hz: float | None = None
    harmonics: int | None = None
    q: float | None = None
    r_ohm: float | None = None
    c_farad: float | None = None
    sections: int | None = None
    buffered: bool | None = None
    response: str | None = None
    gain_db: float = 0.0

    @classmethod
    def from_mapping(cls, table: Mapping[str, Any], fs: float) -> "StageSpec":
        """Validate one stage table at sample rate ``fs`` (Hz).

        Checks types, ranges, keys foreign to the stage's type or design,
        unknown keys, Nyquist, band order and the stability and precision of
        the resulting sections.

        Raises
        ------
        SettingError
            With the field relative to the stage (``"cutoff_hz"``, ``"band_hz[1]"``).
        """
        if not isinstance(table, Mapping):
            raise SettingError("", table, "a stage must be a table such as "
                               '{type = "lowpass", cutoff_hz = 1000}')
        kind = table.get("type", _MISSING)
        fields.choice(kind, "type", STAGE_TYPES)
        _check_keys(table, kind)
        nyq = _nyquist(fs)
        get = table.get
        values: dict[str, Any] = {"type": kind}
        values["gain_db"] = fields.number(get("gain_db", 0.0), "gain_db",
                                    -_MAX_GAIN_DB, _MAX_GAIN_DB, "dB", inclusive=True)
        if kind in ("lowpass", "highpass", "bandpass", "bandstop"):
            design = fields.choice(get("design", _DEFAULTS["design"]), "design", DESIGNS)
            values["design"] = design
            values["order"] = fields.integer(get("order", _DEFAULTS["order"]), "order",
                                       1, _MAX_ORDER)
            if "ripple_db" in table and design not in _RIPPLE_DESIGNS:
                raise SettingError("ripple_db", table["ripple_db"],
                                   f"only for designs {' and '.join(_RIPPLE_DESIGNS)} "
                                   f"(this stage is {design})")
            if "stop_db" in table and design not in _STOP_DESIGNS:
                raise SettingError("stop_db", table["stop_db"],
                                   f"only for designs {' and '.join(_STOP_DESIGNS)} "
                                   f"(this stage is {design})")
            if design in _RIPPLE_DESIGNS:
                values["ripple_db"] = fields.positive(get("ripple_db", _DEFAULTS["ripple_db"]),
                                                "ripple_db", "dB")
            if design in _STOP_DESIGNS:
                values["stop_db"] = fields.positive(get("stop_db", _DEFAULTS["stop_db"]),
                                              "stop_db", "dB")
            if design == "elliptic" and values["stop_db"] <= values["ripple_db"]:
                raise SettingError("stop_db", get("stop_db", _DEFAULTS["stop_db"]),
                                   "an elliptic design needs stop_db above ripple_db "
                                   f"({_tidy(values['ripple_db'])} dB)")
            if kind in ("lowpass", "highpass"):
                values["cutoff_hz"] = _below_nyquist(get("cutoff_hz", _MISSING),
                                                     "cutoff_hz", nyq)
            else:
                values["band_hz"] = _band(get("band_hz", _MISSING), nyq)
        elif kind == "notch":
            values["at_hz"] = _below_nyquist(get("at_hz", _MISSING), "at_hz", nyq)
            values["harmonics"] = fields.integer(get("harmonics", _DEFAULTS["harmonics"]),
                                           "harmonics", 1, None)
            values["q"] = fields.positive(get("q", _DEFAULTS["q"]), "q", "(Q = f0 / -3 dB width)")
        else:
            values["r_ohm"] = _component(get("r_ohm", _MISSING), "r_ohm", "ohm")
            values["c_farad"] = _component(get("c_farad", _MISSING), "c_farad", "F")
            values["sections"] = fields.integer(get("sections", _DEFAULTS["sections"]),
                                          "sections", 1, _MAX_RC_SECTIONS)
            values["buffered"] = fields.boolean(get("buffered", _DEFAULTS["buffered"]), "buffered")
            values["response"] = fields.choice(get("response", _DEFAULTS["response"]), "response",
                                               ("lowpass", "highpass"))
        spec = cls(**values)
        stage_sos(spec, fs)  # the checks that need the design itself
        return spec

    def to_mapping(self, full: bool = True) -> dict[str, Any]:
        """The TOML table for this stage: every key that applies, defaults
        included (so a later version with other defaults designs the same
        stage), or with ``full=False`` the minimal table (defaults left out)."""
        out: dict[str, Any] = {}
        for f in _dataclass_fields(self):
            value = getattr(self, f.name)
            if value is None or (not full and f.name in _DEFAULTS
                                 and value == _DEFAULTS[f.name]):
                continue
            out[f.name] = list(value) if isinstance(value, tuple) else value
        return out


def stage_sos(spec: StageSpec, fs: float) -> np.ndarray:
    """Second-order sections of one stage at sample rate ``fs`` (Hz).

    Parameters
    ----------
    spec : StageSpec
    fs : float
        Sample rate in Hz.

    Returns
    -------
    sos : ndarray, shape (n, 6), float64
        scipy layout ``[b0, b1, b2, 1, a1, a2]`` per row; ``gain_db`` is applied
        to the first row's numerator.

    Raises
    ------
    SettingError
        A frequency at or above Nyquist, or a result that is unstable or that
        the rounded sections no longer reproduce (extreme order at a tiny
        cutoff), naming the key to change.

    Notes
    -----
    Low-, high-, band-pass and band-stop are :func:`scipy.signal.iirfilter`
    (``output='zpk'``, then :func:`scipy.signal.zpk2sos`, exactly what
    ``output='sos'`` does).  ``order`` is scipy's: a band-pass or band-stop of
    order n has 2n poles.  Bessel filters have three usual normalisations:
    unit group delay (Thomson), unit -3 dB frequency, and scipy's default
    ``'phase'``; here ``cutoff_hz`` (or each band edge) is the -3 dB
    frequency (``norm='mag'``), like the other designs' cutoff.

    A notch is one :func:`scipy.signal.iirnotch` biquad per harmonic k*at_hz
    (Q = f0 / -3 dB width, [Orfanidis]_).  An RC stage is the analog model of
    :func:`rc_analog` mapped by the bilinear transform
    (:func:`scipy.signal.bilinear_zpk`) prewarped so that the digital -3 dB
    point equals the analog one.

    Designed once per stage and sample rate: later calls, and later runs,
    take the sections from :func:`livefilt.dsp.memo.remembered` (a stage
    refused once is designed, and refused, again each time).

    References
    ----------
    .. [Orfanidis] S. J. Orfanidis, Introduction to Signal Processing,
       Prentice-Hall, 1996, ch. 11.
    """
    key = repr((sorted(spec.to_mapping().items()), float(fs).hex()))
    return remembered("sections", key, lambda: _design_stage(spec, fs))


def _design_stage(spec: StageSpec, fs: float) -> np.ndarray:
    """:func:`stage_sos` without the cache: design and check."""
    nyq = _nyquist(fs)
    if spec.type == "notch":
        sos = _notch_sos(spec, fs, nyq)
        _check_sections(spec, sos, fs)
    else:
        if spec.type == "rc":
            z, p, k = _rc_digital_zpk(spec, fs, nyq)
        else:
            z, p, k = _iir_digital_zpk(spec, fs, nyq)
        sos = scipy.signal.zpk2sos(z, p, k)
        _check_sections(spec, sos, fs)
        _check_precision(spec, sos, (z, p, k), fs)
    sos = np.ascontiguousarray(sos, dtype=np.float64)
    if spec.gain_db:
        sos[0, :3] *= 10.0 ** (spec.gain_db / 20.0)
    return sos


def chain_sos(specs: Sequence[StageSpec], fs: float) -> np.ndarray:
    """All stages' sections in order; an empty chain is one pass-through section."""
    if not specs:
        return np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])
    return np.ascontiguousarray(np.vstack([stage_sos(s, fs) for s in specs]))


def rc_analog(r_ohm: float, c_farad: float, sections: int = 1, buffered: bool = True,
              response: str = "lowpass") -> tuple[np.ndarray, np.ndarray]:
    """Analog transfer function of ``sections`` equal RC sections.

    Parameters
    ----------
    r_ohm, c_farad : float
        Resistance (ohm) and capacitance (F) of every section.
    sections : int
    buffered : bool
        True: each section driven by a buffer, so H = (first-order)^n.
        False: the passive ladder, each section loading the one before.
    response : {"lowpass", "highpass"}
        Low-pass: series R, shunt C.  High-pass: series C, shunt R.

    Returns
    -------
    b, a : ndarray
        Numerator and denominator in descending powers of s (rad/s).

    Notes
    -----
    The ladder is the product of ABCD (chain) matrices, one series element
    ``[[1, Z], [0, 1]]`` then one shunt element ``[[1, 0], [Y, 1]]`` per
    section; with a zero-impedance source and an open output, H = 1 / A
    (two equal sections: 1 / ((sRC)^2 + 3 sRC + 1)).  See any two-port text,
    e.g. D. M. Pozar, Microwave Engineering, 4th ed., Wiley 2012, sec. 4.4.
    """
    rc = float(r_ohm) * float(c_farad)
    b, a = _rc_normalised(int(sections), bool(buffered), response)
    return _denormalise(b, rc), _denormalise(a, rc)


def analog_cutoff_hz(b: Sequence[float], a: Sequence[float]) -> float:
    """-3 dB frequency (Hz) of an analog low- or high-pass ``b(s) / a(s)``.

    The pass-band gain is the larger of the gains at DC and at infinite
    frequency; the -3 dB point is where |H|^2 falls to half of it, found by
    bracketing and Brent's method (:func:`scipy.optimize.brentq`) on a
    logarithmic frequency axis.  Meant for monotonic responses (RC,
    Butterworth, Bessel).
    """
    b = np.trim_zeros(np.atleast_1d(np.asarray(b, dtype=float)), "f")
    a = np.trim_zeros(np.atleast_1d(np.asarray(a, dtype=float)), "f")
    if a.size < 2:
        raise ValueError("a low- or high-pass needs at least one pole")
    dc = abs(b[-1] / a[-1]) if a[-1] else math.inf
    hf = abs(b[0] / a[0]) if b.size == a.size else 0.0
    ref = max(dc, hf)
    lowpass = dc >= hf

    def excess_db(log_w: float) -> float:
        w = math.exp(log_w)
        h = abs(np.polyval(b, 1j * w) / np.polyval(a, 1j * w))
        drop = -20.0 * math.log10(max(h / ref, 1e-300))
        return (drop - 10.0 * math.log10(2.0)) * (1 if lowpass else -1)

    # start at the geometric mean of the pole magnitudes
    scale = abs(a[-1] / a[0]) ** (1.0 / (a.size - 1)) if a[-1] else 1.0
    lo = hi = math.log(scale)
    for _ in range(200):
        if excess_db(lo) < 0:
            break
        lo -= math.log(10.0)
    for _ in range(200):
        if excess_db(hi) > 0:
            break
        hi += math.log(10.0)
    w3 = math.exp(scipy.optimize.brentq(excess_db, lo, hi, xtol=1e-14, rtol=1e-14))
    return w3 / (2.0 * math.pi)


def frequency_response(sos: np.ndarray, freqs_hz: Sequence[float] | np.ndarray,
                       fs: float) -> np.ndarray:
    """Complex response of ``sos`` at ``freqs_hz`` (Hz), via :func:`scipy.signal.sosfreqz`."""
    freqs = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    return scipy.signal.sosfreqz(sos, worN=freqs, fs=fs)[1]


def rc_corner_hz(spec: StageSpec) -> tuple[float, float]:
    """``(1 / (2 pi R C), the stage's actual -3 dB point)`` of an RC stage, Hz.

    They differ for several sections: two loaded 10 k / 4.7 n low-pass
    sections have fc 3386 Hz but -3 dB at 1267 Hz (:func:`analog_cutoff_hz`
    of the ladder, :func:`rc_analog`).
    """
    rc = spec.r_ohm * spec.c_farad
    b, a = _rc_normalised(spec.sections, spec.buffered, spec.response)
    return 1.0 / (2.0 * math.pi * rc), analog_cutoff_hz(b, a) / rc


def rc_departure(spec: StageSpec, fs: float, freqs_hz) -> np.ndarray:
    """Digital model minus analog RC response, dB, at ``freqs_hz``.

    The bilinear transform compresses the whole analog axis into 0..Nyquist,
    so a low-pass model falls below the analog stage toward Nyquist (and
    reaches zero there); prewarping keeps the -3 dB point exact.  Analog from
    :func:`rc_analog`, digital from :func:`stage_sos` (scipy.signal.freqs and
    sosfreqz).
    """
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    b, a = rc_analog(spec.r_ohm, spec.c_farad, spec.sections, spec.buffered, spec.response)
    analog = scipy.signal.freqs(b, a, worN=2.0 * np.pi * f)[1]
    digital = frequency_response(stage_sos(replace(spec, gain_db=0.0), fs), f, fs)
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.abs(digital)) - 20.0 * np.log10(np.abs(analog))


def rc_departure_hz(spec: StageSpec, fs: float, limit_db: float = 1.0) -> float | None:
    """The lowest frequency where the digital RC model departs from the
    analog stage by ``limit_db`` (None: not below 0.999 Nyquist)."""
    nyq = fs / 2.0
    f = np.geomspace(rc_corner_hz(spec)[1] / 10.0, 0.999 * nyq, 2000)
    d = np.abs(rc_departure(spec, fs, f))
    hit = np.flatnonzero(d >= limit_db)
    return float(f[hit[0]]) if hit.size else None


def describe(spec: StageSpec, fs: float | None = None) -> str:
    """Short human label: ``"Butterworth low-pass, order 4, 1.2 kHz"``.

    An RC stage shows both ``fc = 1/(2 pi R C)`` and its actual -3 dB point;
    given ``fs``, also where the digital model departs 1 dB from the analog
    stage (bilinear transform, :func:`rc_departure`).
    """
    kind = spec.type
    if kind == "notch":
        text = f"notch {_fmt_hz(spec.at_hz)}"
        if spec.harmonics > 1:
            text += f" x{spec.harmonics}"
        text += f", Q {spec.q:g}"
    elif kind == "rc":
        fc, f3 = rc_corner_hz(spec)
        text = (f"RC {_PRETTY[spec.response]} {_fmt_si(spec.r_ohm, 'Ω')} / "
                f"{_fmt_si(spec.c_farad, 'F')}")
        if spec.sections > 1:
            text += f" x{spec.sections} ({'buffered' if spec.buffered else 'loaded'})"
        text += f", fc = 1/(2πRC) {_fmt_hz(fc)}, −3 dB at {_fmt_hz(f3)}"
        if fs is not None:
            try:
                dep = rc_departure_hz(spec, fs)
            except SettingError:
                dep = None
            if dep is not None:
                text += f"; digital model 1 dB off the analog from {_fmt_hz(dep)}"
    else:
        text = f"{_DESIGN_NAMES[spec.design]} {_PRETTY[kind]}, order {spec.order}"
        if spec.design in _RIPPLE_DESIGNS:
            text += f", {spec.ripple_db:g} dB ripple"
        if spec.design in _STOP_DESIGNS:
            text += f", {spec.stop_db:g} dB stop"
        if spec.band_hz is not None:
            text += f", {_fmt_hz(spec.band_hz[0])} to {_fmt_hz(spec.band_hz[1])}"
        else:
            text += f", {_fmt_hz(spec.cutoff_hz)}"
    if spec.gain_db:
        text += f", {spec.gain_db:+g} dB"
    return text


#: Component values with SI prefixes (``"4k7"``, ``"22n"``), parsed exactly.
parse_si = fields.si_value


# --------------------------------------------------------------------------- private

_PRETTY = {"lowpass": "low-pass", "highpass": "high-pass",
           "bandpass": "band-pass", "bandstop": "band-stop"}
_DESIGN_NAMES = {"butterworth": "Butterworth", "bessel": "Bessel",
                 "chebyshev1": "Chebyshev I", "chebyshev2": "Chebyshev II",
                 "elliptic": "Elliptic"}

def _nyquist(fs: float) -> float:
    if isinstance(fs, bool) or not isinstance(fs, (int, float, np.floating, np.integer)) \
            or not math.isfinite(fs) or fs <= 0:
        raise SettingError("rate_hz", fs, "the sample rate must be a number > 0 (Hz)")
    return fs / 2.0


def _check_keys(table: Mapping[str, Any], kind: str) -> None:
    belongs = {k: [t for t in STAGE_TYPES if k in _KEYS[t]] for t in STAGE_TYPES for k in _KEYS[t]}
    fields.check_keys(table, _COMMON_KEYS + _KEYS[kind], f"a {kind} stage", belongs)


def _below_nyquist(value: Any, field: str, nyq: float) -> float:
    allowed = f"must be between 0 and Nyquist ({nyq:.10g} Hz), exclusive"
    fields.required(value, field, allowed)
    v = fields.real(value, field, allowed)
    if not 0.0 < v < nyq:
        raise SettingError(field, _tidy(value), allowed)
    return v


def _band(value: Any, nyq: float) -> tuple[float, float]:
    form = f"[low, high] in Hz with 0 < low < high < Nyquist ({nyq:.10g} Hz)"
    fields.required(value, "band_hz", form)
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise SettingError("band_hz", value, "must be two numbers " + form)
    lo, hi = (_below_nyquist(v, f"band_hz[{i}]", nyq) for i, v in enumerate(value))
    if not lo < hi:
        raise SettingError("band_hz", list(value), "must be " + form + " (low first)")
    return (lo, hi)


def _component(value: Any, field: str, unit: str) -> float:
    v = fields.si_value(fields.required(value, field, fields.SI_FORM), field)
    if not (math.isfinite(v) and v > 0):
        raise SettingError(field, value, f"must be > 0 {unit}")
    return v


def _iir_digital_zpk(spec: StageSpec, fs: float, nyq: float):
    if spec.band_hz is not None:
        lo, hi = (_below_nyquist(v, f"band_hz[{i}]", nyq) for i, v in enumerate(spec.band_hz))
        wn: Any = [lo, hi]
    else:
        wn = _below_nyquist(spec.cutoff_hz, "cutoff_hz", nyq)
    return scipy.signal.iirfilter(spec.order, wn, rp=spec.ripple_db, rs=spec.stop_db,
                            btype=spec.type, ftype=_FTYPE[spec.design],
                            output="zpk", fs=fs)


def _notch_sos(spec: StageSpec, fs: float, nyq: float) -> np.ndarray:
    f0 = _below_nyquist(spec.at_hz, "at_hz", nyq)
    fit = math.ceil(nyq / f0) - 1  # largest k with k * f0 < nyq
    if spec.harmonics > fit:
        raise SettingError("harmonics", spec.harmonics,
                           f"harmonics of {_tidy(f0)} Hz must stay below Nyquist "
                           f"({nyq:.10g} Hz): at most {fit}")
    q_min = spec.harmonics * f0 / nyq
    if not spec.q > q_min:
        raise SettingError("q", _tidy(spec.q),
                           f"must be above {q_min:.3g}: the -3 dB width k * at_hz / q of "
                           f"every notch must stay below Nyquist ({nyq:.10g} Hz)")
    rows = []
    for k in range(1, spec.harmonics + 1):
        b, a = scipy.signal.iirnotch(k * f0, spec.q, fs=fs)
        rows.append(np.concatenate([b, a]))
    return np.array(rows)


def _rc_digital_zpk(spec: StageSpec, fs: float, nyq: float):
    rc = spec.r_ohm * spec.c_farad
    fc = 1.0 / (2.0 * math.pi * rc)
    named = f"with r_ohm = {_tidy(spec.r_ohm):g} and c_farad = {spec.c_farad:g}"
    if not fc < nyq:
        raise SettingError("c_farad", _tidy(spec.c_farad),
                           f"{named}, fc = 1/(2 pi R C) = {_fmt_hz(fc)} must be below "
                           f"Nyquist ({nyq:.10g} Hz); use a larger R or C")
    b, a = _rc_normalised(spec.sections, spec.buffered, spec.response)
    w3 = 2.0 * math.pi * analog_cutoff_hz(b, a) / rc  # rad/s
    if not w3 / (2.0 * math.pi) < nyq:
        raise SettingError("c_farad", _tidy(spec.c_farad),
                           f"{named}, the stage's -3 dB point {_fmt_hz(w3 / 2 / math.pi)} "
                           f"must be below Nyquist ({nyq:.10g} Hz); use a larger R or C")
    z = np.zeros(spec.sections if spec.response == "highpass" else 0)
    p, k = np.roots(a), 1.0 / a[0]
    # Prewarp: bilinear_zpk maps s = 2 fs' (z - 1)/(z + 1); choosing
    # fs' = w3 / (2 tan(w3 / 2 fs)) puts analog w3 exactly at digital w3.
    # Working in p = s RC keeps the polynomials well scaled, so fs' is scaled too.
    fs_warp = w3 / (2.0 * math.tan(w3 / (2.0 * fs)))
    return scipy.signal.bilinear_zpk(z, p, k, fs_warp * rc)


def _rc_normalised(sections: int, buffered: bool, response: str):
    """RC sections in p = s RC, descending powers (see :func:`rc_analog`)."""
    if response not in ("lowpass", "highpass"):
        raise ValueError(f"response must be 'lowpass' or 'highpass', not {response!r}")
    if buffered:
        a = np.array([1.0])
        for _ in range(sections):
            a = np.polymul(a, [1.0, 1.0])
        b = np.zeros(sections + 1)
        b[-1 if response == "lowpass" else 0] = 1.0
        return b, a
    # ABCD entries as descending polynomials in p.  High-pass: every series
    # element 1/(pC) is multiplied by p, so the chain carries a factor p^-n.
    if response == "lowpass":
        series = [[[1.0], [1.0]], [[0.0], [1.0]]]        # Z = R -> 1
        shunt = [[[1.0], [0.0]], [[1.0, 0.0], [1.0]]]    # Y = sC -> p
    else:
        series = [[[1.0, 0.0], [1.0]], [[0.0], [1.0, 0.0]]]  # p * [[1, 1/p], [0, 1]]
        shunt = [[[1.0], [0.0]], [[1.0], [1.0]]]             # Y = 1/R -> 1
    m = [[np.array([1.0]), np.array([0.0])], [np.array([0.0]), np.array([1.0])]]
    for _ in range(sections):
        m = _matmul(_matmul(m, series), shunt)
    a = np.trim_zeros(m[0][0], "f")
    b = np.zeros(sections + 1)  # H = 1 / A(p), or p^n / A(p) for the high-pass
    b[-1 if response == "lowpass" else 0] = 1.0
    return b, a


def _matmul(x, y):
    return [[np.polyadd(np.polymul(x[i][0], y[0][j]), np.polymul(x[i][1], y[1][j]))
             for j in range(2)] for i in range(2)]


def _denormalise(poly: np.ndarray, rc: float) -> np.ndarray:
    """Coefficients in p = s RC to coefficients in s (descending)."""
    powers = np.arange(poly.size - 1, -1, -1)
    return poly * rc ** powers


def _key_fields(spec: StageSpec) -> tuple[str, Any, str]:
    """The field to blame for an unusable design, its value, and what to change."""
    if spec.type == "notch":
        return "q", spec.q, "use a lower q, or a lower sample rate"
    if spec.type == "rc":
        return ("sections", spec.sections,
                "use fewer sections, a smaller R or C (higher fc), or a lower sample rate")
    edge = "a wider band_hz" if spec.band_hz is not None else "a higher cutoff_hz"
    return "order", spec.order, f"use a lower order, {edge}, or a lower sample rate"


def _check_sections(spec: StageSpec, sos: np.ndarray, fs: float) -> None:
    """Refuse non-finite or unstable sections (stability triangle on a1, a2)."""
    field, value, hint = _key_fields(spec)
    if not np.all(np.isfinite(sos)):
        raise SettingError(field, value, f"{describe(spec)} gives non-finite coefficients "
                           f"at {fs:g} Hz sampling; {hint}")
    a1, a2 = sos[:, 4], sos[:, 5]
    # Jury's conditions for 1 + a1 z^-1 + a2 z^-2: both poles inside |z| < 1
    # iff |a2| < 1 and |a1| < 1 + a2; evaluated on the stored coefficients,
    # so no root-finding error enters.  Margin on the pole radius as well.
    radius = np.where(a1 * a1 < 4 * a2, np.sqrt(np.abs(a2)), _real_root_radius(a1, a2))
    stable = (np.abs(a2) < 1) & (np.abs(a1) < 1 + a2) & (radius < 1 - _POLE_MARGIN)
    if not np.all(stable):
        raise SettingError(field, value, f"{describe(spec)} is unstable at {fs:g} Hz "
                           f"sampling (a pole at radius {radius.max():.12g}, on or too "
                           f"close to the unit circle); {hint}")


def _real_root_radius(a1: np.ndarray, a2: np.ndarray) -> np.ndarray:
    disc = np.sqrt(np.maximum(a1 * a1 - 4 * a2, 0.0))
    q = -0.5 * (a1 + np.copysign(disc, a1))  # the larger root, no cancellation
    with np.errstate(divide="ignore", invalid="ignore"):
        other = np.where(q != 0, a2 / q, 0.0)
    return np.maximum(np.abs(q), np.abs(other))


def _check_precision(spec: StageSpec, sos: np.ndarray, zpk, fs: float) -> None:
    """Refuse sections whose rounded coefficients no longer give the design.

    At extreme order and tiny cutoff the poles crowd near z = 1 and rounding
    the section coefficients to float64 moves the response (the DC gain of a
    12th-order Butterworth at 1 mHz, 48 kHz is off by 0.1 dB; at 0.1 mHz by
    1.5 dB).  Compare the sections with the exact pole-zero form at DC,
    Nyquist and the design's edge frequencies.
    """
    z, p, k = zpk
    edges = [e for e in (spec.cutoff_hz, *(spec.band_hz or ())) if e is not None]
    if spec.type == "rc":
        edges.append(1.0 / (2 * math.pi * spec.r_ohm * spec.c_farad))
    freqs = np.array([0.0, fs / 2.0, *edges])
    zz = np.exp(2j * np.pi * freqs / fs)
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = np.abs(k * np.prod(zz[:, None] - z[None, :], axis=1)
                       / np.prod(zz[:, None] - p[None, :], axis=1))
        got = np.abs(frequency_response(sos, freqs, fs))
        err_db = np.abs(20 * np.log10(got / exact))
    loud = exact > 1e-3 * np.max(exact)
    bad = loud & ~(err_db <= _PRECISION_DB)
    if np.any(bad):
        i = int(np.argmax(bad))
        field, value, hint = _key_fields(spec)
        raise SettingError(field, value, f"{describe(spec)} loses precision at {fs:g} Hz "
                           f"sampling ({err_db[i]:.3g} dB off at {_fmt_hz(freqs[i])}); {hint}")


def _fmt_hz(f: float) -> str:
    if f >= 1e6:
        return f"{f / 1e6:.3g} MHz"
    if f >= 1e3:
        return f"{f / 1e3:.3g} kHz"
    return f"{f:.3g} Hz"


def _fmt_si(value: float, unit: str) -> str:
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"),
                           (1e-6, "µ"), (1e-9, "n"), (1e-12, "p")):
        if value >= factor * 0.9995:
            return f"{value / factor:.3g} {prefix}{unit}"
    return f"{value:.3g} {unit}"
