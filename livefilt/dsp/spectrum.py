"""Noise density spectra and the lines in them.

API map
-------
- :func:`welch_density`: Welch's averaged periodogram as an amplitude density
  (input units per root hertz, one-sided) with the window's ENBW stated
  (:class:`Density`).
- :func:`window_enbw_bins`: a window's equivalent noise bandwidth in bins.
- :func:`find_lines`: narrow lines (mains harmonics, lamp flicker at twice
  mains, other spurs) and broadband humps standing above the floor, labelled
  (:class:`Line`).
- :func:`measure_mains`: which mains family (50 or 60 Hz) the lines belong to,
  and the measured fundamental.
- :func:`median_floor`: the median density in a band, away from every line.

Method
------
Welch, IEEE Trans. Audio Electroacoust. AU-15(2):70-73, 1967, as
:func:`scipy.signal.welch` computes it (periodic window, 50 % overlap, each
segment's mean removed, ``scaling="density"``); the square root gives units per
root hertz.  Default window: 4-term Blackman-Harris (-92 dB side lobes, ENBW
2.004 bins; Harris, Proc. IEEE 66(1):51-83, 1978, Table 1), so a large mains
line does not leak over the floor beside it.  A sine of rms amplitude A reads
A^2 / ENBW_hz at its peak bin (less the scallop loss); its power is the sum
of the density squared over its bins times the bin width (Parseval), which
:func:`find_lines` uses for the line level.

The floor is a running median of the density over a few dozen bins (lines are
narrow, so a median passes under them); a bin is part of a line when it stands
``threshold_db`` above that floor.  Humps: stretches where the running floor
itself stands ``hump_db`` above a floor smoothed over an octave.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, signal

from livefilt.errors import SettingError

__all__ = ["Density", "Line", "welch_density", "window_enbw_bins", "find_lines",
           "measure_mains", "median_floor", "line_clearance_hz", "MAINS_WANDER_HZ"]

#: The grid's frequency wanders about +-0.1 to 0.2 Hz (REFERENCES row 8, from memory).
MAINS_WANDER_HZ = 0.2
#: Highest mains harmonic labelled as such (higher multiples are called spurs, with a note).
MAINS_HARMONICS = 10
#: Leakage: a peak within LEAK_BINS of a line and below LEAK_RATIO of it (-86 dB in
#: density, above the Blackman-Harris side lobes of -92 dB) is not reported.
LEAK_BINS, LEAK_RATIO = 64, 10 ** (-86 / 20)
_WINDOWS = ("blackmanharris", "hann", "flattop", "boxcar", "hamming")


@dataclass
class Density:
    """A one-sided amplitude density spectrum.

    Attributes
    ----------
    freqs_hz : ndarray
    density : ndarray
        Input units per root hertz (sqrt of the one-sided PSD).
    rate_hz : float
    window : str
    segment : int
        Samples per Welch segment.
    averages : int
        Segments averaged.
    enbw_bins, enbw_hz : float
        The window's equivalent noise bandwidth, in bins and in Hz.
    units : str
        Units of the input (``"FS"``, ``"V"``).
    """

    freqs_hz: np.ndarray
    density: np.ndarray
    rate_hz: float
    window: str
    segment: int
    averages: int
    enbw_bins: float
    enbw_hz: float
    units: str = "FS"

    @property
    def bin_hz(self) -> float:
        return self.rate_hz / self.segment

    @property
    def psd(self) -> np.ndarray:
        """Power density, units^2/Hz."""
        return self.density ** 2

    def running_floor(self, width_bins: int | None = None) -> np.ndarray:
        """Running median of the density (passes under narrow lines)."""
        w = width_bins or _floor_width(self)
        return ndimage.median_filter(self.density, size=w, mode="nearest")


@dataclass
class Line:
    """A line or hump found in a :class:`Density`.

    Attributes
    ----------
    hz : float
        Centre frequency (peak interpolated on the log density), Hz.
    level : float
        RMS amplitude of the line above the floor, input units (sqrt of its
        power: density^2 summed over its bins times the bin width).
    peak_density : float
        Density at the peak bin, units/rtHz.
    above_floor_db : float
        Peak density over the running floor, dB.
    width_hz : float
        Span of the bins above the threshold.
    kind : {"mains", "flicker", "spur", "hump", "tone", "harmonic"}
    label : str
        Plain words: "mains 50 Hz", "lamp flicker (2 x mains)", "spur 1.00 kHz".
    harmonic : int or None
        Mains harmonic number (mains and flicker lines), or of a spur family.
    """

    hz: float
    level: float
    peak_density: float
    above_floor_db: float
    width_hz: float
    kind: str = "spur"
    label: str = ""
    harmonic: int | None = None
    extra: dict = field(default_factory=dict)

    def to_mapping(self) -> dict:
        d = {"hz": float(self.hz), "label": self.label, "kind": self.kind,
             "level": float(self.level), "peak_density": float(self.peak_density),
             "above_floor_db": float(self.above_floor_db), "width_hz": float(self.width_hz)}
        if self.harmonic is not None:
            d["harmonic"] = int(self.harmonic)
        return d


def window_enbw_bins(window: str, n: int) -> float:
    """ENBW of a periodic window in bins: ``n sum(w^2) / (sum w)^2`` (Harris 1978, eq. 11)."""
    w = signal.get_window(window, n, fftbins=True)
    return float(n * np.dot(w, w) / w.sum() ** 2)


def welch_density(x: np.ndarray, rate_hz: float, resolution_hz: float = 1.0,
                  window: str = "blackmanharris", units: str = "FS",
                  segment: int | None = None) -> Density:
    """Welch amplitude density of ``x`` (1-D), in units per root hertz.

    Parameters
    ----------
    x : ndarray
        Samples, one channel.
    rate_hz : float
    resolution_hz : float
        Aimed bin width; the segment is the power of two nearest
        ``rate_hz / resolution_hz`` (at most the whole record).
    window : str
        A :func:`scipy.signal.get_window` name (periodic).
    units : str
    segment : int, optional
        Samples per segment (overrides ``resolution_hz``).

    Raises
    ------
    SettingError
        Fewer than 64 samples, or an unknown window.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1 or x.size < 64:
        raise SettingError("samples", int(x.size), "need at least 64 samples of one channel")
    if window not in _WINDOWS:
        raise SettingError("window", window, "allowed: " + ", ".join(_WINDOWS))
    if segment is None:
        if not resolution_hz > 0:
            raise SettingError("resolution_hz", resolution_hz, "must be above 0 Hz")
        segment = int(2 ** round(math.log2(rate_hz / resolution_hz)))
    segment = int(max(64, min(segment, x.size)))
    f, p = signal.welch(x, fs=rate_hz, window=window, nperseg=segment,
                        noverlap=segment // 2, detrend="constant", scaling="density")
    step = segment - segment // 2
    averages = 1 + (x.size - segment) // step
    enbw = window_enbw_bins(window, segment)
    return Density(f, np.sqrt(p), float(rate_hz), window, segment, averages, enbw,
                   enbw * rate_hz / segment, units)


def _floor_width(spec: Density) -> int:
    # wide enough that a line (its main lobe plus wander) is a minority of the window
    return int(max(31, 8 * math.ceil(spec.enbw_bins) * 4 + 1))


def find_lines(spec: Density, mains_hz: float | None = None, threshold_db: float = 10.0,
               hump_db: float = 6.0, min_hz: float | None = None,
               known: dict[float, str] | None = None) -> list[Line]:
    """Lines and humps standing above the floor, strongest first, labelled.

    Parameters
    ----------
    spec : Density
    mains_hz : float, optional
        Mains fundamental (50, 60 or a measured value) used for labels; when
        None it is measured (:func:`measure_mains`).
    threshold_db : float
        A line's peak must stand this far above the running floor (density dB).
    hump_db : float
        A hump: the running floor this far above its octave-smoothed self.
    min_hz : float, optional
        Ignore everything below (default: 4 bins, clear of the DC bin's skirt).
    known : dict, optional
        Frequencies the caller knows -> label, or (label, kind); lines within
        a bin's ENBW of them take that label (kind "tone" by default; the
        check calls the modulation's line "signal").
    """
    f, d = spec.freqs_hz, spec.density
    floor = spec.running_floor()
    lo = min_hz if min_hz is not None else 4 * spec.enbw_bins * spec.bin_hz
    ratio_db = 20 * np.log10(np.maximum(d, 1e-300) / np.maximum(floor, 1e-300))
    above = (ratio_db > threshold_db) & (f >= lo)
    lines: list[Line] = []
    df = spec.bin_hz
    half = int(math.ceil(2 * spec.enbw_bins))  # main lobe half-width, bins
    runs = [(start + int(np.argmax(d[start:stop])), start, stop) for start, stop in _runs(above)]
    kept: list[int] = []
    for k, start, stop in sorted(runs, key=lambda r: -d[r[0]]):
        # a weak run beside a strong line is that line's window leakage, not a line
        if any(abs(k - j) <= LEAK_BINS and d[k] < d[j] * LEAK_RATIO for j in kept):
            continue
        kept.append(k)
        a, b = max(0, start - half), min(len(d), stop + half)
        power = float(np.sum(np.maximum(d[a:b] ** 2 - floor[a:b] ** 2, 0.0)) * df)
        lines.append(Line(_peak_hz(f, d, k), math.sqrt(power), float(d[k]),
                          float(ratio_db[k]), float((stop - start) * df)))
    lines += _humps(spec, floor, lo, hump_db)
    if mains_hz is None:
        mains_hz = measure_mains(spec, lines)[1]
    _label(lines, mains_hz, spec, known or {})
    lines.sort(key=lambda ln: -ln.level)
    return lines


def measure_mains(spec: Density, lines: list[Line] | None = None) -> tuple[int | None, float]:
    """The mains family present and its measured fundamental.

    Sums the power of lines within 1.5 Hz per harmonic number of ``h x 50`` and
    ``h x 60`` (h = 1..10) and takes the stronger family; the fundamental is the
    power-weighted mean of ``line_hz / h`` over that family's lines.

    Returns
    -------
    (nominal, measured_hz) : (50, 60 or None, float)
        ``(None, nan)`` when neither family has a line.
    """
    if lines is None:
        lines = find_lines(spec, mains_hz=50.0)
    best, best_p, best_f = None, 0.0, math.nan
    for nominal in (50, 60):
        num = den = 0.0
        for ln in lines:
            if ln.kind in ("hump", "tone", "signal"):
                continue
            h = round(ln.hz / nominal)
            if 1 <= h <= 10 and abs(ln.hz - h * nominal) <= max(1.5 * h * 0.5, 2 * spec.bin_hz):
                p = ln.level ** 2
                num += p * ln.hz / h
                den += p
        if den > best_p:
            best, best_p, best_f = nominal, den, num / den
    return best, best_f


def median_floor(spec: Density, lo_hz: float, hi_hz: float, lines: list[Line] = (),
                 guard_hz: float | None = None) -> float:
    """Median density in ``[lo_hz, hi_hz]``, leaving out every bin within
    ``guard_hz`` (default: four bins' ENBW) of a line's span; NaN when nothing is left."""
    f = spec.freqs_hz
    keep = (f >= lo_hz) & (f <= hi_hz)
    g = guard_hz if guard_hz is not None else 4 * spec.enbw_hz
    for ln in lines:
        keep &= np.abs(f - ln.hz) > g + ln.width_hz / 2
    return float(np.median(spec.density[keep])) if keep.any() else math.nan


def line_clearance_hz(line: Line, enbw_det_hz: float, drift_fraction: float,
                      f_mod_hz: float) -> float:
    """How far a modulation frequency must stay from ``line``: ten detector
    ENBWs, the modulation's own drift, the line's half width, and for mains
    lines the grid's wander times the harmonic number."""
    wander = MAINS_WANDER_HZ * (line.harmonic or 1) if line.kind in ("mains", "flicker") else 0.0
    return 10 * enbw_det_hz + drift_fraction * f_mod_hz + line.width_hz / 2 + wander


# -- private -----------------------------------------------------------------
def _runs(mask: np.ndarray):
    """(start, stop) of each run of True in ``mask``."""
    m = np.concatenate([[False], mask, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return zip(edges[0::2], edges[1::2])


def _peak_hz(f, d, k) -> float:
    """Peak frequency by a parabola through the log density of three bins."""
    if 0 < k < len(d) - 1:
        a, b, c = np.log(np.maximum(d[k - 1:k + 2], 1e-300))
        den = a - 2 * b + c
        if den < 0:
            return float(f[k] + 0.5 * (a - c) / den * (f[1] - f[0]))
    return float(f[k])


def _humps(spec: Density, floor: np.ndarray, lo: float, hump_db: float) -> list[Line]:
    """Broad stretches where the running floor rises above its octave smoothing."""
    f = spec.freqs_hz
    ok = f >= max(lo, 4 * spec.bin_hz)
    if ok.sum() < 64:
        return []
    fo, lf = f[ok], np.log10(np.maximum(floor[ok], 1e-300))
    # octave-wide median of the log floor, evaluated on a log grid and interpolated
    grid = np.geomspace(fo[0], fo[-1], 200)
    smooth = np.array([np.median(lf[(fo >= g / math.sqrt(2)) & (fo <= g * math.sqrt(2))]) for g in grid])
    base = np.interp(fo, grid, smooth)
    rise_db = 20 * (lf - base)
    out = []
    min_bins = max(8, 4 * _floor_width(spec))
    for start, stop in _runs(rise_db > hump_db):
        if stop - start < min_bins:
            continue
        k = start + int(np.argmax(rise_db[start:stop]))
        df = spec.bin_hz
        seg = slice(start, stop)
        base_lin = 10 ** base[seg]
        power = float(np.sum(np.maximum(floor[ok][seg] ** 2 - base_lin ** 2, 0)) * df)
        out.append(Line(float(fo[k]), math.sqrt(power), float(floor[ok][k]), float(rise_db[k]),
                        float(fo[stop - 1] - fo[start]), kind="hump"))
    return out


def _label(lines: list[Line], mains_hz: float, spec: Density, known: dict) -> None:
    tol_bins = 2 * spec.bin_hz
    narrow = sorted((ln for ln in lines if ln.kind != "hump"), key=lambda ln: -ln.level)
    for ln in lines:
        if ln.kind == "hump":
            ln.label = f"broadband hump around {_hz(ln.hz)} ({_hz(ln.width_hz)} wide)"
            continue
        for f0, text in known.items():
            if abs(ln.hz - f0) <= max(tol_bins, spec.enbw_hz):
                ln.label, ln.kind = (text, "tone") if isinstance(text, str) else text
                break
        if ln.label:
            continue
        if mains_hz and math.isfinite(mains_hz):
            h = int(round(ln.hz / mains_hz))
            if 1 <= h <= MAINS_HARMONICS and abs(ln.hz - h * mains_hz) <= tol_bins + MAINS_WANDER_HZ * h:
                ln.harmonic = h
                if h == 1:
                    ln.kind, ln.label = "mains", f"mains {mains_hz:.2f} Hz"
                elif h == 2:
                    ln.kind, ln.label = "flicker", "lamp flicker (2 x mains)"
                elif h % 2 == 0:
                    ln.kind, ln.label = "flicker", f"flicker or mains harmonic {h} ({_hz(ln.hz)})"
                else:
                    ln.kind, ln.label = "mains", f"mains harmonic {h} ({_hz(ln.hz)})"
                continue
    # spurs: name a family when a stronger spur divides this one's frequency
    spurs = [ln for ln in narrow if not ln.label]
    for ln in spurs:
        for base in spurs:
            if base is ln or base.hz >= ln.hz or base.level < ln.level:
                continue
            m = int(round(ln.hz / base.hz))
            if m >= 2 and abs(ln.hz - m * base.hz) <= tol_bins * m:
                ln.harmonic = m
                ln.label = f"spur {_hz(ln.hz)} ({m} x {_hz(base.hz)})"
                break
        if not ln.label:
            ln.label = f"spur {_hz(ln.hz)}"
        if mains_hz and math.isfinite(mains_hz) and ln.harmonic is None:
            h = int(round(ln.hz / mains_hz))
            if h > MAINS_HARMONICS and abs(ln.hz - h * mains_hz) <= tol_bins:
                ln.label += f" (on {h} x mains)"


def _hz(x: float) -> str:
    if abs(x) >= 999.5:
        return f"{x / 1000:.2f} kHz"
    return f"{x:.1f} Hz" if abs(x) < 100 else f"{x:.0f} Hz"
