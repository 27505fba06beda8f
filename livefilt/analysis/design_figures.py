"""The design report's figures (matplotlib on the Agg canvas, through
:func:`livefilt.analysis.report.figure`): front-end and chain responses with the
reference, interferers, Nyquist and images marked; group delay; the amplitude
step response at the detector output; predicted SNR against distance."""

from __future__ import annotations


import numpy as np

from livefilt.analysis.report import figure
from livefilt.dsp import frontend as front
from livefilt.dsp import predict
from livefilt.units import si

__all__ = ["draw_all", "frequency_grid"]

_FLOOR_PLOT_DB = -160.0


def frequency_grid(d, upto: float | None = None, n: int = 1500) -> np.ndarray:
    """Log-spaced frequencies from below the lowest line of interest to ``upto``."""
    lo = max(0.5, min([d.mains_hz, d.ref_hz] + [ln.hz for ln in d.lines if ln.hz > 0]) / 20)
    hi = upto or d.nyquist_hz
    f = np.geomspace(lo, hi, n)
    return np.unique(np.concatenate([f, [d.ref_hz] + [ln.hz for ln in d.lines if lo <= ln.hz <= hi]]))


def draw_all(d, rep, tick=None) -> dict[str, list[str]]:
    """Draw every figure into ``rep``; returns the names by page section;
    ``tick()`` after each figure."""
    out: dict[str, list[str]] = {"front": [], "chains": [], "snr": []}
    todo = []
    if d.settings.frontend is not None:
        todo.append(("front", lambda: _front_figure(d, rep)))
    for c in d.chains:
        todo.append(("chains", lambda c=c: _chain_figure(d, c, rep)))
    todo.append(("chains", lambda: _delay_figure(d, rep)))
    if any(c.step is not None for c in d.chains):
        todo.append(("chains", lambda: _step_figure(d, rep)))
    if d.settings.design.signal_at is not None:
        todo.append(("snr", lambda: _snr_figure(d, rep)))
    for where, draw in todo:
        out[where].append(draw())
        if tick:
            tick()
    return out


def _db(h) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.maximum(20 * np.log10(np.abs(h)), _FLOOR_PLOT_DB)


def _marks(ax, d, upto: float, labels: bool = True) -> None:
    """Reference, interferers, Nyquist and the reference's images (one line
    collection per kind: cheap to lay out)."""
    tr = ax.get_xaxis_transform()

    def group(xs, label, **kw):
        xs = [x for x in xs if 0 < x <= upto]
        if xs:
            ax.vlines(xs, 0, 1, transform=tr, label=label if labels else None, **kw)

    group([d.ref_hz], f"reference {si(d.ref_hz, 'Hz')}", color="#1b7f3b", lw=1.4)
    group([ln.hz for ln in d.lines], "interferers (DC, mains x1..x10, listed)",
          color="#8a8f99", lw=0.7, linestyles=":")
    group([d.nyquist_hz], "Nyquist", color="#333333", lw=1.0, linestyles="--")
    group([k * d.fs + s * d.ref_hz for k in (1, 2, 3) for s in (-1, 1)],
          "images of the reference (k·rate ± ref)", color="#c0392b", lw=0.9, linestyles="-.")


def _front_figure(d, rep) -> str:
    fe = d.settings.frontend
    upto = max(3.2 * d.fs, max([ln.hz for ln in d.lines] + [0]) * 1.5)
    f = frequency_grid(d, upto)
    fig, (am, ph) = figure(8.0, 6.0, rows=2, sharex=True)
    for s in fe.stages:
        am.semilogx(f, _db(front.stage_response(s, f)), lw=1.0, alpha=0.7, label=s.name)
    h = front.response(fe, f)
    am.semilogx(f, _db(h), color="black", lw=2.0, label="front end")
    ph.semilogx(f, np.degrees(np.unwrap(np.angle(h))), color="black", lw=1.6)
    _marks(am, d, upto)
    _marks(ph, d, upto, labels=False)
    am.set_ylim(max(_FLOOR_PLOT_DB, np.min(_db(h)) - 10), max(5, np.max(_db(h)) + 5))
    am.set_ylabel("gain (dB)")
    ph.set_ylabel("phase (degrees)")
    ph.set_xlabel("frequency (Hz)")
    am.set_title("Analog front end (on the board; never run on the samples)")
    am.legend(fontsize=7, loc="lower left", ncol=2)
    am.grid(True, which="both", alpha=0.3)
    ph.grid(True, which="both", alpha=0.3)
    return _save(rep, "front_end.png", fig, "Front end: gain and phase of each stage and of the whole, "
                      "with the reference, interferers, Nyquist and the reference's images")


