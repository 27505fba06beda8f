"""Detected strength: amplitude and SNR of each chain over time, and the big read-out.

:class:`StrengthPlots` draws each chain's detector rows (amplitude, RMS in the
source's units, log scale; SNR in dB) on the strip chart's time axis.
:class:`BigReadout` shows the latest values in large type, readable from two
metres: amplitude, noise and SNR per chain, and A minus B in dB.

Both read the tap's detector rows through :meth:`Tap.rows_since` (only the
rows new since the last look; lock-free).
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from livefilt.dsp.detect import LOCK_REASONS
from livefilt.units import level_db, level_unit, si
from livefilt.window import palette
from livefilt.window.strip import fit_range

__all__ = ["StrengthPlots", "BigReadout", "RowHistory"]

log = logging.getLogger(__name__)


class RowHistory:
    """Recent detector rows of one chain as arrays (time, amplitude, its dB, noise, SNR).

    Parameters
    ----------
    tap : livefilt.stream.taps.Tap
    chain : str
    keep_s : float
        History kept, seconds.
    """

    def __init__(self, tap, chain: str, keep_s: float = 60.0, units: str = "FS"):
        self.tap = tap
        self.units = units
        self.chain = chain
        self.rate_hz = tap.rate_hz
        self.keep_s = keep_s
        self.t = self.amp = self.amp_db = self.noise = self.snr = np.zeros(0)
        self.last_index = -1
        self.latest = None

    def update(self) -> bool:
        """Take rows newer than the last seen; True if any came."""
        new = self.tap.rows_since(self.chain, self.last_index + 1)
        if not len(new):
            return False
        self.latest = new[-1]
        self.last_index = int(new["index"][-1])
        amp = new["amplitude"].astype(float)
        amp_db = level_db(amp, self.units)  # dBFS per AES17: a full-scale sine is 0 dBFS
        t = new["index"] / self.rate_hz
        keep = np.searchsorted(self.t, t[-1] - self.keep_s) if len(self.t) else 0
        self.t = np.concatenate([self.t[keep:], t])
        self.amp = np.concatenate([self.amp[keep:], amp])
        self.amp_db = np.concatenate([self.amp_db[keep:], amp_db])
        self.noise = np.concatenate([self.noise[keep:], new["noise"].astype(float)])
        self.snr = np.concatenate([self.snr[keep:], new["snr_db"].astype(float)])
        return True


class StrengthPlots(pg.GraphicsLayoutWidget):
    """Amplitude and SNR (both in dB) of every chain versus time.

    The time window is set by :meth:`show_window` (the strip chart's), not by
    a view link: a link would repaint these plots at the strip's frame rate.
    """

    def __init__(self, histories: dict[str, RowHistory], units: str, parent=None):
        super().__init__(parent=parent)
        self.histories = histories
        self.ci.setSpacing(2)
        self.p_amp = self.addPlot(row=0, col=0)
        self.p_snr = self.addPlot(row=1, col=0)
        self.units = units
        self.p_amp.setLabel("left", f"amplitude ({level_unit(units)})")
        self.p_snr.setLabel("left", "SNR (dB)")
        self.p_snr.setLabel("bottom", "time since start (s)")
        self.p_amp.hideAxis("bottom")
        self.p_amp.setXLink(self.p_snr)
        for p in (self.p_amp, self.p_snr):
            p.setMenuEnabled(False)
            p.hideButtons()
            p.disableAutoRange()
            p.getAxis("left").setWidth(70)
            p.getAxis("left").enableAutoSIPrefix(False)
        self.p_amp.addLegend(offset=(6, -4), labelTextSize="9pt")
        self.curves = {}
        for k, name in enumerate(histories):
            # clipped to the view: wide and dashed pens are costly, so only the shown part is stroked
            self.curves[name] = (self.p_amp.plot(pen=palette.chain_pen(k, 2.0), name=name,
                                                 clipToView=True),
                                 self.p_snr.plot(pen=palette.chain_pen(k, 2.0), clipToView=True))
        self._markers: list[tuple[float, list]] = []
        self._window = None

    def refresh(self, t0: float | None = None, t1: float | None = None) -> None:
        """Draw new rows; show times ``t0`` to ``t1`` (s) and fit the y ranges to them."""
        changed = False
        for name, h in self.histories.items():
            if not h.update():
                continue
            changed = True
            c_amp, c_snr = self.curves[name]
            c_amp.setData(h.t, h.amp_db, connect="finite")
            c_snr.setData(h.t, h.snr, connect="finite")
        if t0 is not None and (t0, t1) != self._window:
            self._window = (t0, t1)
            self.p_snr.setXRange(t0, t1, padding=0)
        if changed:
            self._fit()

    def _fit(self) -> None:
        t0, t1 = self.p_snr.vb.viewRange()[0]
        amp, snr = [], []
        for h in self.histories.values():
            sel = h.t >= t0
            amp.append(h.amp[sel])
            snr.append(h.snr[sel])
        amp, snr = np.concatenate(amp), np.concatenate(snr)
        amp = amp[np.isfinite(amp) & (amp > 0)]
        snr = snr[np.isfinite(snr)]
        if len(amp):
            # settling rows start near zero: show at most 80 dB below the top
            top = level_db(amp.max(), self.units)
            fit_range(self.p_amp, max(level_db(amp.min(), self.units), top - 80), top)
        if len(snr):
            # the first rows (noise estimate still empty) can read 150 dB: keep them out of scale
            lo, hi = np.percentile(snr, [1, 99])
            fit_range(self.p_snr, lo, hi)

    def add_marker(self, time_s: float) -> None:
        lines = []
        for p in (self.p_amp, self.p_snr):
            ln = pg.InfiniteLine(time_s, angle=90, pen=palette.mark_pen("marker"))
            p.addItem(ln)
            lines.append((p, ln))
        self._markers.append((time_s, lines))
        while len(self._markers) > 200:
            for p, ln in self._markers.pop(0)[1]:
                p.removeItem(ln)


class BigReadout(QtWidgets.QFrame):
    """Latest amplitude, noise and SNR per chain in large type; A minus B in dB."""

    def __init__(self, histories: dict[str, RowHistory], units: str, parent=None):
        super().__init__(parent)
        self.histories = histories
        self.units = units
        self.setFrameShape(QtWidgets.QFrame.StyledPanel)
        grid = QtWidgets.QGridLayout(self)
        grid.setContentsMargins(8, 6, 8, 6)
        grid.setHorizontalSpacing(14)
        grid.setVerticalSpacing(0)
        heads = ["", f"amplitude ({units} rms)", "noise", "SNR"]
        for j, h in enumerate(heads):
            lab = QtWidgets.QLabel(h)
            lab.setStyleSheet(f"color: {palette.FOREGROUND};")
            grid.addWidget(lab, 0, j, alignment=QtCore.Qt.AlignRight if j else QtCore.Qt.AlignLeft)
        self.labels = {}
        styles = ["──", "- -", "···", "-·-"]
        for k, name in enumerate(histories):
            colour = palette.chain_colour(k)
            tag = QtWidgets.QLabel(f"{name} {styles[k % len(styles)]}")
            tag.setFont(palette.big_font(24))
            tag.setStyleSheet(f"color: {colour};")
            grid.addWidget(tag, 1 + k, 0)
            row = []
            for j, size in ((1, 30), (2, 16), (3, 30)):
                lab = QtWidgets.QLabel("—")
                lab.setFont(palette.big_font(size, bold=size > 20))
                lab.setStyleSheet(f"color: {colour};")
                lab.setAlignment(QtCore.Qt.AlignRight | QtCore.Qt.AlignVCenter)
                sample = ("−888.8 ±88.8 dB" if j == 3 else
                          "888.8 m" + units + (" ±888 %" if j == 2 else "*"))
                _fix_size(lab, sample)
                grid.addWidget(lab, 1 + k, j)
                row.append(lab)
            self.labels[name] = row
        self.diff = QtWidgets.QLabel("")
        self.diff.setFont(palette.big_font(20))
        self.diff.setStyleSheet(f"color: {palette.FOREGROUND};")
        _fix_size(self.diff, "A − B:  +888.88 dB")
        grid.addWidget(self.diff, 1 + len(histories), 0, 1, 4)
        # the reference as measured from the lock-in's phase, and why it is not locked
        self.reference = QtWidgets.QLabel("")
        self.reference.setStyleSheet(f"color: {palette.FOREGROUND};")
        _fix_size(self.reference, "A: reference 88888.88 Hz, +888.88 Hz from setting ±88.88 Hz"
                  "   not locked: phase drifts faster than the output low-pass follows (reference off)")
        grid.addWidget(self.reference, 2 + len(histories), 0, 1, 4)
        names = list(histories)
        self._pair = names[:2] if len(names) >= 2 else None

    def refresh(self) -> None:
        amps = {}
        for name, h in self.histories.items():
            r = h.latest
            if r is None:
                continue
            a, n, s = float(r["amplitude"]), float(r["noise"]), float(r["snr_db"])
            amps[name] = a
            la, ln, ls = self.labels[name]
            la.setText(si(a, self.units) + ("*" if r["biased"] else ""))
            u, su = float(r["noise_u"]), float(r["snr_u_db"])
            ln.setText(si(n, self.units) + (f" ±{100 * u:.0f} %" if math.isfinite(u) else ""))
            ls.setText("—" if not math.isfinite(s) else f"{s:5.1f}"
                       + (f" ±{su:.1f}" if math.isfinite(su) else "") + " dB")
        self.reference.setText(reference_line(self.histories))
        if self._pair and all(amps.get(n, 0) > 0 for n in self._pair):
            a, b = self._pair
            self.diff.setText(f"{a} − {b}:  {20 * math.log10(amps[a] / amps[b]):+.2f} dB")


def reference_line(histories: dict[str, RowHistory]) -> str:
    """The first chain's measured reference and, if so, why it is not locked."""
    for name, h in histories.items():
        r = h.latest
        if r is None:
            continue
        off, ref, u = float(r["offset_hz"]), float(r["ref_hz"]), float(r["offset_u_hz"])
        text = ""
        if math.isfinite(off) and math.isfinite(ref):
            text = f"{name}: reference {ref + off:.2f} Hz ({off:+.2f} Hz"
            text += f" ±{u:.2f} Hz)" if math.isfinite(u) else ")"
        if not r["locked"]:
            text += f"   not locked: {LOCK_REASONS.get(int(r['lock_reason']), '')}"
        return text
    return ""


def _fix_size(label: QtWidgets.QLabel, sample: str) -> None:
    """Fix a changing label's size to fit ``sample``: a fixed-size widget's new
    text repaints the label alone, not the whole window's layout."""
    fm = QtGui.QFontMetrics(label.font())
    label.setFixedSize(fm.horizontalAdvance(sample) + 6, fm.height() + 4)
