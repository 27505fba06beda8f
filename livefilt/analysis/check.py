"""``livefilt check``: is this digitizer good enough, and is the stream whole?

Acquires ``--duration`` seconds from the configured source (or reads a
recording with ``--input``) and reports, in ``DIR/check.toml``, a spectrum
PNG, ``DIR/check.html`` and a few verdict lines on the terminal:

- stream health (live sources): samples against the host's monotonic clock
  (rate error in ppm with the uncertainty the duration allows), dropped
  frames, ring overruns, the driver's own counters (serial CRC errors and
  sequence gaps, sound-card overflows and underflows), the hand-over
  (callback) interval, its jitter and the longest gap;
- noise: Welch density in input units per root hertz, the median floor
  away from every line near the reference, mains found and measured, the
  largest interferer, the dynamic reserve;
- test tone: the sound card with a ``drive`` table plays a sine at -1 dBFS
  (997 Hz unless ``--tone``; 997 is prime, so it shares no small factor with
  any common rate: the trade's habit) and measures it back; a recording's
  largest tone (or ``--tone``) is analysed too.  IEEE Std 1057 four-parameter
  fit; SINAD, THD (harmonics 2..10), SFDR, ENOB per IEEE Std 1241.

The check reads the source through :func:`livefilt.analysis.capture.capture`
(not through the engine: it looks at the raw samples and times the
driver's hand-overs itself).
"""

from __future__ import annotations

import math
import sys
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from livefilt.analysis.linefigure import draw_density
from livefilt.analysis.capture import Capture, capture, channel_index, detector_enbw, stream_health
from livefilt.analysis.report import ReportFolder, figure
from livefilt.config import Settings, demo_config, load_config
from livefilt.dsp import sinefit, spectrum
from livefilt.errors import LivefiltError, SettingError
from livefilt.stream.engine import build_source
from livefilt.units import si

__all__ = ["main", "run_check", "analyse", "TONE_HZ", "TONE_DBFS"]

#: The test tone: 997 Hz (prime) at -1 dBFS (common practice for ADC tests).
TONE_HZ = 997.0
TONE_DBFS = -1.0
DEFAULT_S = 10.0
#: With --input and no --tone, the largest line is analysed as a test tone only
#: when it holds at least this share of the recording's AC power.
TONE_SHARE = 0.5


def main(args) -> int:
    settings = load_config(args.config) if args.config else demo_config()
    out = Path(args.out) if args.out else Path("checks") / (
        "check-" + datetime.now(timezone.utc).strftime("%Y%m%d-%H%M%S"))
    # a recording checked without a config: the demo's reference means nothing for it
    result = run_check(settings, out, input_path=args.input, duration_s=args.duration,
                       tone_hz=args.tone, config_reference=bool(args.config) or not args.input)
    for line in result["verdict"]:
        print(line)
    sys.stdout.flush()
    print(f"report: {out / 'check.html'}", file=sys.stderr)
    return 0


def run_check(settings: Settings, out, input_path=None, duration_s=None, tone_hz=None,
              config_reference: bool = True) -> dict:
    """Acquire, analyse and write the report; returns the TOML document
    (with ``verdict``, the terminal lines)."""
    if tone_hz is not None and not tone_hz > 0:
        raise SettingError("--tone", tone_hz, "must be a frequency above 0 Hz")
    played = None
    if input_path:
        from livefilt.acquire.source import load_driver
        src = load_driver("file").from_settings({"path": str(input_path), "pace": "fast"},
                                                settings.source.rate_hz, settings.source.block)
        seconds = duration_s
    else:
        overrides = {}
        s = settings.source
        if s.driver == "soundcard" and "drive" in s.options:
            played = _tone_drive(dict(s.options["drive"]), s.options, tone_hz or TONE_HZ, s.rate_hz)
            # record only the loopback input: it becomes ring channel 0
            overrides.update(drive=played, channels=[played["loopback_channel"]],
                             reference_channel=None)
        if s.driver in ("simulated", "file") and s.options.get("pace") == "fast":
            overrides["pace"] = "realtime"  # the rate check needs a paced stream
        src = build_source(settings, **overrides)
        seconds = duration_s or DEFAULT_S
    cap = capture(src, seconds, desc="check", settle_s=0.3 if played else 0.0)
    volts_fs = _volts_per_fs(src)  # after open: a serial board states its reference then
    if cap.data.shape[0] < 1024:
        raise LivefiltError(f"{cap.device}: only {cap.data.shape[0]} frames arrived: "
                            "need at least 1024 for a check")
    channel = _channel(settings, cap, played)
    if played is not None:  # the drive's own frequency is the modulation; the tone is a test
        ref_hz = float(settings.source.options["drive"].get("frequency_hz", 0)) or None
    else:
        ref_hz = _reference_hz(settings if config_reference else None, src)
    enbw = detector_enbw(settings, cap.rate_hz)
    known = _known_noise(src)
    if played is not None:
        tone = float(src.reference_hint["frequency_hz"]) if src.reference_hint else played["frequency_hz"]
    else:
        tone = tone_hz
    doc, figs = analyse(cap, channel, ref_hz=ref_hz, enbw_hz=enbw, tone_hz=tone,
                        tone_played=played is not None, find_tone=bool(input_path) and tone is None,
                        volts_per_fs=volts_fs, known_noise=known)
    _write(out, doc, figs, cap)
    return doc


