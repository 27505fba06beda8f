"""``livefilt range RUN [RUN...]``: recorded runs with distance markers -> the
detection range, how sure it is, and the time constant that would reach further.

Method
------
1. **Segments.**  Each distance marker starts a segment; the next marker
   (any kind, a "moving" one included) or the run's end bounds it.  The
   first ``settling_margin_s`` of a segment are dropped: the chain's own
   settling to 99 %, the filter stages' tone-burst settling at the
   reference frequency plus the detector's step settling
   ``tau P^-1(n, 0.99)`` (REFERENCES row 3c; adding the two bounds the
   cascade's settling from above).
2. **Amplitude per segment** from the in-phase/quadrature rows: the vector
   mean ``z = mean(I) + j mean(Q)``.  A mean of magnitudes is biased up by
   noise (the Rice distribution's mean: S. O. Rice, Bell Syst. Tech. J. 23, 1944,
   from memory; tested against
   ``scipy.stats.rice``); the vector mean is not.  For the fit each
   segment's ``z`` is projected on the chain's signal phase (the phase of
   the amplitude-weighted sum of the segments' ``z``): an unbiased amplitude
   that may read below zero under the noise, so weak points inform the fit
   without pulling the exponent.
3. **Noise** from the fluctuation across the signal direction (the rows'
   component perpendicular to ``z``), corrected for the segment's finite
   number of independent samples: the rows are correlated through the
   output low-pass, ``var(mean) = sigma^2 / N_mean`` with
   ``N_mean = n / (1 + 2 sum (1 - k/n) rho(k dt))`` and ``rho`` the
   autocorrelation of n identical RC sections in closed form (see
   :func:`row_correlation`); ``N_mean -> 2 ENBW T`` for long segments.
   Pooled over the segments of one chain's settings, weighted by their
   degrees of freedom ``n / (1 + 2 sum (1 - k/n) rho^2)`` (the variance of a
   correlated series' sample variance: M. S. Bartlett, J. R. Stat. Soc.
   Suppl. 8, 1946; from memory).
4. **Fit** ``amplitude = c d^-k`` by weighted least squares in the linear
   domain (scipy.optimize.curve_fit, absolute sigma; scaled up by the
   reduced chi-square when that exceeds 1, common practice).  About 2: the
   target fills the beam; about 4: a small target inside the spot
   (common practice of the trade; REFERENCES row 9).
5. **Range** where ``c d^-k / sigma`` meets the SNR threshold, with a 95 %
   interval by the delta method on ``ln d`` from the covariance of
   ``(ln c, k)`` and the noise's own uncertainty ``var(ln sigma) =
   1 / (2 dof)``, the quantile from Student's t with the noise's degrees
   of freedom (the noise is estimated); and the measured range, the largest distance whose point
   is still at or above the threshold.
6. **Advisor** (``--want-m D``): assuming the noise near the reference is
   white, noise density ``sigma / sqrt(ENBW)``; the ENBW that reaches D is
   ``(c D^-k / g / density)^2``, and the time constant for each slope
   follows from the detector's own ENBW (REFERENCES row 3a), with its
   settling time.
"""

from __future__ import annotations

import functools
import json
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from livefilt.analysis.report import ReportFolder, figure
from livefilt.config import parse_config
from livefilt.dsp.design import chain_sos
from livefilt.dsp.detect import DetectorSpec, ReferenceSpec, make_detector
from livefilt.errors import LivefiltError, RecordingError, SettingError
from livefilt.runs.record import read_run

__all__ = ["main", "analyse", "build_report", "group_for_chain", "add_segments", "analyse_group", "segment_amplitudes", "row_correlation", "effective_samples",
           "tone_settling_s", "fit_power_law", "ChainGroup"]

COLOURS = ("#1f6f78", "#c98a1b", "#5a7d2a", "#8b3a62", "#4a5a8c", "#a0522d")  # the window's chain colours
MARKERS = ("o", "s", "^", "D", "v", "P")
MIN_ROWS = 5


# -- statistics of one segment ----------------------------------------------------
def segment_amplitudes(i: np.ndarray, q: np.ndarray) -> tuple[float, float]:
    """``(vector mean, scalar mean)``: ``|mean(I + jQ)|`` and ``mean(|I + jQ|)``."""
    return float(math.hypot(np.mean(i), np.mean(q))), float(np.mean(np.hypot(i, q)))


