"""Terminal read-out of a running engine (headless ``livefilt run``).

On a terminal it redraws a small table in place a few times a second; when
output goes to a file or pipe (a bench PC logging) it writes one line per
output interval with every field the table shows.  Either way a line or
table shows every chain at the same sample index: rows are taken from the
engine as one group per index (an engine listener), never mixed from
different moments.  Numbers carry fixed significant digits and SI prefixes
(:func:`livefilt.units.si` with ``fixed``), so columns keep their width.
It only reads the engine's rows, counts and the source's status.
"""

from __future__ import annotations

import collections
import math
import sys
import threading

from livefilt.dsp.detect import LOCK_REASONS
from livefilt.units import si

__all__ = ["Readout", "si"]

DIGITS = 4


def _db(x: float) -> str:
    if x is None or math.isnan(x):
        return "—"
    if math.isinf(x):  # a noise-free loopback: no noise to compare with
        return "+∞ dB" if x > 0 else "−∞ dB"
    return f"{x:.1f} dB"


def _phase(x: float) -> str:
    return "—" if not math.isfinite(x) else f"{x:.1f}°"


def _fields(r, units: str) -> tuple[str, ...]:
    """One row's amplitude, phase, noise, SNR, reference and lock, as shown.

    Noise and SNR carry one standard uncertainty; ``*`` marks an amplitude read
    below 10 dB SNR (a magnitude reads high there: the Rice mean)."""
    snr = _db(float(r["snr_db"]))
    if snr.endswith(" dB"):
        snr = snr[:-3] + _pm(float(r["snr_u_db"]), ".1f", "") + " dB"
    noise = si(float(r["noise"]), units, DIGITS, True)
    if noise != "—":
        noise += _pm(100 * float(r["noise_u"]), ".0f", " %")
    return (si(float(r["amplitude"]), units, DIGITS, True) + ("*" if r["biased"] else " "),
            _phase(float(r["phase_deg"])), noise, snr,
            si(float(r["ref_hz"]), "Hz", 6, True), "yes" if r["locked"] else "NO")