def analyse(cap: Capture, channel: int, ref_hz=None, enbw_hz=1.0, tone_hz=None,
            tone_played=False, find_tone=False, volts_per_fs=None, known_noise=None):
    """The check's figures from a capture: (TOML document, figure data)."""
    x = cap.data[:, channel].astype(np.float64)
    fs = cap.rate_hz
    units = cap.units
    # work in full-scale units (FS: 1.0 is a full-scale sine's peak), volts beside
    # them where calibrated; volts alone when the full scale is not known
    to_fs = (1.0 / volts_per_fs) if (units == "V" and volts_per_fs) else 1.0
    v_per_fs = volts_per_fs if volts_per_fs else None
    u = "V" if (units == "V" and not volts_per_fs) else "FS"
    xf = x * to_fs
    doc: dict = {"source": {"device": cap.device, "rate_hz": fs, "channel": cap.channel_names[channel],
                            "units": units, "seconds": cap.seconds}}
    verdict: list[str] = []
    raw = spectrum.welch_density(xf, fs, resolution_hz=_resolution(cap.seconds), units=u)
    # the tone
    tf = None
    if find_tone:
        # a recording's largest tone is a test tone only when it holds most of the power
        lines0 = spectrum.find_lines(raw, threshold_db=20.0)
        narrow = [ln for ln in lines0 if ln.kind != "hump" and ln.hz > 10 * raw.bin_hz]
        ac = float(np.var(xf))
        share = narrow[0].level ** 2 / ac if narrow and ac > 0 else 0.0
        if share >= TONE_SHARE:
            tone_hz = narrow[0].hz
        else:
            verdict.append("tone: none dominates the recording"
                           + (f" (the largest line, {narrow[0].label}, holds {100 * share:.0f} % of "
                              "the power)" if narrow else "") + "; give --tone HZ to analyse one")
    if tone_hz is not None:
        if not 0 < tone_hz < fs / 2:
            raise SettingError("--tone", tone_hz, f"must be above 0 and below Nyquist, {fs / 2:g} Hz")
        tf = sinefit.tone_figures(xf, fs, tone_hz, full_scale=1.0)
        doc["tone"] = {"hz": tf.fit.frequency_hz,
                       "amplitude_fs": tf.amplitude_fs if u == "FS" else math.nan,
                       "sinad_db": tf.sinad_db, "thd_db": tf.thd_db, "sfdr_db": tf.sfdr_db,
                       "enob_bits": tf.enob_bits, "enob_fs_bits": tf.enob_fs_bits,
                       "played": bool(tone_played),
                       "harmonics": [{"h": h, "hz": f, "amplitude_fs": a} for h, f, a in tf.harmonics]}
        level = (f"{20 * math.log10(max(tf.amplitude_fs, 1e-300)):.2f} dBFS" if u == "FS"
                 else f"{si(tf.fit.amplitude, 'V', 4)} peak")
        verdict.append(
            f"tone {tf.fit.frequency_hz:.3f} Hz at {level}: "
            f"SINAD {tf.sinad_db:.1f} dB, THD {tf.thd_db:.1f} dB, SFDR {tf.sfdr_db:.1f} dB, "
            f"ENOB {tf.enob_bits:.2f} bits ({tf.enob_fs_bits:.2f} referred to full scale)")
        # the floor is measured on what is left after the fitted fundamental
        resid = xf - tf.fit.model(xf.size)
        spec = spectrum.welch_density(resid, fs, resolution_hz=_resolution(cap.seconds), units=u)
    else:
        if tone_played:
            verdict.append("tone: not analysed")
        spec = raw
    known = {}
    if tf is not None:
        known[tf.fit.frequency_hz] = f"test tone {tf.fit.frequency_hz:.1f} Hz (fitted out)"
        for h, f, _ in tf.harmonics:
            known[f] = f"tone harmonic {h}"
    if ref_hz:
        known[ref_hz] = ("the modulation (reference)", "signal")
        for h in (2, 3, 4, 5, 6, 7):  # a chopped source's harmonics are the signal's too
            if h * ref_hz < fs / 2:
                known.setdefault(h * ref_hz, (f"modulation harmonic {h}", "signal"))
    lines = spectrum.find_lines(spec, known=known)
    nominal, mains_measured = spectrum.measure_mains(spec, lines)
    if nominal:
        lines = spectrum.find_lines(spec, mains_hz=mains_measured, known=known)
    # the floor: near the reference, else over the useful band
    if ref_hz:
        lo, hi = ref_hz / 1.25, min(ref_hz * 1.25, 0.49 * fs)
        where = f"{lo:.0f}-{hi:.0f} Hz around the reference {ref_hz:g} Hz"
    else:
        lo, hi = max(20.0, 10 * spec.bin_hz), 0.45 * fs
        where = f"{lo:.0f} Hz-{hi / 1000:.1f} kHz (no reference configured)"
    floor = spectrum.median_floor(spec, lo, hi, lines)
    wide = spectrum.median_floor(spec, max(20.0, 10 * spec.bin_hz), 0.45 * fs, lines)
    noise = {"density_fs_per_rthz": floor if u == "FS" else math.nan, "band_hz": [lo, hi],
             "wide_density_fs_per_rthz": wide if u == "FS" else math.nan,
             "window": spec.window, "enbw_bins": spec.enbw_bins, "enbw_hz": spec.enbw_hz,
             "segment": spec.segment, "averages": spec.averages, "detector_enbw_hz": enbw_hz}
    if v_per_fs:
        noise["density_v_per_rthz"] = floor * v_per_fs
        noise["volts_full_scale"] = v_per_fs
    elif u == "V":
        noise["density_v_per_rthz"] = floor
        noise["wide_density_v_per_rthz"] = wide
    noise_det = floor * math.sqrt(enbw_hz)
    fs_rms = 1 / math.sqrt(2)  # a full-scale sine, rms (amplitudes in livefilt are rms)
    noise["dynamic_reserve_db"] = (20 * math.log10(fs_rms / noise_det) if noise_det > 0 else math.inf) \
        if u == "FS" else math.nan
    interferers = [ln for ln in lines if ln.kind not in ("tone", "signal")]
    peak = float(np.max(np.abs(xf - xf.mean())))
    if tf is None and u == "FS":
        left = max(1.0 - peak, 0.0)
        noise["reserve_left_db"] = (20 * math.log10(left / math.sqrt(2) / noise_det)
                                    if left > 0 and noise_det > 0 else -math.inf)
    noise["peak_fs" if u == "FS" else "peak_v"] = peak
    if interferers:
        big = interferers[0]
        noise["largest_interferer"] = {"hz": big.hz, "label": big.label,
                                       "level_fs" if u == "FS" else "level_v": big.level}
    if known_noise:
        noise["expected_density_fs_per_rthz"] = known_noise
        noise["expected_ratio"] = floor / known_noise
    doc["noise"] = noise
    doc["mains"] = {"hz": float(nominal) if nominal else math.nan, "found": bool(nominal),
                    "measured_hz": mains_measured}
    doc["lines"] = [ln.to_mapping() for ln in lines[:40]]
    # verdict: noise
    dens = _density_text(floor, u)
    volts = f" ({_density_text(floor * v_per_fs, 'V')})" if v_per_fs else ""
    reserve = (f"; dynamic reserve {noise['dynamic_reserve_db']:.0f} dB" if u == "FS"
               else "; full scale unknown, so no dynamic reserve")
    verdict.append(
        f"floor {dens}{volts} in {where}: a lock-in of ENBW {enbw_hz:.3g} Hz sees "
        f"{si(noise_det, u, 3)} rms{reserve}")
    if known_noise:
        verdict.append(f"  the simulated bench says its noise is {_density_text(known_noise, 'FS')}: "
                       f"measured/expected {floor / known_noise:.3f}")
    if interferers:
        big = interferers[0]
        left = noise.get("reserve_left_db")
        verdict.append(f"largest interferer: {big.label} at {si(big.level, u, 3)} rms; input peaks at "
                       f"{si(peak, u, 4)}" + (f", leaving {left:.0f} dB of reserve for the signal"
                                           if left is not None and math.isfinite(left) else ""))
    if nominal:
        verdict.append(f"mains {nominal} Hz (measured {mains_measured:.3f} Hz)")
    else:
        verdict.append("mains: no 50 or 60 Hz lines found")
    # stream health
    stream = _stream(cap, verdict)
    doc["stream"] = stream
    doc["verdict"] = verdict
    figs = {"spec": spec, "raw": raw, "lines": lines, "floor": floor, "band": (lo, hi), "tone": tf,
            "ref_hz": ref_hz}
    return doc, figs


