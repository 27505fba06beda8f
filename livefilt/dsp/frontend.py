"""The analog front end: what is on the board between the photodiode amplifier and
the digitizer, as the ``[frontend]`` table describes it.

These stages are never run on the samples (the signal already went through them);
they enter every response, the alias check and every prediction.

API
---
- :class:`FrontStage`, :class:`Frontend`: the validated table (``from_mapping`` /
  ``to_mapping``).
- :func:`response`: complex response of the whole front end at given frequencies.
- :func:`group_delay`: its group delay, s.
- :func:`stage_zpk`: one stage as analog zeros, poles, gain (rad/s).
- :func:`ladder_response`: an RC ladder with its own R and C per section (nodal).
- :func:`discrete`: the front end as digital sections at a sample rate (for
  simulated step responses).

Table::

    [frontend]
    stages = [
      { type = "rc", response = "highpass", r_ohm = "10k", c_farad = "22n",
        sections = 2, buffered = false },
      { type = "rc", response = "lowpass", cutoff_hz = 8000, series = "E24",
        c_series = "E12", tolerance_pct = [1, 5] },
      { type = "lowpass", design = "butterworth", order = 2, cutoff_hz = 20000 },
      { type = "bandpass", design = "bessel", order = 2, band_hz = [800, 3000] },
    ]

``rc`` stages give ``r_ohm`` and ``c_farad`` (every section alike), or
``cutoff_hz`` and ``series`` (``"E6" | "E12" | "E24" | "E96"``; ``c_series``
defaults to the resistor series, at most E24) from which the nearest pair is
picked (:func:`livefilt.dsp.parts.nearest_pair`).  An rc stage's ``cutoff_hz``
is its -3 dB point: ``1 / (2 pi R C)`` for one section, lower for more
(REFERENCES rows 3b and 4).  ``tolerance_pct`` is one number for both parts or
``[R, C]`` (default ``[1, 5]``).  Active stages are the analog prototypes an
op-amp stage realises (``scipy.signal.iirfilter(..., analog=True)``), with the
digital stages' meaning of ``cutoff_hz`` (Bessel at -3 dB).  ``gain_db`` on
every stage, ``name`` optional.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
import scipy  # its submodules load on first use: scipy.signal alone takes ~1 s, kept off the start-up path

from livefilt.dsp import parts
from livefilt.dsp.memo import remembered
from livefilt.dsp.design import DESIGNS, StageSpec, analog_cutoff_hz, parse_si, rc_analog
from livefilt.errors import SettingError

__all__ = ["FrontStage", "Frontend", "response", "group_delay", "stage_zpk",
           "stage_response", "ladder_response", "discrete", "rc_factor",
           "FRONT_TYPES"]

FRONT_TYPES = ("rc", "lowpass", "highpass", "bandpass")
_FTYPE = {"butterworth": "butter", "bessel": "bessel_mag", "chebyshev1": "cheby1",
          "chebyshev2": "cheby2", "elliptic": "ellip"}
_COMMON = ("type", "name", "gain_db")
_ACTIVE = ("design", "order", "ripple_db", "stop_db")
_KEYS = {
    "rc": ("r_ohm", "c_farad", "cutoff_hz", "series", "c_series", "sections", "buffered",
           "response", "tolerance_pct"),
    "lowpass": ("cutoff_hz",) + _ACTIVE,
    "highpass": ("cutoff_hz",) + _ACTIVE,
    "bandpass": ("band_hz",) + _ACTIVE,
}
_MAX_HZ = 1e9
_MAX_ORDER = 8
_MAX_SECTIONS = 8


@dataclass(frozen=True)
class FrontStage:
    """One analog stage, validated.

    ``spec`` holds the stage's parameters in the digital stages' form
    (:class:`~livefilt.dsp.design.StageSpec`: type, design, order, cutoff_hz or
    band_hz, ripple_db, stop_db, r_ohm, c_farad, sections, buffered, response,
    gain_db; Hz, ohm, farad), readable as attributes of the stage itself.  An rc
    stage whose parts were picked keeps the asked ``asked_hz`` and its series.
    """

    name: str
    spec: StageSpec
    series: str | None = None
    c_series: str | None = None
    tolerance_pct: tuple[float, float] | None = None
    asked_hz: float | None = None

    def __getattr__(self, key: str):
        if key == "spec":  # not set yet (copying): no recursion
            raise AttributeError(key)
        return getattr(self.spec, key)

    @property
    def picked(self) -> bool:
        """True when the parts were picked from a series for ``cutoff_hz``."""
        return self.series is not None

    @property
    def minus3db_hz(self) -> float | None:
        """The -3 dB point of a low- or high-pass stage from its (picked) parts, Hz."""
        if self.type != "rc":
            return self.cutoff_hz
        return self.rc_hz * rc_factor(self.sections, self.buffered, self.response)

    @property
    def rc_hz(self) -> float:
        """``1 / (2 pi R C)`` of an rc stage (the RC law, common practice)."""
        return 1.0 / (2.0 * math.pi * self.r_ohm * self.c_farad)

    @classmethod
    def from_mapping(cls, table: Mapping[str, Any], index: int = 0) -> "FrontStage":
        """Validate one stage table; fields relative to the stage.

        Raises
        ------
        SettingError
        """
        if not isinstance(table, Mapping):
            raise SettingError("", table, 'a front-end stage must be a table such as '
                               '{type = "rc", r_ohm = "10k", c_farad = "1n"}')
        kind = table.get("type")
        if kind not in FRONT_TYPES:
            raise SettingError("type", kind, "must be one of: " + ", ".join(FRONT_TYPES))
        allowed = _COMMON + _KEYS[kind]
        for key in table:
            if key not in allowed:
                raise SettingError(key, table[key], f"unknown key for a front-end {kind} stage; "
                                   "allowed: " + ", ".join(allowed))
        name = table.get("name", f"stage {index + 1}")
        if not isinstance(name, str) or not name.strip() or len(name) > 40:
            raise SettingError("name", name, "must be a short non-empty text (at most 40 characters)")
        v: dict[str, Any] = {"type": kind, "name": name.strip(),
                             "gain_db": _num(table, "gain_db", 0.0, -200.0, 200.0, "dB")}
        if kind == "rc":
            v.update(_rc_values(table))
        else:
            design = table.get("design", "butterworth")
            if design not in DESIGNS:
                raise SettingError("design", design, "must be one of: " + ", ".join(DESIGNS))
            v["design"] = design
            order = table.get("order", 2)
            if isinstance(order, bool) or not isinstance(order, int) or not 1 <= order <= _MAX_ORDER:
                raise SettingError("order", order, f"must be a whole number from 1 to {_MAX_ORDER}")
            v["order"] = order
            if design in ("chebyshev1", "elliptic"):
                v["ripple_db"] = _num(table, "ripple_db", 1.0, 0.0, 20.0, "dB", open_lo=True)
            elif "ripple_db" in table:
                raise SettingError("ripple_db", table["ripple_db"], "only for chebyshev1 and elliptic designs")
            if design in ("chebyshev2", "elliptic"):
                v["stop_db"] = _num(table, "stop_db", 40.0, 0.0, 200.0, "dB", open_lo=True)
            elif "stop_db" in table:
                raise SettingError("stop_db", table["stop_db"], "only for chebyshev2 and elliptic designs")
            if design == "elliptic" and v["stop_db"] <= v["ripple_db"]:
                raise SettingError("stop_db", table.get("stop_db"), "must be above ripple_db")
            if kind == "bandpass":
                band = table.get("band_hz")
                if not isinstance(band, (list, tuple)) or len(band) != 2:
                    raise SettingError("band_hz", band, "required: [low, high] in Hz, 0 < low < high")
                lo = _freq(band[0], "band_hz[0]")
                hi = _freq(band[1], "band_hz[1]")
                if not lo < hi:
                    raise SettingError("band_hz", list(band), "must be [low, high] with low < high")
                v["band_hz"] = (lo, hi)
            else:
                v["cutoff_hz"] = _freq(table.get("cutoff_hz"), "cutoff_hz")
        own = {k: v.pop(k) for k in ("name", "series", "c_series", "tolerance_pct") if k in v}
        if own.get("series"):
            own["asked_hz"] = v.pop("cutoff_hz")
        return cls(spec=StageSpec(**v), **own)

    def to_mapping(self) -> dict[str, Any]:
        """The table :meth:`from_mapping` reads back to an equal stage (picked parts
        are written as their ``cutoff_hz`` and ``series``, as given)."""
        out: dict[str, Any] = {"type": self.type, "name": self.name}
        out.update(self.spec.to_mapping())
        if self.picked:
            del out["r_ohm"], out["c_farad"]
            out.update(cutoff_hz=self.asked_hz, series=self.series, c_series=self.c_series)
        if self.tolerance_pct is not None and self.tolerance_pct != parts.DEFAULT_TOLERANCE_PCT:
            out["tolerance_pct"] = list(self.tolerance_pct)
        return out

    def describe(self) -> str:
        """A short label in plain words: ``"RC low-pass 10 kΩ / 1 nF, -3 dB at 15.9 kHz"``."""
        kind = {"lowpass": "low-pass", "highpass": "high-pass", "bandpass": "band-pass"}
        if self.type == "rc":
            text = (f"RC {kind[self.response]} {_si(self.r_ohm, 'Ω')} / {_si(self.c_farad, 'F')}")
            if self.sections > 1:
                text += f" x{self.sections} ({'buffered' if self.buffered else 'loaded'})"
            text += f", -3 dB at {_si(self.minus3db_hz, 'Hz')}"
            if self.sections > 1:
                text += f" (1/2πRC = {_si(self.rc_hz, 'Hz')})"
        else:
            names = {"butterworth": "Butterworth", "bessel": "Bessel", "chebyshev1": "Chebyshev I",
                     "chebyshev2": "Chebyshev II", "elliptic": "elliptic"}
            text = f"active {names[self.design]} {kind[self.type]}, order {self.order}, "
            text += (f"{_si(self.band_hz[0], 'Hz')} to {_si(self.band_hz[1], 'Hz')}"
                     if self.band_hz else _si(self.cutoff_hz, "Hz"))
        if self.gain_db:
            text += f", {self.gain_db:+g} dB"
        return text


@dataclass(frozen=True)
class Frontend:
    """The ``[frontend]`` table: analog stages in signal order."""

    stages: tuple[FrontStage, ...]

    @classmethod
    def from_mapping(cls, table: Mapping[str, Any]) -> "Frontend":
        """Validate ``[frontend]``; fields relative to it (``stages[1].cutoff_hz``)."""
        if not isinstance(table, Mapping):
            raise SettingError("", table, "must be a table with stages = [...]")
        for key in table:
            if key != "stages":
                raise SettingError(key, table[key], "unknown key; [frontend] takes: stages")
        raw = table.get("stages")
        if not isinstance(raw, list) or not raw:
            raise SettingError("stages", raw, 'needs a list of stage tables, e.g. '
                               '[{type = "rc", r_ohm = "10k", c_farad = "1n"}]')
        out = []
        for i, t in enumerate(raw):
            try:
                out.append(FrontStage.from_mapping(t, i))
            except SettingError as e:
                raise e.within(f"stages[{i}]") from None
        names = [s.name for s in out]
        for i, n in enumerate(names):
            if names.index(n) != i:
                raise SettingError(f"stages[{i}].name", n, "must differ from the other stages' names")
        return cls(tuple(out))

    def to_mapping(self) -> dict[str, Any]:
        return {"stages": [s.to_mapping() for s in self.stages]}

    @property
    def rc_stages(self) -> tuple[FrontStage, ...]:
        return tuple(s for s in self.stages if s.type == "rc")


def stage_zpk(stage: FrontStage) -> tuple[np.ndarray, np.ndarray, float]:
    """Analog zeros, poles (rad/s) and gain of one stage, ``gain_db`` included.

    RC stages: :func:`livefilt.dsp.design.rc_analog` (buffered product or the loaded
    ladder's ABCD chain).  Active stages: :func:`scipy.signal.iirfilter` with
    ``analog=True``.
    """
    g = 10.0 ** (stage.gain_db / 20.0)
    if stage.type == "rc":
        b, a = rc_analog(stage.r_ohm, stage.c_farad, stage.sections, stage.buffered, stage.response)
        z = np.zeros(stage.sections) if stage.response == "highpass" else np.zeros(0)
        lead = b[0] if stage.response == "highpass" else b[-1]
        return z.astype(complex), np.roots(a), g * lead / a[0]
    wn = ([2 * math.pi * f for f in stage.band_hz] if stage.band_hz
          else 2 * math.pi * stage.cutoff_hz)
    z, p, k = scipy.signal.iirfilter(stage.order, wn, rp=stage.ripple_db, rs=stage.stop_db,
                               btype=stage.type, analog=True, ftype=_FTYPE[stage.design],
                               output="zpk")
    return np.asarray(z, complex), np.asarray(p, complex), g * float(k)


def stage_response(stage: FrontStage, freqs_hz) -> np.ndarray:
    """Complex response of one stage at ``freqs_hz`` (:func:`scipy.signal.freqs_zpk`)."""
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    z, p, k = stage_zpk(stage)
    return scipy.signal.freqs_zpk(z, p, k, worN=2 * math.pi * f)[1]


def response(frontend: Frontend | None, freqs_hz) -> np.ndarray:
    """Complex response of the whole front end at ``freqs_hz`` (Hz); ones without one."""
    f = np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    h = np.ones(f.shape, dtype=complex)
    if frontend is not None:
        for s in frontend.stages:
            h *= stage_response(s, f)
    return h


def group_delay(frontend: Frontend | None, freqs_hz) -> np.ndarray:
    """Group delay (s) of the front end at ``freqs_hz``, from its poles and zeros.

    ``tau(w) = sum_p (-Re p) / ((w - Im p)^2 + Re p^2) - sum_z (-Re z) / ((w - Im z)^2 + Re z^2)``,
    the derivative of the phase of ``prod (jw - z) / prod (jw - p)`` (closed form).
    """
    w = 2 * math.pi * np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    tau = np.zeros(w.shape)
    if frontend is None:
        return tau
    for s in frontend.stages:
        z, p, _ = stage_zpk(s)
        for r, sign in ((p, 1.0), (z, -1.0)):
            for x in r:
                with np.errstate(divide="ignore", invalid="ignore"):
                    tau += sign * (-x.real) / ((w - x.imag) ** 2 + x.real ** 2)
    return tau


def ladder_response(r_ohm, c_farad, freqs_hz, response: str = "lowpass",
                    buffered: bool = False) -> np.ndarray:
    """Complex response of RC sections, each with its own R and C (nodal, ABCD chain).

    ``r_ohm``, ``c_farad``: arrays (..., sections); returns (..., len(freqs)).
    Low-pass: series R, shunt C; high-pass: series C, shunt R.  Loaded: a
    zero-impedance source and an open output, ``H = 1 / A`` of the chain matrix
    ``prod [[1, Z], [0, 1]] [[1, 0], [Y, 1]]``; buffered: the product of the
    sections' own ``Z_shunt / (Z_series + Z_shunt)``.
    """
    r = np.asarray(r_ohm, dtype=float)[..., None]
    c = np.asarray(c_farad, dtype=float)[..., None]
    s = 2j * math.pi * np.atleast_1d(np.asarray(freqs_hz, dtype=float))
    n = r.shape[-2]
    shape = np.broadcast_shapes(r.shape[:-2], c.shape[:-2]) + (s.shape[0],)
    if buffered:
        h = np.ones(shape, dtype=complex)
        for i in range(n):
            src = r[..., i, :] * c[..., i, :] * s
            h = h * (1 / (1 + src) if response == "lowpass" else src / (1 + src))
        return h
    a = np.ones(shape, complex)
    b = np.zeros(shape, complex)
    cc = np.zeros(shape, complex)
    d = np.ones(shape, complex)
    for i in range(n):
        if response == "lowpass":
            z_ser, y_sh = r[..., i, :] + 0 * s, s * c[..., i, :]
        else:
            z_ser, y_sh = 1 / (s * c[..., i, :]), 1 / r[..., i, :] + 0 * s
        # [[a, b], [c, d]] @ [[1, Z], [0, 1]] @ [[1, 0], [Y, 1]]
        a, b, cc, d = (a + (a * z_ser + b) * y_sh, a * z_ser + b,
                       cc + (cc * z_ser + d) * y_sh, cc * z_ser + d)
    return 1 / a


def discrete(frontend: Frontend | None, fs: float, match_hz: float | None = None) -> np.ndarray:
    """The front end as digital second-order sections at ``fs`` (for simulated step
    responses; the analog model stays the reference everywhere else).

    Each stage by :func:`scipy.signal.cont2discrete` with the triangle (first-order)
    hold, exact for input that is linear between samples; a sampled sine is not,
    so with ``match_hz`` the gain is corrected to the analog gain at that frequency
    (the hold's own droop, about ``(w T)^2 / 12``, is removed there).
    """
    rows = [np.array([[1.0, 0.0, 0.0, 1.0, 0.0, 0.0]])]
    if frontend is not None:
        for s in frontend.stages:
            z, p, k = stage_zpk(s)
            ss = scipy.signal.zpk2ss(z, p, k)
            A, B, C, D, _ = scipy.signal.cont2discrete(ss, 1.0 / fs, method="foh")
            rows.append(scipy.signal.zpk2sos(*scipy.signal.ss2zpk(A, B, C, D)))
    sos = np.vstack(rows)
    if match_hz is not None and frontend is not None:
        want = abs(response(frontend, [match_hz])[0])
        got = abs(scipy.signal.sosfreqz(sos, worN=[match_hz], fs=fs)[1][0])
        if got > 0:
            sos[0, :3] *= want / got
    return sos


# --------------------------------------------------------------------------- private

def _rc_values(table: Mapping[str, Any]) -> dict[str, Any]:
    v: dict[str, Any] = {}
    sections = table.get("sections", 1)
    if isinstance(sections, bool) or not isinstance(sections, int) or not 1 <= sections <= _MAX_SECTIONS:
        raise SettingError("sections", sections, f"must be a whole number from 1 to {_MAX_SECTIONS}")
    buffered = table.get("buffered", True)
    if not isinstance(buffered, bool):
        raise SettingError("buffered", buffered, "must be true (buffered sections) or false (loaded ladder)")
    resp = table.get("response", "lowpass")
    if resp not in ("lowpass", "highpass"):
        raise SettingError("response", resp, 'must be "lowpass" or "highpass"')
    v.update(sections=sections, buffered=buffered, response=resp)
    tol = table.get("tolerance_pct", list(parts.DEFAULT_TOLERANCE_PCT))
    pair = tol if isinstance(tol, (list, tuple)) else [tol, tol]
    if len(pair) != 2 or any(isinstance(t, bool) or not isinstance(t, (int, float))
                             or not 0 <= t < 50 for t in pair):
        raise SettingError("tolerance_pct", tol, "must be a percentage from 0 to 50 for both parts, "
                           "or [R, C] percentages, e.g. [1, 5]")
    v["tolerance_pct"] = (float(pair[0]), float(pair[1]))
    factor = rc_factor(sections, buffered, resp)
    given = [k for k in ("r_ohm", "c_farad") if k in table]
    if "cutoff_hz" in table or "series" in table:
        if given:
            raise SettingError(given[0], table[given[0]], "give either r_ohm and c_farad, or "
                               "cutoff_hz and series (the parts are then picked), not both")
        series = table.get("series")
        if series not in parts.SERIES:
            raise SettingError("series", series, "required with cutoff_hz; one of: "
                               + ", ".join(parts.SERIES))
        c_default = series if series != "E96" else "E24"
        c_series = table.get("c_series", c_default)
        if c_series not in parts.SERIES:
            raise SettingError("c_series", c_series, "must be one of: " + ", ".join(parts.SERIES))
        want = _freq(table.get("cutoff_hz"), "cutoff_hz")
        r, c, _ = parts.nearest_pair(want, series, c_series, factor)
        v.update(series=series, c_series=c_series, cutoff_hz=want, r_ohm=r, c_farad=c)
    else:
        if "c_series" in table:
            raise SettingError("c_series", table["c_series"], "only with cutoff_hz and series")
        for k, unit in (("r_ohm", "ohm"), ("c_farad", "F")):
            if k not in table:
                raise SettingError(k, None, "required (or give cutoff_hz and series to pick the parts)")
            x = parse_si(table[k], k)
            if not (math.isfinite(x) and x > 0):
                raise SettingError(k, table[k], f"must be > 0 {unit}")
            v[k] = x
    rc_hz = 1.0 / (2 * math.pi * v["r_ohm"] * v["c_farad"])
    if not rc_hz * factor < _MAX_HZ:
        raise SettingError("c_farad", table.get("c_farad"), f"the stage's -3 dB point must stay below "
                           f"{_MAX_HZ:g} Hz; use a larger R or C")
    return v


def rc_factor(sections: int, buffered: bool, response: str) -> float:
    """-3 dB point of n equal RC sections in units of ``1 / (2 pi R C)``
    (1 for one section; 0.6436 for two buffered, 0.3742 for two loaded low-pass:
    REFERENCES rows 3b and 4).  Solved once per combination, then kept
    (:func:`livefilt.dsp.memo.remembered`)."""
    def solve():
        b, a = rc_analog(1.0, 1.0, sections, buffered, response)
        return np.array([2 * math.pi * analog_cutoff_hz(b, a)])

    return float(remembered("rc_factor", repr((int(sections), bool(buffered), str(response))),
                            solve)[0])


def _freq(value: Any, field: str) -> float:
    allowed = f"must be a frequency above 0 and below {_MAX_HZ:g} Hz"
    if value is None:
        raise SettingError(field, value, "required; " + allowed)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < _MAX_HZ:
        raise SettingError(field, value, allowed)
    return float(value)


def _num(table, key, default, lo, hi, unit, open_lo=False) -> float:
    value = table.get(key, default)
    allowed = (f"must be a number above {lo:g} and up to {hi:g} {unit}" if open_lo
               else f"must be a number from {lo:g} to {hi:g} {unit}")
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SettingError(key, value, allowed)
    if (open_lo and not lo < value <= hi) or (not open_lo and not lo <= value <= hi):
        raise SettingError(key, value, allowed)
    return float(value)


def _si(x: float, unit: str) -> str:
    from livefilt.units import si
    return si(x, unit, 3)