def row_correlation(lag_s: np.ndarray, tau: float, n: int) -> np.ndarray:
    """Normalised autocorrelation of white noise through ``n`` identical RC
    sections of time constant ``tau`` at lags ``lag_s``.

    Impulse response ``h(t) = t^(n-1) e^(-t/tau)``; by integration
    ``R(s) = e^(-s/tau) sum_j C(n-1, j) s^(n-1-j) (n-1+j)! (tau/2)^(n+j)``,
    ``rho = R(s) / R(0)``.  Its two-sided integral is ``1 / (2 ENBW)`` with
    the ENBW of REFERENCES row 3a (tested).
    """
    s = np.abs(np.asarray(lag_s, dtype=float))
    h = tau / 2.0
    total = np.zeros_like(s)
    for j in range(n):
        total += math.comb(n - 1, j) * s ** (n - 1 - j) * math.factorial(n - 1 + j) * h ** (n + j)
    r0 = math.factorial(2 * n - 2) * h ** (2 * n - 1)
    return np.exp(-s / tau) * total / r0


def effective_samples(rows: int, dt_s: float, tau: float, n: int) -> tuple[float, float]:
    """``(N_mean, dof)`` of ``rows`` output rows spaced ``dt_s``: the count of
    independent samples the mean is worth, and the degrees of freedom of the
    sample variance (Bartlett 1946: the same sums with ``rho^2``)."""
    if rows < 2:
        return float(rows), 0.0
    k = np.arange(1, rows)
    rho = row_correlation(k * dt_s, tau, n)
    w = 1.0 - k / rows
    n_mean = rows / (1.0 + 2.0 * float(np.sum(w * rho)))
    dof = rows / (1.0 + 2.0 * float(np.sum(w * rho * rho)))
    return n_mean, max(dof - 1.0, 0.5)


def tone_settling_s(sos: np.ndarray, fs: float, f_hz: float, fraction: float = 0.99) -> float:
    """Time for the filter stages' response to a tone switched on at ``f_hz``
    to come within ``1 - fraction`` of its steady amplitude (tone-burst
    settling; the envelope a lock-in sees after the target stops).

    Kept per (sections, rate, frequency, fraction): the live range view asks
    twice a second, and each answer filters at least a second of the tone."""
    if sos is None or len(sos) == 0:
        return 0.0
    sos = np.ascontiguousarray(sos, dtype=np.float64)
    return _tone_settling(sos.tobytes(), sos.shape[0], float(fs), float(f_hz), float(fraction))


@functools.lru_cache(maxsize=64)
def _tone_settling(sos_bytes: bytes, n_sec: int, fs: float, f_hz: float, fraction: float) -> float:
    from scipy.signal import sosfilt, sosfreqz
    sos = np.frombuffer(sos_bytes, np.float64).reshape(n_sec, 6).copy()
    _, h = sosfreqz(sos, worN=[f_hz], fs=fs)
    gain = abs(h[0])
    if gain == 0:
        return 0.0
    for seconds in (1.0, 10.0, 60.0):
        n = int(seconds * fs)
        k = np.arange(n)
        w = 2 * np.pi * f_hz / fs
        y = sosfilt(sos, np.cos(w * k))
        steady = np.real(h[0] * np.exp(1j * w * k))
        late = np.nonzero(np.abs(y - steady) > (1 - fraction) * gain)[0]
        if not len(late) or late[-1] < n - int(0.05 * n):
            return float((late[-1] + 1) / fs) if len(late) else 0.0
    return float(seconds)


def fit_power_law(d: np.ndarray, a: np.ndarray, sa: np.ndarray):
    """Weighted fit of ``a = c d^-k``; returns ``(ln c, k, cov, chi2_red)``."""
    from scipy.optimize import curve_fit
    d, a, sa = map(np.asarray, (d, a, sa))
    good = a > 3 * sa
    if good.sum() >= 2:
        slope, icpt = np.polyfit(np.log(d[good]), np.log(a[good]), 1, w=a[good] / sa[good])
        p0 = (icpt, -slope)
    else:
        p0 = (math.log(max(float(np.max(a)), 1e-30)) + 2 * math.log(float(np.min(d))), 2.0)

    def model(x, lc, k):
        return np.exp(lc - k * np.log(x))

    p, cov = curve_fit(model, d, a, p0=p0, sigma=sa, absolute_sigma=True, maxfev=20000)
    resid = (a - model(d, *p)) / sa
    dof = max(len(d) - 2, 1)
    chi2 = float(np.sum(resid ** 2) / dof)
    if chi2 > 1:
        cov = cov * chi2
    return float(p[0]), float(p[1]), cov, chi2