# -- pieces ------------------------------------------------------------------
def _stream(cap: Capture, verdict: list) -> dict:
    st = cap.status
    stream = {"frames": int(cap.data.shape[0]), "dropped_frames": int(cap.dropped_frames),
              "overruns": int(cap.overruns), "device_events": int(cap.device_events),
              "gaps": len(cap.gaps), "live": bool(cap.realtime)}
    for key in ("crc_errors", "seq_gaps", "lost_frames", "garbage_bytes", "text_bad_lines",
                "reconnects", "input_overflows", "output_underflows", "input_underflows",
                "output_overflows"):
        if key in st and st[key] is not None:
            stream[key] = int(st[key])
    if not cap.realtime:
        stream["rate_ppm"] = math.nan
        verdict.append(f"stream: a recording ({cap.seconds:.1f} s); rate and timing not checked"
                       + (f"; {cap.dropped_frames} frames marked lost" if cap.dropped_frames else ""))
        return stream
    h = stream_health(cap)
    stream.update(h)
    stream.setdefault("rate_ppm", math.nan)
    ok = lambda b: "ok" if b else "CHECK"  # noqa: E731
    if "rate_ppm" in h and math.isfinite(h["rate_ppm"]):
        u = h["rate_ppm_uncertainty"]
        verdict.append(f"rate: {h['measured_rate_hz']:.3f} Hz, {h['rate_ppm']:+.0f} +- {u:.0f} ppm "
                       f"against the host clock over {h['span_s']:.1f} s "
                       f"[{ok(abs(h['rate_ppm']) <= max(3 * u, 200))}]")
    lost = cap.dropped_frames
    verdict.append(f"drops: {lost} frames lost, {cap.overruns} ring overruns, "
                   f"{cap.device_events} device flags [{ok(lost == 0 and cap.device_events == 0)}]")
    if "crc_errors" in stream:
        verdict.append(f"serial: {stream['crc_errors']} CRC errors, {stream.get('seq_gaps', 0)} sequence "
                       f"gaps [{ok(stream['crc_errors'] == 0 and stream.get('seq_gaps', 0) == 0)}]")
    if "input_overflows" in stream:
        bad = stream["input_overflows"] + stream.get("output_underflows", 0)
        verdict.append(f"sound card: {stream['input_overflows']} input overflows, "
                       f"{stream.get('output_underflows', 0)} output underflows [{ok(bad == 0)}]")
    if "delivery_interval_s" in h:
        what = "callback" if "input_overflows" in stream else "hand-over"
        verdict.append(f"{what} every {1e3 * h['delivery_interval_s']:.2f} ms, jitter "
                       f"{1e3 * h['delivery_jitter_s']:.2f} ms rms, longest gap "
                       f"{1e3 * h['longest_gap_s']:.1f} ms [{ok(h['longest_gap_s'] < 0.5)}]")
    return stream


