"""Numbers with units for people: SI-prefixed formatting shared by the terminal
read-out, the window and the reports, so a value reads the same everywhere."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["si", "distance", "level_db", "level_unit"]

_PREFIX = [(1e-12, "p"), (1e-9, "n"), (1e-6, "µ"), (1e-3, "m"), (1.0, ""), (1e3, "k"), (1e6, "M")]


def si(x: float, unit: str, digits: int = 4, fixed: bool = False) -> str:
    """``0.001234, "V"`` -> ``"1.234 mV"``; NaN -> ``"—"``.

    ``fixed``: always ``digits`` significant digits, trailing zeros kept
    (``42.00 µFS``, ``8.524 µFS``), so a column of readings keeps its width.
    """
    if x is None or not math.isfinite(x):
        return "—"
    if x == 0:
        return (f"{0:.{digits - 1}f} {unit}" if fixed else f"0 {unit}")
    a = abs(x)
    scale, p = _PREFIX[0]
    for s, pre in _PREFIX:
        if a >= s * (1 - 0.5 * 10.0 ** (1 - digits)):
            scale, p = s, pre
    text = f"{x / scale:{'#' if fixed else ''}.{digits}g}".rstrip(".")
    return f"{text} {p}{unit}"


def distance(metres: float) -> str:
    """A target distance as a bench note gives it, to the millimetre:
    ``2.853333 -> "2.853 m"``, ``0.5 -> "0.5 m"``; NaN or None -> ``"—"``."""
    if metres is None or not math.isfinite(metres):
        return "—"
    return f"{round(float(metres), 3) + 0.0:g} m"  # + 0.0: no "-0 m"


def level_db(rms, units: str):
    """RMS amplitudes as levels in dB: dBFS per AES17 for full-scale units
    (a sine whose peak reaches full scale, RMS 1/sqrt 2 FS, reads 0 dBFS, so
    ``20 log10(sqrt 2 * rms)``), else dB re 1 unit RMS (dBV re 1 V RMS, common
    practice).  Zero or negative reads NaN.  Arrays or floats."""
    a = np.asarray(rms, dtype=np.float64)
    ref = math.sqrt(0.5) if units == "FS" else 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(a > 0, 20.0 * np.log10(a / ref), np.nan)
    return out if out.ndim else float(out)


def level_unit(units: str) -> str:
    """The unit :func:`level_db` gives: ``dBFS`` or ``dBV``..."""
    return "dB" + units