# -- runs and chains ------------------------------------------------------------------
@dataclass
class Segment:
    run: str
    distance_m: float
    note: str
    t0: float
    t1: float
    rows: int
    n_mean: float
    dof: float
    z: complex
    scalar: float
    var_perp: float
    along: float = float("nan")
    along_err: float = float("nan")
    snr_db: float = float("nan")
    snr_db_err: float = float("nan")


@dataclass
class ChainGroup:
    """One chain's settings, with every segment recorded under them."""

    label: str
    name: str
    settings: dict
    fs: float
    tau: float
    sections: int
    slope: int
    enbw_hz: float
    settling_s: float
    filter_settling_s: float
    detector: object
    runs: list = field(default_factory=list)
    segments: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    result: dict = field(default_factory=dict)


def _load(folder: str):
    run = read_run(folder, raw=False)
    cfg = run.config
    if not cfg:
        raise RecordingError(f"{folder}: run.toml has no [config]: not a livefilt run folder")
    rate = float(run.meta.get("run", {}).get("rate_hz", 0) or 0)
    chans = int(run.meta.get("source_info", {}).get("channels", 0) or 0)
    try:
        settings = parse_config(cfg, f"{folder}/run.toml")
        settings = settings.at_rate(rate, channels=chans or 16)
    except SettingError as e:
        raise RecordingError(f"{folder}/run.toml: its settings do not load: {e}") from None
    return run, settings, rate, chans


def _reference(settings, run, rate, chans):
    if settings.reference is not None:
        return settings.reference
    ref = run.meta.get("source_info", {}).get("reference")
    if isinstance(ref, dict) and "frequency_hz" in ref:
        return ReferenceSpec.from_mapping({"frequency_hz": ref["frequency_hz"]}, rate, chans or 2)
    return None


def _groups(folders):
    groups: dict[str, ChainGroup] = {}
    first_rate = None
    loaded = []
    for folder in folders:
        run, settings, rate, chans = _load(folder)
        if first_rate is None:
            first_rate = (rate, chans, folder)
        elif (rate, chans) != first_rate[:2]:
            raise LivefiltError(
                f"{folder}: recorded at {rate:g} Hz with {chans} channel(s), but {first_rate[2]} at "
                f"{first_rate[0]:g} Hz with {first_rate[1]}: a range report merges runs of one rate "
                "and channel count (make separate reports)")
        loaded.append((folder, run, settings, rate, chans))
    for folder, run, settings, rate, chans in loaded:
        reference = _reference(settings, run, rate, chans)
        every = max(1, int(round(settings.output.interval_s * rate)))
        for c in settings.chains:
            if c.detector.type != "lockin":
                continue
            mapping = c.to_mapping()
            ref_hz = reference.frequency_hz if reference is not None and reference.frequency_hz else None
            key = json.dumps([mapping, ref_hz, settings.output.interval_s], sort_keys=True, default=str)
            if key not in groups:
                det = make_detector(c.detector, reference, rate, every) if reference else None
                if det is None:
                    continue
                label = c.name
                if any(g.name == c.name for g in groups.values()):
                    label = f"{c.name} ({Path(folder).name})"
                groups[key] = group_for_chain(label, c.name, mapping, rate, det,
                                              chain_sos(c.stages, rate), ref_hz)
            g = groups[key]
            g.runs.append(str(folder))
            _segments(g, run, settings, folder)
    return list(groups.values()), loaded


def group_for_chain(label: str, name: str, mapping: dict, fs: float, detector, sos,
                    ref_hz: float | None) -> ChainGroup:
    """A :class:`ChainGroup` for one chain: its ENBW and its settling margin
    (filter stages' tone settling at ``ref_hz`` plus the detector's 99 %)."""
    f_set = tone_settling_s(sos, fs, ref_hz) if ref_hz else 0.0
    spec = detector.spec
    return ChainGroup(label, name, mapping, fs, spec.time_constant_s, spec.sections,
                      spec.slope_db_oct, detector.enbw_hz, f_set + detector.settling_s(0.99),
                      f_set, detector)


