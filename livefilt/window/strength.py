"""Detected strength: amplitude and SNR of each chain over time.

:class:`RowHistory` keeps each chain's recent detector rows, read from the tap
through :meth:`Tap.rows_since` (only the rows new since the last look;
lock-free); the window updates them and both :class:`StrengthPlots` and the
verdict (:mod:`.verdict`) read them.  :class:`StrengthPlots` draws amplitude
(RMS in the source's units, in dB) and SNR on the walk-away's time line, with
the distance marks.
"""

from __future__ import annotations

import logging

import numpy as np
import pyqtgraph as pg

from livefilt.units import level_db, level_unit
from livefilt.window import palette
from livefilt.window.strip import fit_range

__all__ = ["StrengthPlots", "RowHistory"]

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
        self.p_amp.setLabel("left", f"signal ({level_unit(units)})")
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
        self.curves = {}
        for k, name in enumerate(histories):
            # clipped to the view: wide and dashed pens are costly, so only the shown part is stroked
            self.curves[name] = (self.p_amp.plot(pen=palette.chain_pen(k, 2.0), clipToView=True),
                                 self.p_snr.plot(pen=palette.chain_pen(k, 2.0), clipToView=True))
        self._markers: list[tuple[float, list]] = []
        self._window = None
        self._drawn = {name: None for name in histories}  # last row index drawn per chain

    def refresh(self, t0: float | None = None, t1: float | None = None) -> None:
        """Draw rows the histories gained since the last draw; show times ``t0``
        to ``t1`` (s) and fit the y ranges to them."""
        changed = False
        for name, h in self.histories.items():
            if self._drawn[name] == h.last_index:
                continue
            self._drawn[name] = h.last_index
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
