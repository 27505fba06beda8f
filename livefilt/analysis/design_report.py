"""``livefilt design``: the front end and every chain on paper, before anything is
soldered or recorded.

Prints a short table and writes, through :class:`~livefilt.analysis.report.ReportFolder`,
``design.toml`` (parts, alias check, per chain gain, group delay, ENBW, settling and
interferer rejection), PNG figures (responses, group delay, amplitude step
response, predicted SNR against distance) and ``design.html``.

API
---
- :func:`reference_hz`: the modulation frequency a config implies.
- :class:`Design`, :func:`design`: every number of the report for a :class:`Settings`
  (the window's design view uses it too).
- :func:`parts_rows`: the parts of the front end's rc stages with their spread.
- :func:`write_report`: the folder; :func:`main`: the command.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from livefilt.config import Settings, demo_config, load_config
from livefilt.dsp import frontend as front
from livefilt.dsp import parts, predict
from livefilt.dsp.design import describe
from livefilt.errors import SettingError
from livefilt.units import si

__all__ = ["reference_hz", "Design", "design", "parts_rows", "chain_settings", "write_report",
           "print_table", "to_document", "line_hz", "main"]


def reference_hz(settings: Settings) -> float:
    """The reference frequency: ``[reference] frequency_hz``, else the sound card's
    drive frequency, else the simulated LED's; one line when there is none."""
    if settings.reference is not None and settings.reference.frequency_hz:
        return float(settings.reference.frequency_hz)
    opts = settings.source.options
    drive = opts.get("drive")
    if isinstance(drive, dict) and drive.get("frequency_hz"):
        return float(drive["frequency_hz"])
    if opts.get("led_hz"):
        return float(opts["led_hz"])
    if settings.source.driver == "simulated":
        return 1370.0  # the simulated bench's default LED frequency
    raise SettingError("reference.frequency_hz", None,
                       "the design needs the modulation frequency: set frequency_hz in [reference]")


@dataclass
class Design:
    """Every number of a design report."""

    settings: Settings
    fs: float
    ref_hz: float
    mains_hz: float
    lines: list
    chains: list
    parts: list
    alias_attenuation_db: float | None
    images: list
    warnings: list = field(default_factory=list)

    @property
    def nyquist_hz(self) -> float:
        return self.fs / 2


def chain_settings(d: Design, name: str):
    """The settings of the chain called ``name``."""
    return next(c for c in d.settings.chains if c.name == name)


def parts_rows(frontend: front.Frontend | None) -> list[dict]:
    """One row per rc stage: the parts, the -3 dB point they give, and its spread
    (worst case, Monte Carlo 95 %; :func:`livefilt.dsp.parts.spread`)."""
    rows = []
    if frontend is None:
        return rows
    for st in frontend.rc_stages:
        fc = st.minus3db_hz
        rt, ct = st.tolerance_pct
        cutoff_of = None
        if st.sections > 1:
            cutoff_of = _ladder_cutoffs(st)
        sp = parts.spread(fc, rt, ct, st.sections, cutoff_of,
                          draws=20000 if st.sections == 1 else 4000)
        row = {"stage": st.name, "r_ohm": st.r_ohm, "c_farad": st.c_farad, "cutoff_hz": fc,
               "cutoff_low_hz": sp.low95_hz, "cutoff_high_hz": sp.high95_hz,
               "worst_low_hz": sp.worst_low_hz, "worst_high_hz": sp.worst_high_hz,
               "rc_hz": st.rc_hz, "sections": st.sections, "buffered": st.buffered,
               "response": st.response, "r_tolerance_pct": rt, "c_tolerance_pct": ct,
               "picked": st.picked}
        if st.picked:
            row.update(asked_hz=st.asked_hz, series=st.series, c_series=st.c_series)
        rows.append(row)
    return rows