def _segments(g: ChainGroup, run, settings, folder):
    rows = run.chain_rows(g.name)
    t = rows.get("time_s", np.zeros(0))
    dt = settings.output.interval_s
    end = float(t[-1]) + dt if len(t) else 0.0
    add_segments(g, t, rows.get("in_phase", np.zeros(0)), rows.get("quadrature", np.zeros(0)),
                 run.markers, dt, end, Path(folder).name)


def add_segments(g: ChainGroup, t, ii, qq, markers, dt: float, end: float, run_name: str) -> None:
    """Cut rows (times ``t``, in-phase ``ii``, quadrature ``qq``) at ``markers``
    into segments of ``g`` (see the module's method, steps 1 to 3)."""
    marks = sorted(markers, key=lambda m: m.get("time_s", 0.0))
    for j, m in enumerate(marks):
        d = m.get("distance_m")
        if d is None:
            continue
        t0 = float(m["time_s"]) + g.settling_s
        t1 = float(marks[j + 1]["time_s"]) if j + 1 < len(marks) else end
        sel = (t >= t0) & (t < t1) & np.isfinite(ii) & np.isfinite(qq)
        n = int(sel.sum())
        if n < MIN_ROWS:
            g.skipped.append(f"{run_name}: {d:g} m at {m['time_s']:g} s: "
                             f"{max(t1 - t0, 0):.2f} s left after the {g.settling_s:.2f} s settling margin")
            continue
        i, q = ii[sel], qq[sel]
        zbar = complex(np.mean(i), np.mean(q))
        vec, scal = segment_amplitudes(i, q)
        u = (-zbar.imag / vec, zbar.real / vec) if vec > 0 else (0.0, 1.0)
        perp = i * u[0] + q * u[1]
        n_mean, dof = effective_samples(n, dt, g.tau, g.sections)
        ss = float(np.sum((perp - perp.mean()) ** 2))
        var = ss / (n * (1.0 - 1.0 / n_mean)) if n_mean > 1 else float("nan")
        g.segments.append(Segment(run_name, float(d), m.get("note", ""), t0, t1, n,
                                  n_mean, dof, zbar, scal, var))


def analyse_group(g: ChainGroup, snr_db: float, want_m: float | None = None) -> dict:
    """Noise, fit, range (and advice) for one group's segments; the result dict."""
    _analyse(g, snr_db, want_m)
    return g.result


def _analyse(g: ChainGroup, snr_db: float, want_m: float | None) -> None:
    segs = [s for s in g.segments if math.isfinite(s.var_perp)]
    thr = 10 ** (snr_db / 20)
    res: dict = {"snr_db_threshold": snr_db}
    g.result = res
    if not segs:
        res["problem"] = "no segment long enough after the settling margin"
        return
    dof = sum(s.dof for s in segs)
    sigma = math.sqrt(sum(s.dof * s.var_perp for s in segs) / dof)
    var_ln_sigma = 1.0 / (2.0 * dof)
    total = sum(s.z * abs(s.z) for s in segs)
    phase = total / abs(total) if abs(total) > 0 else 1.0
    for s in segs:
        s.along = float((s.z * np.conj(phase)).real)
        s.along_err = sigma / math.sqrt(s.n_mean)
        if s.along > 0:
            s.snr_db = 20 * math.log10(s.along / sigma)
            rel = math.hypot(s.along_err / s.along, math.sqrt(var_ln_sigma))
            s.snr_db_err = 20 / math.log(10) * rel
    res.update(noise=sigma, noise_err_rel=math.sqrt(var_ln_sigma), noise_dof=dof,
               signal_phase_deg=math.degrees(math.atan2(phase.imag, phase.real)),
               points=len(segs), distances_m=len({s.distance_m for s in segs}))
    above = [s.distance_m for s in segs if s.along >= thr * sigma]
    res["measured_range_m"] = max(above) if above else float("nan")
    if len({s.distance_m for s in segs}) < 2:
        res["problem"] = "the fit needs points at two distances at least"
        return
    d = np.array([s.distance_m for s in segs])
    a = np.array([s.along for s in segs])
    sa = np.array([s.along_err for s in segs])
    try:
        lc, k, cov, chi2 = fit_power_law(d, a, sa)
    except (RuntimeError, ValueError) as e:
        res["problem"] = f"the fit did not converge ({e})"
        return
    k_err = math.sqrt(cov[1, 1])
    res.update(exponent=k, exponent_err=k_err, amplitude_at_1m=math.exp(lc),
               fit_chi2_reduced=chi2)
    if k <= 0:
        res["problem"] = "the amplitude does not fall with distance: no range"
        return
    ln_d = (lc - math.log(sigma) - math.log(thr)) / k
    grad = np.array([1 / k, -ln_d / k])
    var_ln_d = float(grad @ cov @ grad) + var_ln_sigma / k ** 2
    sd = math.sqrt(max(var_ln_d, 0.0))
    from scipy.stats import t as student_t
    z = float(student_t.ppf(0.975, dof))  # the noise is estimated: Student's t, not the normal
    res.update(range_m=math.exp(ln_d), range_low_m=math.exp(ln_d - z * sd),
               range_high_m=math.exp(ln_d + z * sd), interval_quantile=z)
    if want_m:
        res["advisor"] = _advise(g, want_m, lc, k, sigma, thr)


