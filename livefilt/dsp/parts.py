"""Parts from a value series: IEC 60063 E-series, the R and C pair nearest a cutoff,
and the cutoff's spread for the parts' tolerances.

API
---
- :data:`SERIES`: the mantissas of E6, E12, E24 and E96 (one decade, 100..999 scale
  for E96, 10..99 for the others), typed from IEC 60063:2015 Table 1.
- :func:`series_values`: every value of a series between two bounds.
- :func:`nearest_pair`: the (R, C) pair from the series whose ``1 / (2 pi R C)``,
  times a stage's own factor, is closest to an asked cutoff.
- :func:`spread`: worst-case and Monte Carlo 95 % interval of a cutoff for
  given R and C tolerances.

Ranges: resistors 100 ohm to 1 Mohm, capacitors 10 pF to 10 uF (common practice:
below 100 ohm the source and amplifier output impedance matter, above 1 Mohm
leakage and input bias; below 10 pF the board's stray capacitance does).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from livefilt.errors import SettingError

__all__ = ["SERIES", "R_RANGE_OHM", "C_RANGE_F", "series_values", "nearest_pair",
           "Spread", "spread", "DEFAULT_TOLERANCE_PCT"]

#: IEC 60063:2015 Table 1 (E6, E12, E24: REFERENCES row 5, confirmed).  E96: typed
#: from memory, then checked against stored public tables (all 96 values agree) and
#: against round(100 * 10^(i/96)), which E96 follows exactly.
SERIES: dict[str, tuple[int, ...]] = {
    "E6": (10, 15, 22, 33, 47, 68),
    "E12": (10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82),
    "E24": (10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30,
            33, 36, 39, 43, 47, 51, 56, 62, 68, 75, 82, 91),
    "E96": (100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130,
            133, 137, 140, 143, 147, 150, 154, 158, 162, 165, 169, 174,
            178, 182, 187, 191, 196, 200, 205, 210, 215, 221, 226, 232,
            237, 243, 249, 255, 261, 267, 274, 280, 287, 294, 301, 309,
            316, 324, 332, 340, 348, 357, 365, 374, 383, 392, 402, 412,
            422, 432, 442, 453, 464, 475, 487, 499, 511, 523, 536, 549,
            562, 576, 590, 604, 619, 634, 649, 665, 681, 698, 715, 732,
            750, 768, 787, 806, 825, 845, 866, 887, 909, 931, 953, 976),
}
R_RANGE_OHM = (100.0, 1e6)
C_RANGE_F = (10e-12, 10e-6)
#: Tolerances when a stage gives none: 1 % resistors (metal film), 5 % capacitors
#: (C0G/film), as common practice on a sensor board.
DEFAULT_TOLERANCE_PCT = (1.0, 5.0)


def series_values(name: str, lo: float, hi: float) -> np.ndarray:
    """All values of series ``name`` in ``[lo, hi]`` (within 1e-9 relative), ascending."""
    mant = np.asarray(SERIES[name], dtype=float)
    scale = 10.0 ** (len(str(SERIES[name][0])) - 1)  # 10 or 100: mantissa 1.0 .. 9.x
    out = []
    for dec in range(math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1):
        out.append(mant / scale * 10.0 ** dec)
    v = np.concatenate(out)
    # round to the printed digits, so 4.7e-9 is exactly the float of "4.7n"
    v = np.array([float(f"{x:.3g}") for x in v])
    return v[(v >= lo * (1 - 1e-9)) & (v <= hi * (1 + 1e-9))]


def nearest_pair(cutoff_hz: float, r_series: str, c_series: str, factor: float = 1.0,
                 r_range: tuple[float, float] = R_RANGE_OHM,
                 c_range: tuple[float, float] = C_RANGE_F) -> tuple[float, float, float]:
    """The series pair (R, C) whose cutoff ``factor / (2 pi R C)`` is closest to ``cutoff_hz``.

    Closest in ratio (``|ln(f / cutoff_hz)|``); among equally close pairs the one
    with R nearest 10 kohm (mid-range impedance, common practice).  ``factor`` is
    the stage's -3 dB point in units of ``1 / (2 pi R C)`` (1 for one section,
    REFERENCES rows 3b and 4 for more).

    Returns
    -------
    r_ohm, c_farad, cutoff_hz : float
        The parts and the cutoff they give.

    Raises
    ------
    SettingError
        ``cutoff_hz`` outside what the ranges reach.
    """
    rs = series_values(r_series, *r_range)
    cs = series_values(c_series, *c_range)
    lo = factor / (2 * math.pi * rs[-1] * cs[-1])
    hi = factor / (2 * math.pi * rs[0] * cs[0])
    if not lo <= cutoff_hz <= hi:
        raise SettingError("cutoff_hz", cutoff_hz,
                           f"parts from {r_range[0]:g} ohm to {r_range[1]:g} ohm and "
                           f"{c_range[0]:g} F to {c_range[1]:g} F reach {lo:.3g} Hz to "
                           f"{hi:.4g} Hz for this stage")
    f = factor / (2 * math.pi * rs[:, None] * cs[None, :])
    err = np.abs(np.log(f / cutoff_hz))
    best = err.min()
    near = np.argwhere(err <= best * (1 + 1e-9) + 1e-15)
    i, j = min(near, key=lambda ij: abs(math.log(rs[ij[0]] / 1e4)))
    return float(rs[i]), float(cs[j]), float(f[i, j])


@dataclass(frozen=True)
class Spread:
    """A cutoff and its spread for the parts' tolerances (Hz)."""

    nominal_hz: float
    worst_low_hz: float
    worst_high_hz: float
    low95_hz: float
    high95_hz: float


def spread(nominal_hz: float, r_tol_pct: float, c_tol_pct: float, sections: int = 1,
           cutoff_of: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
           draws: int = 20000, seed: int = 0) -> Spread:
    """Worst case and Monte Carlo 95 % interval of a cutoff for the parts' tolerances.

    Worst case: every R and C at the same end of its tolerance, so the cutoff
    scales by ``1 / ((1 +- r)(1 +- c))`` (exact for any RC ladder, whose
    frequencies scale with a common R C).  Monte Carlo: every part drawn
    independently, uniform within its tolerance (a conservative choice: parts
    from a binned lot are often at the edges), ``draws`` draws, seeded; the
    central 95 % of the cutoffs.

    Parameters
    ----------
    nominal_hz : float
        The cutoff with nominal parts.
    r_tol_pct, c_tol_pct : float
        Tolerances in percent.
    sections : int
        RC sections in the stage (each with its own R and C draw).
    cutoff_of : callable, optional
        ``cutoff_of(r_scale, c_scale)`` with arrays (draws, sections) of relative
        part values, returning the cutoffs relative to nominal (draws,).  Default:
        one section, ``1 / (r c)``.
    """
    r, c = r_tol_pct / 100.0, c_tol_pct / 100.0
    lo = nominal_hz / ((1 + r) * (1 + c))
    hi = nominal_hz / ((1 - r) * (1 - c))
    rng = np.random.default_rng(seed)
    rr = 1 + r * rng.uniform(-1, 1, (draws, sections))
    cc = 1 + c * rng.uniform(-1, 1, (draws, sections))
    if cutoff_of is None:
        if sections != 1:
            raise ValueError("more than one section needs cutoff_of")
        rel = 1.0 / (rr[:, 0] * cc[:, 0])
    else:
        rel = cutoff_of(rr, cc)
    q = np.percentile(rel, [2.5, 97.5])
    return Spread(nominal_hz, lo, hi, float(nominal_hz * q[0]), float(nominal_hz * q[1]))