def design(settings: Settings, simulate: bool = True, tick=None) -> Design:
    """All figures of the design report for ``settings`` (no files); ``tick()`` is
    called after each chain (progress)."""
    fs = settings.source.rate_hz
    ref = reference_hz(settings)
    fe = settings.frontend
    lines = predict.interferer_lines(settings.mains_hz, settings.design.interferers_hz)
    chains = []
    for c in settings.chains:
        chains.append(predict.chain_on_paper(c.name, c.stages, c.detector, fe, fs, ref, lines, simulate))
        if tick:
            tick()
    warnings = []
    alias_db = None
    image_hz = fs - ref
    if fe is not None:
        alias_db = predict.to_db(abs(front.response(fe, [image_hz])[0]) / abs(front.response(fe, [ref])[0]))
    images = predict.alias_lines(lines, fe, fs, ref)
    for im in images:
        im["inside"] = [c.name for c in chains if c.band_hz[0] <= im["folds_to_hz"] <= c.band_hz[1]]
        if im["inside"]:
            warnings.append(f"{im['label']} folds to {si(im['folds_to_hz'], 'Hz')}, inside the detection "
                            f"band of chain {', '.join(im['inside'])}; the front end leaves "
                            f"{im['front_end_db']:.1f} dB of it: add an anti-alias low-pass or move the "
                            "reference")
    if fe is None:
        warnings.append(f"no [frontend] table: nothing is known to stop the image at "
                        f"{si(image_hz, 'Hz')} (rate - reference) from folding onto the reference")
    elif alias_db > -40:
        warnings.append(f"the front end attenuates the reference's image at {si(image_hz, 'Hz')} by only "
                        f"{-alias_db:.1f} dB: noise there folds onto the reference")
    for c in chains:
        if c.step is not None and not (c.settling_s == c.settling_s):  # simulated, NaN
            warnings.append(f"chain {c.name}: the detector output never stays within 1 %: it ripples by "
                            f"{c.ripple_pct:.2f} % (twice the reference leaks through); use a steeper "
                            "slope or a longer time constant")
        for row in c.interferers:
            near = abs(row["hz"] - ref) <= row.get("wander_hz", 0.0)
            if not near and c.band_hz[0] <= row["hz"] <= c.band_hz[1]:
                what = row["label"] + ("" if si(row["hz"], "Hz") in row["label"] else f" ({line_hz(row)})")
                warnings.append(f"chain {c.name}: {what} is inside the detection "
                                f"band ({si(c.band_hz[0], 'Hz')} to {si(c.band_hz[1], 'Hz')}); it reaches "
                                "the output attenuated only "
                                f"{-(row['attenuation_db'] + row.get('lockin_rejection_db', 0.0)):.0f} dB")
    for ln in lines:
        if abs(ln.hz - ref) <= ln.wander_hz:
            warnings.append(f"{ln.label} ({si(ln.hz, 'Hz')}) sits on the reference: no filter can "
                            "separate them; move the reference between mains harmonics")
    return Design(settings, fs, ref, settings.mains_hz, lines, chains, parts_rows(fe),
                  alias_db, images, warnings)


# --------------------------------------------------------------------------- report

def to_document(d: Design) -> dict:
    """The ``design.toml`` document."""
    doc: dict = {"report": {"config": d.settings.origin, "rate_hz": d.fs, "reference_hz": d.ref_hz,
                            "mains_hz": d.mains_hz, "nyquist_hz": d.nyquist_hz,
                            "attenuation_floor_db": predict.FLOOR_DB,
                            "warnings": list(d.warnings)}}
    fe: dict = {"stages": [f"{s.name}: {s.describe()}" for s in d.settings.frontend.stages]
                if d.settings.frontend else []}
    if d.alias_attenuation_db is not None:
        fe["alias_attenuation_db"] = d.alias_attenuation_db
    fe["image_hz"] = d.fs - d.ref_hz
    if d.parts:
        fe["parts"] = d.parts
    if d.images:
        fe["images"] = [{k: v for k, v in im.items()} for im in d.images]
    doc["frontend"] = fe
    ds = d.settings.design
    chains = {}
    for c in d.chains:
        t = {"gain": abs(c.gain), "gain_db": c.gain_db, "group_delay_s": c.group_delay_s,
             "detector": c.detector.kind, "enbw_hz": c.detector.enbw_hz,
             "detector_settling_s": c.detector.settling_s,
             "enbw_x_settling": c.detector.enbw_settling,
             "settling_s": c.settling_s, "ripple_pct": c.ripple_pct,
             "detection_band_hz": list(c.band_hz),
             "interferers": [dict(r) for r in c.interferers]}
        if ds.signal_at is not None:
            t["range_m"] = predict.range_at_m(ds.snr_db, ds.signal_at, ds.noise_density,
                                              ds.exponent, c.detector.enbw_hz)
            t["snr_db_threshold"] = ds.snr_db
        chains[c.name] = t
    doc["chains"] = chains
    return _plain(doc)