def _advise(g: ChainGroup, want_m: float, lc: float, k: float, sigma: float, thr: float) -> dict:
    """Time constants that reach ``want_m`` at the threshold (white noise assumed)."""
    density = sigma / math.sqrt(g.enbw_hz)
    need_noise = math.exp(lc - k * math.log(want_m)) / thr
    need_enbw = (need_noise / density) ** 2
    ref = g.detector.reference if hasattr(g.detector, "reference") else None
    options = []
    for slope in (6, 12, 18, 24):
        det = _detector_like(g, g.tau, slope, ref)
        tau = g.tau * det.enbw_hz / need_enbw  # ENBW scales as 1/tau (REFERENCES row 3a)
        try:
            det2 = _detector_like(g, tau, slope, ref)
        except SettingError:
            options.append({"slope_db_oct": slope, "time_constant_s": tau, "settling_s": float("nan"),
                            "note": "below 2 sample periods: any time constant reaches it"})
            continue
        options.append({"slope_db_oct": slope, "time_constant_s": tau,
                        "settling_s": g.filter_settling_s + det2.settling_s(0.99),
                        "enbw_hz": det2.enbw_hz})
    same = next(o for o in options if o["slope_db_oct"] == g.slope)
    return {"want_m": want_m, "noise_density": density, "needed_enbw_hz": need_enbw,
            "time_constant_s": same["time_constant_s"], "slope_db_oct": g.slope,
            "settling_s": same["settling_s"], "alternatives": options,
            "assumes": "white noise near the reference frequency"}


def _detector_like(g: ChainGroup, tau: float, slope: int, ref):
    spec = DetectorSpec.from_mapping({"type": "lockin", "time_constant_s": tau,
                                      "slope_db_oct": slope}, g.fs)
    every = g.detector.output_every
    return make_detector(spec, ref, g.fs, every)


# -- output -----------------------------------------------------------------------------
def _fmt_m(x) -> str:
    if x is None or not math.isfinite(x):
        return "—"
    return f"{x:.3g} m"


