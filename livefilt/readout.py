"""Terminal read-out of a running engine (headless ``livefilt run``).

On a terminal it redraws a small table in place a few times a second; when
output goes to a file or pipe it prints one plain line per chain each second.
It only reads :attr:`Engine.latest`, :attr:`Engine.stats` and the source's
status: it never touches the engine's data.
"""

from __future__ import annotations

import math
import sys

from livefilt.dsp.detect import LOCK_REASONS
from livefilt.units import si

__all__ = ["Readout", "si"]

def _db(x: float) -> str:
    if x is None or math.isnan(x):
        return "—"
    if math.isinf(x):  # a noise-free loopback: no noise to compare with
        return "  +∞ dB" if x > 0 else "  −∞ dB"
    return f"{x:6.1f} dB"


def _pm(x: float, fmt: str, unit: str) -> str:
    """`` ±12 %`` style uncertainty, empty when unknown."""
    return "" if x is None or not math.isfinite(x) else f" ±{x:{fmt}}{unit}"


def _offset(r, setting_hz) -> str:
    """``reference 1371.37 Hz, +1.37 Hz from setting (±0.02 Hz)`` from a row."""
    off, ref = float(r["offset_hz"]), float(r["ref_hz"])
    if not (math.isfinite(off) and math.isfinite(ref)):
        return ""
    base = setting_hz if setting_hz else ref
    return (f"reference {ref + off:.2f} Hz, {ref + off - base:+.2f} Hz from setting"
            f"{_pm(float(r['offset_u_hz']), '.2f', ' Hz')}")


def _clock(t: float) -> str:
    m, s = divmod(max(t, 0.0), 60)
    h, m = divmod(int(m), 60)
    return f"{h:d}:{m:02d}:{s:04.1f}" if h else f"{m:02d}:{s:04.1f}"


class Readout:
    """Formats and prints the engine's state.

    Parameters
    ----------
    engine : Engine
    stream : file, default sys.stdout
    """

    def __init__(self, engine, stream=None):
        self.engine = engine
        self.stream = stream or sys.stdout
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._drawn = 0
        self.message = ""  # the last marker echo or hint
        self._said = ""

    def lines(self) -> list[str]:
        e = self.engine
        st = e.stats
        src = e.source
        status = src.status()
        units = src.units
        t = st.index / e.rate_hz
        head = [f"livefilt  {src.driver}: {src.device}",
                f"{e.rate_hz:g} Hz, block {e.block}   elapsed {_clock(t)}"
                + (f"   target {status['distance_m']:.2f} m" if "distance_m" in status else "")
                + f"   dropped {st.dropped}   load {100 * st.load(e.rate_hz):.1f} %"]
        rows = [f"{'chain':<6}{'amplitude (rms)':>17}{'phase':>10}{'noise':>22}{'SNR':>17}   lock"]
        notes = []
        amps = {}
        for c in e.chains:
            r = e.latest.get(c.name)
            if r is None:
                rows.append(f"{c.name:<6}{'(settling)':>17}")
                continue
            amps[c.name] = float(r["amplitude"])
            ph = float(r["phase_deg"])
            noise = si(float(r["noise"]), units) + _pm(100 * float(r["noise_u"]), ".0f", " %")
            snr = _db(float(r["snr_db"]))
            if snr.endswith(" dB") and math.isfinite(float(r["snr_u_db"])):
                snr = snr[:-3] + _pm(float(r["snr_u_db"]), ".1f", " dB")
            rows.append(f"{c.name:<6}{si(float(r['amplitude']), units):>17}"
                        f"{('—' if not math.isfinite(ph) else f'{ph:7.1f}°'):>10}"
                        f"{noise:>22}{snr:>17}"
                        f"   {'yes' if r['locked'] else 'NO'}"
                        f"{'   biased (SNR < 10 dB)' if r['biased'] else ''}")
            ref = e.reference
            line = _offset(r, ref.frequency_hz if ref is not None else None)
            if line:
                notes.append(f"{c.name}: {line}")
            if not r["locked"]:
                notes.append(f"{c.name}: not locked: {LOCK_REASONS.get(int(r['lock_reason']), '')}")
        rows += notes
        names = [c.name for c in e.chains]
        if len(names) >= 2 and all(n in amps for n in names[:2]) and amps[names[1]] > 0 and amps[names[0]] > 0:
            rows.append(f"{names[0]} − {names[1]}: {20 * math.log10(amps[names[0]] / amps[names[1]]):+.2f} dB")
        if units == "FS":
            rows.append("FS: fraction of the digitizer's full scale (1 FS = its positive limit); "
                        "± is one standard uncertainty")
        rec = e.recorder
        if rec is not None and rec.failed:
            rows.append(f"NOT recording: {rec.failed}")
        elif rec is not None:
            lost = f", {rec.dropped_frames} frames dropped (disk too slow)" if rec.dropped_frames else ""
            rows.append(f"recording to {rec.folder}  ({rec.bytes_written / 1e6:.1f} MB{lost})")
        if self.message:
            rows.append(self.message)
        return head + rows

    def say(self, text: str) -> None:
        """Echo a typed marker (or a hint) with the next drawing."""
        self.message = text
        if not self.tty:
            self.stream.write(text + "\n")
            self.stream.flush()
            self._said = text

    def typed_line(self) -> None:
        """The terminal moved down a line when the user pressed Enter."""
        if self._drawn:
            self._drawn += 1

    def reset(self) -> None:
        """Something else was printed: draw the table afresh below it."""
        self._drawn = 0

    def draw(self) -> None:
        lines = self.lines()
        if self.tty:
            out = ""
            if self._drawn:
                out += f"\x1b[{self._drawn}F"
            out += "".join(f"\x1b[2K{ln}\n" for ln in lines)
            self.stream.write(out)
            self._drawn = len(lines)
        else:
            e = self.engine
            t = e.stats.index / e.rate_hz
            parts = []
            for c in e.chains:
                r = e.latest.get(c.name)
                if r is not None:
                    parts.append(f"{c.name} {si(float(r['amplitude']), e.source.units)} "
                                 f"SNR {_db(float(r['snr_db'])).strip()}")
            st = e.source.status()
            dist = f"  d={st['distance_m']:.2f} m" if "distance_m" in st else ""
            self.stream.write(f"t={t:7.2f} s{dist}  " + "  |  ".join(parts)
                              + f"  dropped {e.stats.dropped}\n")
        self.stream.flush()