def _plain(x):
    """numpy scalars to Python numbers, for the TOML writer."""
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.generic):
        return x.item()
    return x


def print_table(d: Design, out=sys.stdout) -> None:
    p = lambda *a: print(*a, file=out)  # noqa: E731
    p(f"design of {d.settings.origin}: {si(d.fs, 'Hz')} sampling, reference {si(d.ref_hz, 'Hz')}, "
      f"mains {d.mains_hz:g} Hz")
    if d.settings.frontend is None:
        p("front end: none given")
    else:
        for s in d.settings.frontend.stages:
            p(f"  front end {s.name}: {s.describe()}")
        for r in d.parts:
            p(f"  parts {r['stage']}: R {si(r['r_ohm'], 'Ω', 3)}, C {si(r['c_farad'], 'F', 3)} -> "
              f"{si(r['cutoff_hz'], 'Hz')} (95 %: {si(r['cutoff_low_hz'], 'Hz')} to "
              f"{si(r['cutoff_high_hz'], 'Hz')})")
        p(f"  image of the reference at {si(d.fs - d.ref_hz, 'Hz')}: {d.alias_attenuation_db:.1f} dB")
    head = ["chain", "gain", "delay", "ENBW", "settling", "ENBW×settl.", "worst line (filters, lock-in)"]
    rows = []
    for c in d.chains:
        worst = max(c.interferers, key=lambda r: r["attenuation_db"] + r.get("lockin_rejection_db", 0.0),
                    default=None)
        w = "—"
        if worst is not None:
            w = f"{worst['label']}: {_db_text(worst['attenuation_db'])}"
            if "lockin_rejection_db" in worst:
                w += f", {_db_text(worst['lockin_rejection_db'])}"
        rows.append([c.name, f"{_z(c.gain_db, 0.05):+.1f} dB", si(c.group_delay_s, "s", 3),
                     si(c.detector.enbw_hz, "Hz", 3), _settle_text(c),
                     f"{c.detector.enbw_settling:.3f}", w])
    widths = [max(len(str(x)) for x in col) for col in zip(head, *rows)]
    for r in [head] + rows:
        p("  ".join(str(x).ljust(w) for x, w in zip(r, widths)).rstrip())
    ds = d.settings.design
    if ds.signal_at is not None:
        for c in d.chains:
            rng = predict.range_at_m(ds.snr_db, ds.signal_at, ds.noise_density, ds.exponent,
                                     c.detector.enbw_hz)
            p(f"chain {c.name}: predicted range at {ds.snr_db:g} dB SNR: {rng:.3g} m")
    for w in d.warnings:
        p(f"warning: {w}")


def write_report(d: Design, folder, tick=None) -> "Path":
    """Write design.toml, interferers.csv (and parts.csv), the PNG figures and
    design.html into ``folder``;
    ``tick()`` after each figure (progress)."""
    from livefilt.analysis.report import ReportFolder

    rep = ReportFolder(folder, "Design on paper")
    rep.toml("design.toml", to_document(d))
    rep.csv("interferers.csv", ["chain", "label", "hz", "wander_hz", "attenuation_db", "lockin_rejection_db"],
            [[c.name, r["label"], r["hz"], r.get("wander_hz", 0.0), r["attenuation_db"],
              r.get("lockin_rejection_db", math.nan)] for c in d.chains for r in c.interferers])
    if d.parts:
        keys = ["stage", "r_ohm", "c_farad", "cutoff_hz", "cutoff_low_hz", "cutoff_high_hz",
                "worst_low_hz", "worst_high_hz", "r_tolerance_pct", "c_tolerance_pct"]
        rep.csv("parts.csv", keys, [[p[k] for k in keys] for p in d.parts])
    from livefilt.analysis import design_figures as figs
    written = figs.draw_all(d, rep, tick)
    intro = [f"Config {d.settings.origin}: sampled at {si(d.fs, 'Hz')} (Nyquist {si(d.nyquist_hz, 'Hz')}), "
             f"reference {si(d.ref_hz, 'Hz')}, mains {d.mains_hz:g} Hz.",
             "The front end is the analog circuit on the board; it is never run on the samples, but it "
             "enters every response and prediction here. Attenuations are relative to the reference; "
             f"{predict.FLOOR_DB:g} dB (shown as \"blocked\") means a zero of the response or deeper "
             "than double-precision arithmetic can resolve."]
    body = rep.paragraphs(*intro)
    if d.warnings:
        body += "".join(f'<p class="warn">{_esc(w)}</p>' for w in d.warnings)
    rep.section("Summary", body)
    rep.section("Front end", _front_html(d, rep) + "".join(rep.img(n) for n in written.get("front", [])))
    rep.section("Chains", _chain_html(d, rep) + "".join(rep.img(n) for n in written.get("chains", [])))
    for c in d.chains:
        rep.section(f"Interferers, chain {c.name}", _interferer_html(c, rep))
    if written.get("snr"):
        ds = d.settings.design
        text = (f"From the measured point {ds.signal_at[1]:g} (RMS, input units) at {ds.signal_at[0]:g} m, "
                f"white noise of {ds.noise_density:g} per root hertz near the reference and amplitude "
                f"falling as distance^-{ds.exponent:g}; noise = density x sqrt(ENBW).")
        rep.section("Predicted SNR against distance", rep.paragraphs(text)
                    + "".join(rep.img(n) for n in written["snr"]))
    rep.section("Settings", f"<pre>{_esc(d.settings.to_toml())}</pre>")
    rep.html("design.html", subtitle=str(d.settings.origin))
    return rep.folder