def _figures(rep: ReportFolder, groups, snr_db: float) -> list[str]:
    thr = 10 ** (snr_db / 20)
    names = []
    fig, ax = figure(7.4, 4.6)
    fig2, ax2 = figure(7.4, 4.6)
    dmin = min((s.distance_m for g in groups for s in g.segments), default=0.1)
    dmax = max((s.distance_m for g in groups for s in g.segments), default=1.0)
    for gi, g in enumerate(groups):
        col, mk = COLOURS[gi % len(COLOURS)], MARKERS[gi % len(MARKERS)]
        segs = [s for s in g.segments if math.isfinite(s.along)]
        r = g.result
        if not segs or "noise" not in r:
            continue
        sigma = r["noise"]
        pos = [s for s in segs if s.along > 2 * s.along_err]
        low = [s for s in segs if s.along <= 2 * s.along_err]
        ax.errorbar([s.distance_m for s in pos], [s.along for s in pos],
                    yerr=[s.along_err for s in pos], fmt=mk, color=col, ms=5, capsize=2,
                    label=f"{g.label}: segments")
        if low:
            ax.plot([s.distance_m for s in low], [max(s.along, 0) + 2 * s.along_err for s in low],
                    linestyle="none", marker="v", color=col, mfc="none",
                    label=f"{g.label}: under the noise (upper limit, 2 sigma)")
        ax.axhline(sigma, color=col, lw=0.8, ls=":", alpha=0.8)
        ax.axhline(sigma * thr, color=col, lw=0.9, ls="--", alpha=0.8)
        snr_pts = [s for s in segs if s.along > 0]
        lo_err, hi_err = [], []
        for s in snr_pts:  # one sigma of the amplitude, mapped through 20 log10 (asymmetric)
            hi_err.append(20 * math.log10((s.along + s.along_err) / s.along))
            lo_err.append(20 * math.log10(s.along / (s.along - s.along_err))
                          if s.along > 1.25 * s.along_err else 12.0)
        ax2.errorbar([s.distance_m for s in snr_pts], [s.snr_db for s in snr_pts],
                     yerr=[lo_err, hi_err], fmt=mk, color=col, ms=5, capsize=2, label=f"{g.label}")
        if "range_m" in r:
            top = max(dmax, r["range_high_m"]) * 1.4
            xs = np.geomspace(dmin / 1.3, top, 200)
            amp = r["amplitude_at_1m"] * xs ** -r["exponent"]
            lab = f"{g.label}: fit d^-{r['exponent']:.2f}"
            ax.plot(xs, amp, color=col, lw=1.4, label=lab)
            ax2.plot(xs, 20 * np.log10(amp / sigma), color=col, lw=1.4)
            for a_ in (ax, ax2):
                a_.axvspan(r["range_low_m"], r["range_high_m"], color=col, alpha=0.12)
                a_.axvline(r["range_m"], color=col, lw=1.2, ls="-.")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("distance (m)")
    ax.set_ylabel("amplitude along the signal phase (rms, input units)")
    ax.set_title("Amplitude against distance: dotted = noise, dashed = threshold, "
                 "band = predicted range (95 %)", fontsize=9)
    ax.grid(True, which="both", alpha=0.25)
    ax.legend(fontsize=7, loc="lower left")
    names.append("amplitude.png")
    rep.figure("amplitude.png", fig, "Amplitude (vector mean of in-phase/quadrature, projected on "
               "the signal phase) against distance, with the power-law fit.")
    ax2.set_xscale("log")
    ax2.axhline(snr_db, color="#37414a", lw=1, ls="--", label=f"threshold {snr_db:g} dB")
    ax2.set_xlabel("distance (m)")
    ax2.set_ylabel("SNR (dB)")
    ax2.set_title("SNR against distance: line = fit, band = predicted range (95 %)", fontsize=9)
    ax2.grid(True, which="both", alpha=0.25)
    ax2.legend(fontsize=8)
    names.append("snr.png")
    rep.figure("snr.png", fig2, "SNR against distance; the fitted range is where the line "
               "crosses the threshold.")
    return names


def _points_rows(groups):
    for g in groups:
        r = g.result
        for s in g.segments:
            yield [s.run, g.label, s.distance_m, s.note, round(s.t0, 4), round(s.t1, 4), s.rows,
                   round(s.n_mean, 3), s.z.real, s.z.imag, abs(s.z), s.scalar, s.along, s.along_err,
                   math.sqrt(s.var_perp) if s.var_perp >= 0 else float("nan"),
                   r.get("noise", float("nan")), s.snr_db, s.snr_db_err]


POINT_COLUMNS = ["run", "chain", "distance_m", "note", "t_start_s", "t_end_s", "rows",
                 "independent_samples", "in_phase", "quadrature", "amplitude_vector",
                 "amplitude_scalar", "amplitude", "amplitude_err", "noise_segment", "noise_pooled",
                 "snr_db", "snr_db_err"]