def _tone_drive(drive: dict, options: dict, hz: float, rate_hz: float) -> dict:
    """The config's drive turned into the test tone: a sine at -1 dBFS on the same
    output, looked for on the drive's loopback input (default: the first input)."""
    if not hz < rate_hz / 2:
        raise SettingError("--tone", hz, f"must be below Nyquist, {rate_hz / 2:g} Hz")
    chans = options.get("channels", [0])
    first = chans[0] if isinstance(chans, list) and chans else (chans if isinstance(chans, int) else 0)
    return {"output_channel": drive.get("output_channel", 0), "waveform": "sine",
            "frequency_hz": float(hz), "amplitude": 10 ** (TONE_DBFS / 20),
            "loopback_channel": drive.get("loopback_channel", first),
            "measure_delay": False}


def _channel(settings: Settings, cap: Capture, played) -> int:
    names = cap.channel_names
    if played is not None:
        return 0  # the loopback input alone was recorded
    return channel_index(settings, names)


def _reference_hz(settings: Settings, src) -> float | None:
    ref = settings.reference if settings is not None else None
    if ref is not None and ref.frequency_hz:
        return float(ref.frequency_hz)
    hint = getattr(src, "reference_hint", None)
    if hint and hint.get("frequency_hz"):
        return float(hint["frequency_hz"])
    return None