def main(args) -> int:
    from livefilt.progress import progress

    from livefilt.analysis.report import ReportFolder

    settings = load_config(args.config) if getattr(args, "config", None) else demo_config()
    out = args.out or "design-report"
    ReportFolder(out, "Design on paper")  # a folder we cannot write: say so before the work
    # chains simulated, then the figures: front end, one per chain, delay, step, SNR
    steps = (2 * len(settings.chains) + 2 + (settings.frontend is not None)
             + (settings.design.signal_at is not None))
    with progress(total=steps, desc="design", unit="step") as bar:
        d = design(settings, tick=lambda: bar.update(1))
        folder = write_report(d, out, tick=lambda: bar.update(1))
    print_table(d)
    print(f"wrote {folder / 'design.html'}, design.toml, CSV tables and figures", file=sys.stderr)
    return 0


# --------------------------------------------------------------------------- private

def _ladder_cutoffs(st):
    """``cutoff_of`` for :func:`parts.spread`: -3 dB of a ladder with drawn parts,
    relative to nominal, on a fine grid (0.05 % steps) by interpolation."""
    def cutoff_of(rr, cc):
        fc = st.minus3db_hz
        lo = 0.97 / ((1 + st.tolerance_pct[0] / 100) * (1 + st.tolerance_pct[1] / 100))
        hi = 1.03 / ((1 - st.tolerance_pct[0] / 100) * (1 - st.tolerance_pct[1] / 100))
        grid = np.geomspace(lo, hi, max(64, int(math.log(hi / lo) / 5e-4)))
        h = front.ladder_response(st.r_ohm * rr, st.c_farad * cc, fc * grid, st.response, st.buffered)
        p = np.abs(h) ** 2
        below = p < 0.5 if st.response == "lowpass" else p >= 0.5
        i = np.argmax(below, axis=1)  # first grid point past -3 dB
        i = np.clip(i, 1, grid.size - 1)
        rows = np.arange(p.shape[0])
        y0, y1 = np.log(p[rows, i - 1]), np.log(p[rows, i])
        x0, x1 = np.log(grid[i - 1]), np.log(grid[i])
        return np.exp(x0 + (math.log(0.5) - y0) * (x1 - x0) / (y1 - y0))
    return cutoff_of


def line_hz(r: dict) -> str:
    """``"150 Hz ± 0.6 Hz"``: a line's frequency and its wander."""
    text = si(r["hz"], "Hz") if r["hz"] else "0 Hz"
    return text + (f" ± {r['wander_hz']:.2g} Hz" if r.get("wander_hz") else "")


def _z(x: float, tiny: float = 5e-3) -> float:
    """No "-0.0" on a page."""
    return 0.0 if abs(x) < tiny else x


def _db_text(x: float) -> str:
    return "blocked" if x <= predict.FLOOR_DB else f"{x:.1f} dB"


def _settle_text(c) -> str:
    if c.settling_s != c.settling_s:
        return f"never (ripple {c.ripple_pct:.2g} %)"
    return si(c.settling_s, "s", 3)