def _notes(name: str, r, setting_hz) -> list[str]:
    """The measured reference and, when not locked, why."""
    out = []
    line = _offset(r, setting_hz)
    if line:
        out.append(f"{name}: {line}")
    if not r["locked"]:
        out.append(f"{name}: not locked: {LOCK_REASONS.get(int(r['lock_reason']), '')}")
    return out


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

    #: Counts shown on every line (engine.counts() keys), in this order.
    COUNTS = ("dropped_frames", "nonfinite_samples", "clipped_samples", "crc_errors",
              "sequence_gaps")
    _COUNT_LABEL = {"dropped_frames": "dropped", "nonfinite_samples": "non-finite",
                    "clipped_samples": "clipped", "crc_errors": "CRC errors",
                    "sequence_gaps": "sequence gaps"}

    def __init__(self, engine, stream=None):
        self.engine = engine
        self.stream = stream or sys.stdout
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._drawn = 0
        self._lock = threading.Lock()
        self._groups: collections.deque = collections.deque(maxlen=200_000)
        self._current: tuple[int, dict, dict] | None = None
        self.message = ""  # the last marker echo or hint
        self._said = ""
        engine.listeners.append(self._take)

    # -- rows, grouped by sample index (engine thread) ---------------------
    def _take(self, engine, start, data, outputs, rows_all) -> None:
        names = [c.name for c in engine.chains]
        by_index: dict[int, dict] = {}
        for name, rows in zip(names, rows_all):
            for r in rows:
                by_index.setdefault(int(r["index"]), {})[name] = r.copy()
        if by_index:
            counts = engine.counts()  # as of this block, not of the moment of drawing
            with self._lock:
                self._groups.extend((i, g, counts) for i, g in sorted(by_index.items()))

    def _drain(self) -> list[tuple[int, dict, dict]]:
        with self._lock:
            groups = list(self._groups)
            self._groups.clear()
        if groups:
            self._current = groups[-1]
        return groups

    # -- formatting --------------------------------------------------------
    def _counts(self, counts: dict | None = None) -> str:
        counts = self.engine.counts() if counts is None else counts
        shown = [k for k in self.COUNTS if k in counts and (k in self.COUNTS[:3] or counts[k])]
        return "   ".join(f"{self._COUNT_LABEL[k]} {counts[k]}" for k in shown)

    def _ab(self, group: dict) -> str | None:
        names = [c.name for c in self.engine.chains]
        if len(names) < 2 or not all(n in group for n in names[:2]):
            return None
        a, b = (float(group[n]["amplitude"]) for n in names[:2])
        if not (a > 0 and b > 0):
            return f"{names[0]} − {names[1]} —"
        return f"{names[0]} − {names[1]} {20 * math.log10(a / b):+.2f} dB"

    def _distance(self, index: int) -> float | None:
        src = self.engine.source
        if hasattr(src, "distance_at"):
            return src.distance_at(index)
        return src.status().get("distance_m")

    def _chains(self, group: dict, shown, missing) -> list[str]:
        """Each chain's row formatted by ``shown(name, fields)`` (``missing(name)``
        before its first row), then A − B."""
        units = self.engine.source.units
        out = [missing(c.name) if c.name not in group else shown(c.name, _fields(group[c.name], units))
               for c in self.engine.chains]
        ab = self._ab(group)
        return out + ([ab] if ab else [])

    def log_line(self, index: int, group: dict, counts: dict | None = None) -> str:
        """One line for the rows of every chain at sample ``index``."""
        e = self.engine
        parts = [f"t={index / e.rate_hz:9.3f} s"]
        d = self._distance(index)
        if d is not None:
            parts.append(f"d={d:.3f} m")
        parts += self._chains(group, lambda n, f: f"{n} amp {f[0].rstrip()} phase {f[1]} noise {f[2]} "
                                                  f"SNR {f[3]} ref {f[4]} lock {f[5]}"
                                                  + (f" ({LOCK_REASONS.get(int(group[n]['lock_reason']), '')})"
                                                     if not group[n]["locked"] else ""),
                              lambda n: f"{n} —")
        parts.append(self._counts(counts))
        return "  |  ".join(parts)

    def lines(self) -> list[str]:
        """The table shown on a terminal."""
        self._drain()
        e = self.engine
        st = e.stats
        src = e.source
        index, group, counts = self._current if self._current else (st.index, {}, None)
        d = self._distance(index)
        head = [f"livefilt  {src.driver}: {src.device}",
                f"{e.rate_hz:g} Hz, block {e.block}   elapsed {_clock(index / e.rate_hz)}"
                + (f"   target {d:.3f} m" if d is not None else "")
                + f"   load {100 * st.load(e.rate_hz):.1f} %",
                self._counts(counts)]
        rows = [f"{'chain':<6}{'amplitude (rms)':>18}{'phase':>10}{'noise':>21}{'SNR':>16}"
                f"{'reference':>15}   lock"]
        rows += self._chains(group, lambda n, f: f"{n:<6}{f[0]:>18}{f[1]:>10}{f[2]:>21}{f[3]:>16}"
                                                 f"{f[4]:>15}   {f[5]}",
                             lambda n: f"{n:<6}{'(settling)':>18}")
        ref = e.reference
        for c in e.chains:
            if c.name in group:
                rows += _notes(c.name, group[c.name], ref.frequency_hz if ref is not None else None)
        if e.source.units == "FS":
            rows.append("FS: fraction of the digitizer's full scale (1 FS = its positive limit); "
                        "± one standard uncertainty; * read below 10 dB SNR (biased high)")
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
        if self.tty:
            lines = self.lines()
            out = ""
            if self._drawn:
                out += f"\x1b[{self._drawn}F"
            out += "".join(f"\x1b[2K{ln}\n" for ln in lines)
            self.stream.write(out)
            self._drawn = len(lines)
        else:
            self.stream.write("".join(self.log_line(*g) + "\n" for g in self._drain()))
        self.stream.flush()