def _volts_per_fs(src) -> float | None:
    """Volts of a full-scale sine's peak where the driver knows it: the sound
    card's ``volts_full_scale``, half the serial board's reference (its ADC
    spans 0 to Vref), the simulated bench's ADC limit."""
    v = getattr(src, "volts_full_scale", None)
    if v:
        return float(v)
    desc = getattr(src, "description", None)
    if desc is not None and getattr(desc, "vref_v", 0):
        return float(desc.vref_v) / 2
    scene = getattr(src, "scene", None)
    if scene is not None:
        return float(scene.adc_fs_v)
    return None


def _known_noise(src) -> float | None:
    fn = getattr(src, "expected_noise_fs_per_rthz", None)
    return fn() if callable(fn) else None


def _resolution(seconds: float) -> float:
    # at least about 16 averages, at most 0.5 Hz bins
    return max(0.5, 16 / max(seconds, 1e-3))


def _density_text(d: float, unit: str) -> str:
    return si(d, unit, 3) + "/rtHz"


# -- the report --------------------------------------------------------------
def _write(out, doc: dict, figs: dict, cap: Capture) -> None:
    rep = ReportFolder(out, "Digitizer check")
    toml_doc = {k: v for k, v in doc.items() if k != "verdict"}
    toml_doc["verdict"] = {"lines": doc["verdict"]}
    rep.toml("check.toml", toml_doc)
    spec = figs["spec"]
    rep.csv("density.csv", ["hz", "density_fs_per_rthz"], zip(spec.freqs_hz.tolist(), spec.density.tolist()))
    rep.figure("spectrum.png", _spectrum_figure(figs, doc), "Noise density (Welch, "
               f"{spec.window}, ENBW {spec.enbw_hz:.3g} Hz, {spec.averages} averages)")
    if cap.realtime and cap.arrival_t.size > 8:
        rep.figure("timing.png", _timing_figure(cap, doc["stream"]), "When the driver handed samples over, "
                   "against the nominal rate")
    rep.section("Verdict", rep.paragraphs(*doc["verdict"]))
    rep.section("Noise density", rep.img("spectrum.png"))
    n = doc["noise"]
    u = spec.units
    floor_text = lambda key: _density_text(n[key.replace("fs", "v")] if u == "V" else n[key], u)  # noqa: E731
    rows = [["floor (median, away from lines)", floor_text("density_fs_per_rthz")],
            ["band", f"{n['band_hz'][0]:.0f} to {n['band_hz'][1]:.0f} Hz"],
            ["floor over the whole band", floor_text("wide_density_fs_per_rthz")],
            ["detector ENBW", f"{n['detector_enbw_hz']:.3g} Hz"],
            ["dynamic reserve (full-scale sine over the noise in the detector's ENBW)",
             f"{n['dynamic_reserve_db']:.1f} dB"],
            ["Welch window, ENBW", f"{n['window']}, {n['enbw_bins']:.3f} bins = {n['enbw_hz']:.3g} Hz"]]
    if "density_v_per_rthz" in n and u == "FS":
        rows.insert(1, ["floor in volts", _density_text(n["density_v_per_rthz"], "V")])
    if "expected_density_fs_per_rthz" in n:
        rows.append(["the simulated bench's own noise", _density_text(n["expected_density_fs_per_rthz"], "FS")])
    rep.section("Noise", rep.table(["figure", "value"], rows))
    if "tone" in doc:
        t = doc["tone"]
        rep.section("Test tone", rep.table(
            ["frequency", "amplitude", "SINAD", "THD (2..10)", "SFDR", "ENOB", "ENOB (full scale)"],
            [[f"{t['hz']:.4f} Hz", f"{t['amplitude_fs']:.5f} FS", f"{t['sinad_db']:.2f} dB",
              f"{t['thd_db']:.1f} dB", f"{t['sfdr_db']:.1f} dB", f"{t['enob_bits']:.2f} bits",
              f"{t['enob_fs_bits']:.2f} bits"]]) + rep.paragraphs(
            "IEEE Std 1057 four-parameter sine fit; SINAD, THD over harmonics 2 to 10, SFDR and "
            "ENOB = (SINAD - 1.76)/6.02 per IEEE Std 1241."))
    rep.section("Lines found", rep.table(
        ["frequency", "what", "level (rms)", "above floor"],
        [[f"{ln['hz']:.2f} Hz", ln["label"], si(ln["level"], spec.units, 3), f"{ln['above_floor_db']:.1f} dB"]
         for ln in doc["lines"][:25]]))
    s = doc["stream"]
    rows = [[k.replace("_", " "), f"{v:.6g}" if isinstance(v, float) else str(v)] for k, v in s.items()]
    body = rep.table(["counter", "value"], rows)
    if "timing.png" in [p.name for p in rep.written]:
        body += rep.img("timing.png")
    rep.section("Stream", body)
    rep.html("check.html", subtitle=cap.device)