def _chain_figure(d, c, rep) -> str:
    from livefilt.analysis.design_report import chain_settings
    ch = chain_settings(d, c.name)
    f = frequency_grid(d, d.nyquist_hz * 0.9999)
    hf = front.response(d.settings.frontend, f)
    hd = predict.digital_response(ch.stages, f, d.fs)
    fig, (am, ph) = figure(8.0, 6.0, rows=2, sharex=True)
    if d.settings.frontend is not None:
        am.semilogx(f, _db(hf), lw=1.0, color="#7b5ea7", label="front end")
        ph.semilogx(f, np.degrees(np.unwrap(np.angle(hf))), lw=1.0, color="#7b5ea7")
    both = hf * hd
    am.semilogx(f, _db(both), lw=2.6, color="black", label="both")
    ph.semilogx(f, np.degrees(np.unwrap(np.angle(both))), lw=2.2, color="black")
    # drawn on top of "both" so it shows where the front end is flat
    am.semilogx(f, _db(hd), lw=1.0, color="#d08a1e", ls="--", label="digital stages")
    ph.semilogx(f, np.degrees(np.unwrap(np.angle(hd))), lw=1.0, color="#d08a1e", ls="--")
    _marks(am, d, d.nyquist_hz)
    _marks(ph, d, d.nyquist_hz, labels=False)
    top = max(5, float(np.max(_db(both))) + 5, float(np.max(_db(hd))) + 5)
    am.set_ylim(max(_FLOOR_PLOT_DB, float(np.min(_db(both))) - 10), top)
    am.set_ylabel("gain (dB)")
    ph.set_ylabel("phase (degrees)")
    ph.set_xlabel("frequency (Hz)")
    gain = 0.0 if abs(c.gain_db) < 0.05 else c.gain_db
    am.set_title(f"Chain {c.name}: {gain:+.1f} dB at the reference, group delay "
                 f"{si(c.group_delay_s, 's', 3)}")
    am.legend(fontsize=7, loc="lower left", ncol=2)
    am.grid(True, which="both", alpha=0.3)
    ph.grid(True, which="both", alpha=0.3)
    return _save(rep, f"response_{_safe(c.name)}.png", fig,
                      f"Chain {c.name}: front end, digital stages and both, up to Nyquist")


def _delay_figure(d, rep) -> str:
    from livefilt.analysis.design_report import chain_settings
    f = frequency_grid(d, d.nyquist_hz * 0.999)
    fig, ax = figure(8.0, 3.8)
    vals = []
    for c in d.chains:
        ch = chain_settings(d, c.name)
        gd = front.group_delay(d.settings.frontend, f) + predict.digital_group_delay(ch.stages, f, d.fs)
        vals.append(gd)
        ax.semilogx(f, gd * 1e3, lw=1.4, label=f"chain {c.name}: {si(c.group_delay_s, 's', 3)} at the reference")
    allv = np.concatenate(vals) * 1e3
    lo, hi = np.nanpercentile(allv, [1, 99])
    span = max(hi - lo, 1e-3)
    ax.set_ylim(lo - 0.1 * span, hi + 0.1 * span)
    _marks(ax, d, d.nyquist_hz, labels=False)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("group delay (ms)")
    ax.set_title("Group delay, front end and digital stages (spikes at notches clipped)")
    ax.legend(fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    return _save(rep, "group_delay.png", fig, "Group delay of each chain; the reference is the green line")


def _step_figure(d, rep) -> str:
    fig, ax = figure(8.0, 4.0)
    for c in d.chains:
        if c.step is None:
            continue
        t, rel = c.step
        lab = (f"chain {c.name}: settles in {si(c.settling_s, 's', 3)}" if c.settling_s == c.settling_s
               else f"chain {c.name}: ripples {c.ripple_pct:.2g} %, never within 1 %")
        lab += f"; ENBW × settling {c.detector.enbw_settling:.3f}"
        line, = ax.plot(t, rel * 100, lw=1.4, label=lab)
        if c.settling_s == c.settling_s:
            ax.axvline(c.settling_s, color=line.get_color(), lw=0.8, ls="--")
    ax.axhspan(99, 101, color="#1b7f3b", alpha=0.15, label="within 1 % of the final value")
    ax.set_xlabel("time after the modulation switches on (s)")
    ax.set_ylabel("amplitude (% of final)")
    ax.set_ylim(-5, 115)
    ax.set_title("Amplitude at the detector output after a step at the reference (the lag you pay)")
    ax.legend(fontsize=8, loc="lower right")
    ax.grid(True, alpha=0.3)
    return _save(rep, "step.png", fig, "Simulated: a sine at the reference switched on at 0 s, through "
                      "the front end, the digital stages and the detector")


def _snr_figure(d, rep) -> str:
    ds = d.settings.design
    d0 = ds.signal_at[0]
    ranges = [predict.range_at_m(ds.snr_db, ds.signal_at, ds.noise_density, ds.exponent,
                                 c.detector.enbw_hz) for c in d.chains]
    hi = max(ranges + [d0]) * 2
    dist = np.geomspace(min(d0, min(ranges)) / 3, hi, 300)
    fig, ax = figure(7.0, 4.2)
    for c, r in zip(d.chains, ranges):
        line, = ax.semilogx(dist, predict.predicted_snr_db(dist, ds.signal_at, ds.noise_density,
                                                          ds.exponent, c.detector.enbw_hz),
                            lw=1.6, label=f"chain {c.name}: {r:.3g} m at {ds.snr_db:g} dB")
        ax.axvline(r, color=line.get_color(), lw=0.8, ls="--")
    ax.axhline(ds.snr_db, color="#333333", lw=1.0, ls=":", label="threshold")
    ax.plot([d0], [predict.predicted_snr_db(d0, ds.signal_at, ds.noise_density, ds.exponent,
                                            d.chains[0].detector.enbw_hz)], "o", color="black",
            label=f"measured point ({d0:g} m, chain {d.chains[0].name})")
    ax.set_xlabel("distance (m)")
    ax.set_ylabel("predicted SNR (dB)")
    ax.set_title(f"Predicted SNR, amplitude ~ distance^-{ds.exponent:g}, noise = density × √ENBW")
    ax.legend(fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    return _save(rep, "snr.png", fig, "Predicted SNR against distance for each chain")


def _save(rep, name: str, fig, caption: str) -> str:
    rep.figure(name, fig, caption)
    return name


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)