def analyse(folders, snr_db: float = 10.0, want_m: float | None = None):
    """Segments, noise, fit, range and advice for ``folders`` (nothing written);
    returns ``(groups, doc)``, doc being range.toml's document."""
    if not math.isfinite(snr_db):
        raise SettingError("--snr-db", snr_db, "must be a finite number of dB")
    if want_m is not None and not (math.isfinite(want_m) and want_m > 0):
        raise SettingError("--want-m", want_m, "must be a distance above 0 m")
    folders = [str(f) for f in folders]
    reports = [f for f in folders if (Path(f) / "range.toml").is_file() and not (Path(f) / "run.toml").exists()]
    if reports and len(reports) < len(folders):  # "livefilt range runs/*" after a first report
        for f in reports:
            print(f"livefilt: skipping {f}: a range report, not a run", file=sys.stderr)
        folders = [f for f in folders if f not in reports]
    groups, loaded = _groups(folders)
    if not groups:
        raise LivefiltError(f"{folders[0]}: no lock-in chain in these runs: the range report "
                            "needs in-phase and quadrature rows")
    if not any(m.get("distance_m") is not None for _, run, *_ in loaded for m in run.markers):
        raise LivefiltError(f"{folders[0]}: no distance markers in these runs: add them while "
                            "recording (type a distance and Enter) or replay with --marks FILE.csv")
    for g in groups:
        _analyse(g, snr_db, want_m)
    doc = {"report": {"runs": folders, "snr_db_threshold": snr_db,
                      "method": "vector mean per segment, perpendicular noise pooled and "
                                "corrected for correlated rows, weighted power-law fit, "
                                "95 % interval by the delta method"},
           "chains": {}}
    if want_m:
        doc["report"]["want_m"] = want_m
    for g in groups:
        entry = dict(g.result)
        entry.update(settling_margin_s=g.settling_s, filter_settling_s=g.filter_settling_s,
                     enbw_hz=g.enbw_hz, runs=sorted(set(g.runs)), settings=g.settings)
        if g.skipped:
            entry["skipped"] = g.skipped
        doc["chains"][g.label] = _clean(entry)
    return groups, doc


def build_report(folders, snr_db: float = 10.0, want_m: float | None = None, out=None,
                 stream=None) -> dict:
    """Write the report for ``folders`` into ``out`` (default: ``range-RUN``
    beside the first run); returns range.toml's document."""
    from livefilt.progress import progress
    stream = stream if stream is not None else sys.stdout
    folders = [str(f) for f in folders]
    with progress(4, "range report", "step") as bar:
        groups, doc = analyse(folders, snr_db, want_m)
        bar.update(1)
        first = Path(doc["report"]["runs"][0])
        out = Path(out) if out else first.parent / f"range-{first.name}"
        rep = ReportFolder(out, "Detection range")
        rep.toml("range.toml", doc)
        rep.csv("points.csv", POINT_COLUMNS, _points_rows(groups))
        bar.update(1)
        _figures(rep, groups, snr_db)
        bar.update(1)
        _page(rep, groups, doc, snr_db, want_m)
        bar.update(1)
    _print_table(groups, snr_db, out, stream)
    return doc


def _clean(v):
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items() if not (isinstance(x, float) and math.isnan(x))}
    if isinstance(v, (list, tuple)):
        return [_clean(x) for x in v]
    if isinstance(v, (np.floating, np.integer)):
        return v.item()
    return v


def _summary_rows(groups):
    for g in groups:
        r = g.result
        k = f"{r['exponent']:.3f} ± {r['exponent_err']:.3f}" if "exponent" in r else "—"
        rng = (f"{_fmt_m(r['range_m'])} ({r['range_low_m']:.3g}–{r['range_high_m']:.3g})"
               if "range_m" in r else r.get("problem", "—"))
        yield [g.label, k, rng, _fmt_m(r.get("measured_range_m")), f"{g.settling_s:.2f} s",
               f"{g.tau:g} s / {g.slope} dB/oct", str(r.get("points", 0))]


SUMMARY_HEADER = ["chain", "exponent k", "range (95 % interval)", "measured range",
                  "settling margin", "time constant / slope", "points"]