def _spectrum_figure(figs: dict, doc: dict):
    spec = figs["spec"]
    fig, ax = figure(8.0, 4.6)
    d = spec.density[1:]
    draw_density(ax, spec, figs["lines"], max_marks=14)
    raw = figs["raw"]
    if figs["tone"] is not None:
        ax.loglog(raw.freqs_hz[1:], raw.density[1:], lw=0.5, color="#b9c4d4", zorder=0,
                  label="with the tone")
        t = figs["tone"]
        ax.axvline(t.fit.frequency_hz, color="#1f7a3a", lw=1.0, ls="-", label="tone")
        for h, fh, _ in t.harmonics:
            ax.axvline(fh, color="#1f7a3a", lw=0.6, ls=":")
    lo, hi = figs["band"]
    ax.hlines(figs["floor"], lo, hi, colors="#c25400", lw=2.0, label="floor (median)")
    ax.axvspan(lo, hi, color="#f3d9c2", alpha=0.35, lw=0)
    if figs["ref_hz"]:
        ax.axvline(figs["ref_hz"], color="#c25400", lw=0.8, ls="--", label="reference")
    ax.legend(loc="lower left", fontsize=8)
    top = float(np.nanmax(d)) if d.size else 1.0
    ax.set_ylim(top=top * 30)  # room for the labels
    return fig


def _timing_figure(cap: Capture, stream: dict):
    """Each hand-over's lateness against the nominal rate; a clock that runs fast
    or slow is a slope (the fitted one drawn over the points)."""
    fig, ax = figure(8.0, 3.2)
    t = cap.arrival_t - cap.arrival_t[0]
    late = t - (cap.arrival_n - cap.arrival_n[0]) / cap.rate_hz
    ax.plot(t, 1e3 * late, ".", ms=1.5, color="#33507a", label="hand-overs")
    ppm = stream.get("rate_ppm", math.nan)
    if math.isfinite(ppm):
        # frames come (1 + ppm 1e-6) times as fast: lateness falls by ppm 1e-6 per second
        base = float(np.median(late - (-ppm * 1e-6) * t))
        ax.plot(t, 1e3 * (base - ppm * 1e-6 * t), color="#c25400", lw=1.2,
                label=f"fitted: {ppm:+.0f} ± {stream['rate_ppm_uncertainty']:.0f} ppm")
        ax.legend(loc="upper right", fontsize=8)
    steady = late[t >= max(0.5, 0.1 * t[-1])] if t[-1] > 0 else late
    if steady.size > 8:  # zoom on the steady part; a start-up burst may go off scale
        lo, hi = np.percentile(steady, [0.5, 99.5])
        pad = max(1e-3, 0.15 * (hi - lo))
        ax.set_ylim(1e3 * (lo - pad), 1e3 * (hi + pad))
    ax.set_xlabel("host time since the first hand-over (s)")
    ax.set_ylabel("arrival − nominal (ms)")
    ax.grid(True, lw=0.3, alpha=0.5)
    return fig
