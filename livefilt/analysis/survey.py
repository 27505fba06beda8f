"""``livefilt survey RECORDING``: find a quiet modulation frequency.

Input: a recording (WAV or run folder) of the ambient scene with the light
source off.  Output (``DIR/survey.toml``, ``DIR/survey.png``,
``DIR/density.csv``, ``DIR/survey.html`` and a few terminal lines): the noise
density (Welch, input units per root hertz) with mains harmonics, lamp
flicker, spurs and broadband humps found and labelled; the mains frequency
measured (``mains_hz``, 50 or 60); and a ranked list of modulation
frequencies (``recommended_hz``, ``candidates``), each explained in one line.

How candidates are chosen (:func:`rank_candidates`)
---------------------------------------------------
- Candidates sit midway between neighbouring mains harmonics,
  ``(h + 1/2) x mains`` (never on one), from 1.5 x mains up to the highest
  usable frequency: 0.45 x the sample rate (the digitizer's own anti-alias
  filter starts about there on sound cards: common practice), and with a
  front end (``--config`` with a ``[frontend]`` table) where its gain is
  within 3 dB of its largest and below its anti-alias corner.
- A candidate is refused when a found line is nearer than its clearance:
  ten detector ENBWs (the lock-in's output low-pass has fallen far by then),
  plus the modulation's expected drift (``--drift-pct`` of the frequency),
  plus the line's half width, plus for mains lines the grid's wander
  (0.2 Hz per harmonic number, REFERENCES row 8, from memory).
- The rest are ranked by the floor the lock-in would see (running median of
  the density, which passes under lines), divided by the front end's gain
  when there is one (what matters is the floor relative to the signal's
  path); floors within 0.5 dB rank as equal and the lower frequency goes
  first; the best five that are at least 10 % apart are kept.  The floor
  reported for a candidate is the RMS density over half a mains spacing (or
  2 % of the frequency) around it, away from lines: the mean of the Welch
  estimates is unbiased, their median is a few % low.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from livefilt.analysis.linefigure import draw_density
from livefilt.analysis.capture import capture, channel_index, detector_enbw
from livefilt.analysis.report import ReportFolder, figure
from livefilt.config import Settings, demo_config, load_config
from livefilt.dsp import frontend, spectrum
from livefilt.errors import SettingError
from livefilt.units import si

__all__ = ["main", "run_survey", "rank_candidates", "Candidate", "DRIFT_PCT", "KEEP"]

#: Expected drift of the modulation frequency, % (a crystal is far better; an
#: RC oscillator can be worse: say so with --drift-pct).
DRIFT_PCT = 0.1
#: Candidates kept, and how far apart (fraction of frequency) they must be.
KEEP, SPREAD = 5, 0.10
#: Floors closer than this (dB) rank as equal, the lower frequency first
#: (easier on the light source's driver and the amplifier's bandwidth).
TIE_DB = 0.5
#: Highest usable frequency as a fraction of the sample rate (common practice).
USABLE_FRACTION = 0.45


@dataclass
class Candidate:
    """A recommended modulation frequency and why."""

    hz: float
    floor: float                 # density the lock-in sees, input units/rtHz
    referred_floor: float        # floor / front-end gain (floor when no front end)
    nearest_hz: float
    nearest_label: str
    distance_hz: float
    clearance_hz: float
    between: tuple               # the mains harmonics it sits between
    gain_db: float | None = None  # front end, relative to its largest gain
    why: str = ""

    def to_mapping(self) -> dict:
        d = {"hz": self.hz, "floor": self.floor, "referred_floor": self.referred_floor,
             "nearest_line_hz": self.nearest_hz, "nearest_line": self.nearest_label,
             "distance_hz": self.distance_hz, "clearance_hz": self.clearance_hz,
             "between_harmonics": list(self.between), "why": self.why}
        if self.gain_db is not None:
            d["frontend_gain_db"] = self.gain_db
        return d


def main(args) -> int:
    settings = load_config(args.config) if args.config else demo_config()
    drift = getattr(args, "drift_pct", None)
    path = Path(args.recording)
    out = Path(args.out) if args.out else path.parent / (path.stem + "-survey")  # beside, never inside a run
    doc = run_survey(path, out, settings, drift_pct=DRIFT_PCT if drift is None else drift,
                     digitizer_rate_hz=settings.source.rate_hz if args.config else None)
    for line in doc["verdict"]:
        print(line)
    sys.stdout.flush()
    print(f"report: {out / 'survey.html'}", file=sys.stderr)
    return 0


def run_survey(recording, out, settings: Settings | None = None, drift_pct: float = DRIFT_PCT,
               digitizer_rate_hz: float | None = None, frontend_gain=None) -> dict:
    """Read the recording, find its lines, rank candidates, write the report.

    ``frontend_gain``: a callable ``freqs_hz -> gain`` (complex or magnitude);
    when None and ``settings.frontend`` is set, the front end's response
    (:func:`livefilt.dsp.frontend.response`).
    Returns the TOML document (with ``verdict``, the terminal lines).
    """
    if not 0 <= drift_pct < 10:
        raise SettingError("--drift-pct", drift_pct, "must be from 0 to 10 (% of the frequency)")
    settings = settings or demo_config()
    from livefilt.acquire.source import load_driver
    src = load_driver("file").from_settings({"path": str(recording), "pace": "fast"},
                                            settings.source.rate_hz, settings.source.block)
    cap = capture(src, None, desc="survey")
    if cap.data.shape[0] < 4096:
        raise SettingError("RECORDING", str(recording),
                           f"holds {cap.data.shape[0]} frames; a survey needs at least 4096 (better 10 s)")
    fs = cap.rate_hz
    channel = channel_index(settings, cap.channel_names)
    x = cap.data[:, channel].astype(np.float64)
    # 1 Hz bins when the record allows at least 8 averages
    spec = spectrum.welch_density(x, fs, resolution_hz=max(1.0, 8 / cap.seconds), units=cap.units)
    lines = spectrum.find_lines(spec)
    nominal, measured = spectrum.measure_mains(spec, lines)
    if nominal:
        lines = spectrum.find_lines(spec, mains_hz=measured)
    grid_mains = float(nominal or getattr(settings, "mains_hz", None) or 50.0)
    enbw = detector_enbw(settings, fs)
    if frontend_gain is None and getattr(settings, "frontend", None) is not None:
        fe = settings.frontend
        frontend_gain = lambda f: frontend.response(fe, f)  # noqa: E731
    f_max = USABLE_FRACTION * fs
    if digitizer_rate_hz:
        f_max = min(f_max, USABLE_FRACTION * digitizer_rate_hz)
    cands = rank_candidates(spec, lines, grid_mains, enbw, drift_pct / 100, f_max, frontend_gain)
    units = cap.units
    doc: dict = {
        "recording": str(recording), "channel": cap.channel_names[channel], "units": units,
        "rate_hz": fs, "seconds": cap.seconds,
        "mains_hz": float(nominal) if nominal else math.nan, "mains_found": bool(nominal),
        "mains_measured_hz": measured,
        "recommended_hz": cands[0].hz if cands else math.nan,
        "detector_enbw_hz": enbw, "drift_pct": drift_pct, "highest_usable_hz": f_max,
        "noise": {"window": spec.window, "enbw_bins": spec.enbw_bins, "enbw_hz": spec.enbw_hz,
                  "segment": spec.segment, "averages": spec.averages,
                  "median_density": spectrum.median_floor(spec, 1.5 * grid_mains, f_max, lines)},
        "candidates": [c.to_mapping() for c in cands],
        "lines": [ln.to_mapping() for ln in lines[:60]],
    }
    verdict = []
    if nominal:
        verdict.append(f"mains {nominal} Hz (measured {measured:.3f} Hz); {len(lines)} lines and humps found")
    else:
        verdict.append(f"no mains lines found; candidates placed between {grid_mains:g} Hz harmonics; "
                       f"{len(lines)} lines and humps found")
    if cands:
        verdict.append(f"recommended modulation: {cands[0].hz:g} Hz")
        verdict += [f"  {i + 1}. {c.why}" for i, c in enumerate(cands)]
    else:
        verdict.append("no candidate is clear of every line: record longer, or relax --drift-pct")
    doc["verdict"] = verdict
    _write(out, doc, spec, lines, cands, frontend_gain, f_max, cap.device)
    return doc


def rank_candidates(spec: spectrum.Density, lines, mains_hz: float, enbw_hz: float,
                    drift_fraction: float, f_max: float, frontend_gain=None,
                    keep: int = KEEP) -> list[Candidate]:
    """The ranked candidates (see the module docstring for the rules)."""
    h = np.arange(1, int(f_max / mains_hz) + 1)
    grid = (h + 0.5) * mains_hz
    grid = grid[(grid >= 1.5 * mains_hz) & (grid <= f_max)]
    if grid.size == 0:
        return []
    floor = np.interp(grid, spec.freqs_hz, spec.running_floor())
    gain_db = None
    if frontend_gain is not None:
        g = np.abs(np.asarray(frontend_gain(grid), dtype=complex))
        top = float(g.max()) if g.size else 0.0
        if not top > 0:
            return []
        gain_db = 20 * np.log10(np.maximum(g, 1e-300) / top)
        # inside the pass band and below the anti-alias corner: within 3 dB of
        # the largest gain, and not above the first fall past it
        ok = gain_db >= -3.0
        k_top = int(np.argmax(g))
        past = np.flatnonzero(~ok[k_top:])
        if past.size:
            ok[k_top + past[0]:] = False
        referred = floor / np.maximum(g / top, 1e-300)
    else:
        ok = np.ones(grid.size, bool)
        referred = floor.copy()
    narrow = list(lines)
    out: list[Candidate] = []
    # floors within TIE_DB count as equal; among equals the lower frequency first
    order = sorted(range(grid.size), key=lambda i: (round(20 * math.log10(max(referred[i], 1e-300)) / TIE_DB),
                                                    grid[i]))
    for i in order:
        if not ok[i]:
            continue
        f = float(grid[i])
        best = None
        clear = True
        for ln in narrow:
            dist = _distance(ln, f)
            need = spectrum.line_clearance_hz(ln, enbw_hz, drift_fraction, f)
            if dist < need:
                clear = False
                break
            if best is None or dist < best[0]:
                best = (dist, ln, need)
        if not clear:
            continue
        if any(abs(f - c.hz) < SPREAD * min(f, c.hz) for c in out):
            continue
        hh = int(f // mains_hz)
        if best is None:
            near_hz, near_label, dist, need = math.nan, "none found", math.inf, 10 * enbw_hz
        else:
            dist, ln, need = best
            near_hz, near_label = ln.hz, ln.label
        level = _band_floor(spec, f, max(mains_hz / 2, 0.02 * f), narrow, enbw_hz) or float(floor[i])
        ref_level = level * float(referred[i] / floor[i]) if floor[i] > 0 else level
        c = Candidate(f, level, ref_level, near_hz, near_label, float(dist),
                      float(need), (hh, hh + 1),
                      None if gain_db is None else float(gain_db[i]))
        c.why = _why(c, spec.units)
        out.append(c)
        if len(out) >= keep:
            break
    return out


# -- private -----------------------------------------------------------------
def _band_floor(spec, f: float, half: float, lines, enbw_hz: float) -> float | None:
    """RMS density over ``f +- half`` leaving out bins near any line: the mean
    of the PSD estimates is unbiased, where their median sits a few % low."""
    fr = spec.freqs_hz
    keep = np.abs(fr - f) <= half
    for ln in lines:
        keep &= np.abs(fr - ln.hz) > ln.width_hz / 2 + 4 * spec.enbw_hz + 2 * enbw_hz
    if keep.sum() < 8:
        return None
    return float(np.sqrt(np.mean(spec.density[keep] ** 2)))


def _distance(ln, f: float) -> float:
    """Distance from ``f`` to a line (to the nearer edge of a hump)."""
    if ln.kind == "hump":
        return max(0.0, abs(f - ln.hz) - ln.width_hz / 2)
    return abs(f - ln.hz)


def _why(c: Candidate, units: str) -> str:
    text = f"{c.hz:g} Hz: floor {si(c.floor, units, 3)}/rtHz"
    if math.isfinite(c.distance_hz):
        text += (f", nearest line {_hz(c.nearest_hz)} ({c.nearest_label}) is "
                 f"{c.distance_hz:.0f} Hz away (needs {c.clearance_hz:.0f} Hz)")
    else:
        text += ", no line found near it"
    text += f"; between mains harmonics {c.between[0]} and {c.between[1]}"
    if c.gain_db is not None:
        text += f"; front end {c.gain_db:+.1f} dB, floor before it {si(c.referred_floor, units, 3)}/rtHz"
    return text


def _hz(f: float) -> str:
    return f"{f / 1000:.2f} kHz" if f >= 999.5 else f"{f:.1f} Hz"






def _write(out, doc, spec, lines, cands, gain, f_max, device) -> None:
    rep = ReportFolder(out, "Quiet modulation frequencies")
    toml_doc = {k: v for k, v in doc.items() if k != "verdict"}
    toml_doc["verdict"] = {"lines": doc["verdict"]}
    rep.toml("survey.toml", toml_doc)
    rep.csv("density.csv", ["hz", f"density_{doc['units']}_per_rthz"],
            zip(spec.freqs_hz.tolist(), spec.density.tolist()))
    rep.csv("candidates.csv", ["rank", "hz", "floor", "nearest_line_hz", "distance_hz", "why"],
            [[i + 1, c.hz, c.floor, c.nearest_hz, c.distance_hz, c.why] for i, c in enumerate(cands)])
    rep.figure("survey.png", _figure(spec, lines, cands, gain, f_max, doc["units"]),
               f"Ambient noise density (Welch, {spec.window}, ENBW {spec.enbw_hz:.3g} Hz, "
               f"{spec.averages} averages); candidates numbered by rank")
    rep.section("Verdict", rep.paragraphs(*doc["verdict"]))
    rep.section("Noise density", rep.img("survey.png"))
    rep.section("Candidates", rep.table(
        ["rank", "frequency", "floor", "nearest line", "distance", "clearance needed"],
        [[i + 1, f"{c.hz:g} Hz", f"{si(c.floor, doc['units'], 3)}/rtHz",
          f"{_hz(c.nearest_hz)} {c.nearest_label}" if math.isfinite(c.distance_hz) else "none",
          f"{c.distance_hz:.0f} Hz" if math.isfinite(c.distance_hz) else "—", f"{c.clearance_hz:.0f} Hz"]
         for i, c in enumerate(cands)]))
    rep.section("Lines and humps", rep.table(
        ["frequency", "what", "level (rms)", "above floor"],
        [[f"{ln.hz:.2f} Hz", ln.label, si(ln.level, doc["units"], 3), f"{ln.above_floor_db:.1f} dB"]
         for ln in lines[:40]]))
    rep.section("How", rep.paragraphs(
        f"Candidates sit midway between mains harmonics, below {f_max:.0f} Hz, at least ten detector "
        f"ENBWs ({doc['detector_enbw_hz']:.3g} Hz each) plus {doc['drift_pct']:g} % drift plus the "
        "grid's wander from every line; ranked by the running-median floor (divided by the front "
        "end's gain when a front end is configured)."))
    rep.html("survey.html", subtitle=device)


def _figure(spec, lines, cands, gain, f_max, units):
    fig, ax = figure(8.0, 4.6)
    f, d = spec.freqs_hz[1:], spec.density[1:]
    draw_density(ax, spec, lines)
    ax.loglog(f, spec.running_floor()[1:], lw=1.0, color="#c25400", alpha=0.8, label="floor (running median)")
    ax.axvspan(f_max, f[-1], color="#dddddd", alpha=0.5, lw=0, label="beyond the usable band")
    lo = float(np.nanmin(d[d > 0])) if np.any(d > 0) else 1e-12
    hi = float(np.nanmax(d)) * 30
    for i, c in enumerate(cands):
        ax.axvline(c.hz, color="#1f7a3a", lw=1.6 if i == 0 else 0.8, ls="-" if i == 0 else "--")
        ax.annotate(str(i + 1), (c.hz, hi), textcoords="offset points", xytext=(2, -12),
                    fontsize=9, color="#1f7a3a", fontweight="bold")
    if gain is not None:
        g = np.abs(np.asarray(gain(f), dtype=complex))
        ax2 = ax.twinx()
        ax2.semilogx(f, 20 * np.log10(np.maximum(g, 1e-300) / g.max()), color="#1f7a3a", lw=0.8, alpha=0.6)
        ax2.set_ylabel("front-end gain (dB)")
        ax2.set_ylim(-40, 3)
    ax.set_ylim(lo / 3, hi)
    ax.legend(loc="lower left", fontsize=8)
    return fig