def _page(rep: ReportFolder, groups, doc, snr_db, want_m):
    runs = doc["report"]["runs"]
    rep.section("Answer", rep.paragraphs(
        f"Detection range at an SNR of {snr_db:g} dB, from {len(runs)} run(s): "
        + "; ".join(f"chain {g.label}: {_fmt_m(g.result.get('range_m'))}" for g in groups) + ".",
        "The exponent k says how the echo falls with distance: about 2 when the target fills "
        "the beam, about 4 when it is smaller than the spot (common practice).")
        + rep.table(SUMMARY_HEADER, list(_summary_rows(groups))))
    rep.section("Amplitude and SNR against distance",
                rep.img("amplitude.png") + rep.img("snr.png"))
    if want_m:
        rows = []
        for g in groups:
            adv = g.result.get("advisor")
            if not adv:
                continue
            for o in adv["alternatives"]:
                rows.append([g.label, f"{o['slope_db_oct']} dB/oct" + (" (now)" if o["slope_db_oct"] == g.slope else ""),
                             f"{o['time_constant_s']:.4g} s", f"{o['settling_s']:.3g} s"
                             if math.isfinite(o["settling_s"]) else o.get("note", "—")])
        rep.section(f"Time constant to reach {want_m:g} m", rep.paragraphs(
            f"The time constant each slope needs for {want_m:g} m at {snr_db:g} dB, and the "
            "settling time (99 %) it costs. This assumes the noise near the reference frequency "
            "is white: a longer time constant narrows the bandwidth, and the noise falls with the "
            "square root of the ENBW only if its density is flat there. Interference close to the "
            "reference, or drift, does not average away like that.")
            + rep.table(["chain", "slope", "time constant", "settling (99 %)"], rows))
    pts = [[s.run, g.label, f"{s.distance_m:g}", s.note, f"{s.t0:.2f}–{s.t1:.2f}", s.rows,
            f"{s.along:.4g}", f"{s.along_err:.2g}",
            f"{s.snr_db:.1f}" if math.isfinite(s.snr_db) else "under noise"]
           for g in groups for s in g.segments]
    rep.section("Points", rep.paragraphs(
        "One row per segment and chain (all columns in points.csv). Amplitude: the vector mean "
        "of the in-phase/quadrature rows projected on the signal phase; a mean of magnitudes "
        "would read high near the noise (Rice 1944).")
        + rep.table(["run", "chain", "distance (m)", "note", "used (s)", "rows", "amplitude",
                     "±", "SNR (dB)"], pts))
    skipped = [f"{g.label}: {s}" for g in groups for s in g.skipped]
    import re
    method = __doc__.split("Method\n------\n", 1)[1].strip().replace("**", "").replace("``", "")
    method = method.replace(":func:", "").replace("`", "")
    steps = [" ".join(p.split()) for p in re.split(r"\n(?=\d\. )", method)]
    rep.section("Method and settings", rep.paragraphs(*steps)
                + rep.table(["chain", "settings", "ENBW", "settling margin"],
                            [[g.label, json.dumps(g.settings, default=str), f"{g.enbw_hz:.4g} Hz",
                              f"{g.settling_s:.3g} s (filters {g.filter_settling_s:.3g} s)"] for g in groups])
                + (rep.paragraphs("Left out: " + "; ".join(skipped)) if skipped else ""))
    rep.html("report.html", subtitle=", ".join(Path(r).name for r in runs))


def _print_table(groups, snr_db, out, stream):
    rows = [SUMMARY_HEADER[:5]] + [r[:5] for r in _summary_rows(groups)]
    widths = [max(len(str(r[i])) for r in rows) for i in range(5)]
    print(f"detection range at {snr_db:g} dB SNR", file=stream)
    for r in rows:
        print("  ".join(str(v).ljust(w) for v, w in zip(r, widths)).rstrip(), file=stream)
    for g in groups:
        adv = g.result.get("advisor")
        if adv:
            print(f"{g.label}: for {adv['want_m']:g} m use a time constant of "
                  f"{adv['time_constant_s']:.3g} s at {adv['slope_db_oct']} dB/oct "
                  f"(settling {adv['settling_s']:.3g} s; assumes white noise near the reference)",
                  file=stream)
    print(f"report: {out / 'report.html'}", file=stream)


def main(args) -> int:
    t0 = time.monotonic()
    build_report(args.runs, args.snr_db, args.want_m, args.out)
    print(f"took {time.monotonic() - t0:.1f} s", file=sys.stderr)
    return 0