def _esc(t: str) -> str:
    import html
    return html.escape(t)


def _front_html(d: Design, rep) -> str:
    fe = d.settings.frontend
    if fe is None:
        return rep.paragraphs("No [frontend] table in the config: the responses below are the digital "
                              "chain alone, and nothing is known about what stops images.")
    out = rep.table(["stage", "what it is"], [[s.name, s.describe()] for s in fe.stages])
    if d.parts:
        out += rep.paragraphs("Parts of the RC stages: the -3 dB point they give and its spread for the "
                              "parts' tolerances (worst case: every part at the same end; 95 %: Monte "
                              "Carlo, parts uniform within tolerance).")
        out += rep.table(["stage", "R", "C", "asked", "-3 dB", "95 % interval", "worst case", "tolerance R / C"],
                         [[r["stage"], si(r["r_ohm"], "Ω", 3) + (f" ({r['series']})" if r["picked"] else ""),
                           si(r["c_farad"], "F", 3) + (f" ({r['c_series']})" if r["picked"] else ""),
                           si(r["asked_hz"], "Hz") if r["picked"] else "(parts given)",
                           si(r["cutoff_hz"], "Hz"),
                           f"{si(r['cutoff_low_hz'], 'Hz')} to {si(r['cutoff_high_hz'], 'Hz')}",
                           f"{si(r['worst_low_hz'], 'Hz')} to {si(r['worst_high_hz'], 'Hz')}",
                           f"{r['r_tolerance_pct']:g} % / {r['c_tolerance_pct']:g} %"] for r in d.parts])
    out += rep.paragraphs(f"Image of the reference at {si(d.fs - d.ref_hz, 'Hz')} (rate - reference): the "
                          f"front end leaves {d.alias_attenuation_db:.1f} dB of it relative to the reference.")
    if d.images:
        out += rep.table(["line above Nyquist", "frequency", "folds to", "front end leaves", "inside band of"],
                         [[im["label"], si(im["hz"], "Hz"), si(im["folds_to_hz"], "Hz"),
                           _db_text(im["front_end_db"]), ", ".join(im["inside"]) or "—"] for im in d.images])
    return out


def _chain_html(d: Design, rep) -> str:
    rows = []
    for c in d.chains:
        ch = next(x for x in d.settings.chains if x.name == c.name)
        stages = "; ".join(describe(s) for s in ch.stages) or "no filter stages"
        rows.append([c.name, stages, f"{_z(c.gain_db):+.2f} dB", si(c.group_delay_s, "s", 3),
                     f"{c.detector.kind}, {si(c.detector.enbw_hz, 'Hz', 3)}",
                     si(c.detector.settling_s, "s", 3), _settle_text(c),
                     f"{c.detector.enbw_settling:.3f}"])
    return (rep.paragraphs("Gain and group delay at the reference, front end and digital stages together. "
                           "ENBW is the detector's one-sided equivalent noise bandwidth; settling is the "
                           "time to stay within 1 % after the modulation switches on (the detector alone, "
                           "and the whole chain simulated); ENBW x settling is the lag-noise figure "
                           "(lower sees farther for the same lag).")
            + rep.table(["chain", "digital stages", "gain", "group delay", "detector, ENBW",
                         "detector settling", "chain settling", "ENBW × settling"], rows))


def _interferer_html(c, rep) -> str:
    head = ["line", "frequency", "filters (front end + stages)"]
    sel = any("lockin_rejection_db" in r for r in c.interferers)
    if sel:
        head.append("lock-in low-pass at the offset")
    rows = []
    for r in c.interferers:
        row = [r["label"], line_hz(r), _db_text(r["attenuation_db"])]
        if sel:
            row.append(_db_text(r["lockin_rejection_db"]))
        rows.append(row)
    note = ("Relative to the reference; mains lines at the worst point of the grid's wander "
            f"(±{predict.MAINS_WANDER_HZ:g} Hz per harmonic number). The lock-in's own rejection (its output low-pass at the line's "
            "distance from the reference) is shown apart; the two add up at the output." if sel else
            "Relative to the reference; mains lines at the worst point of the grid's wander "
            f"(±{predict.MAINS_WANDER_HZ:g} Hz per harmonic number). The RMS detector has no selectivity of its own: what the filters "
            "pass, it reads.")
    return rep.paragraphs(note) + rep.table(head, rows)
