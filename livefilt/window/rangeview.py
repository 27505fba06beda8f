"""The live range view: where the target is now, the last markers, and the
detection range growing as markers are added.

It collects every chain's in-phase/quadrature rows through an engine
listener (the engine thread appends to preallocated arrays; no drawing, no
I/O there) and, on :meth:`RangeView.refresh`, cuts them at the markers and
runs the range report's own analysis (:mod:`livefilt.analysis.range_report`:
settling margin, vector means, pooled noise, weighted power-law fit, range
with its 95 % interval), so the live figure and the report agree.

Two plots, one colour per chain (the window's palette): amplitude against
distance on log-log axes with error bars, the fit and the noise and
threshold levels; SNR against distance with the threshold and the
predicted range (a vertical line, its interval as a band).
"""

from __future__ import annotations

import math
import threading

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from livefilt.analysis.range_report import add_segments, analyse_group, group_for_chain
from livefilt.units import distance as distance_text
from livefilt.window import palette

__all__ = ["RangeView"]

SNR_DB = 10.0
LAST_MARKERS = 6


class _Rows:
    """Growing (time, I, Q) arrays of one chain, appended by the engine thread."""

    def __init__(self):
        self.n = 0
        self.t = np.empty(1024)
        self.i = np.empty(1024)
        self.q = np.empty(1024)
        self.lock = threading.Lock()

    def add(self, t, i, q) -> None:
        k = len(t)
        with self.lock:
            if self.n + k > len(self.t):
                size = max(2 * len(self.t), self.n + k)
                for name in ("t", "i", "q"):
                    new = np.empty(size)
                    new[:self.n] = getattr(self, name)[:self.n]
                    setattr(self, name, new)
            self.t[self.n:self.n + k] = t
            self.i[self.n:self.n + k] = i
            self.q[self.n:self.n + k] = q
            self.n += k

    def view(self):
        with self.lock:
            n = self.n
            return self.t[:n].copy(), self.i[:n].copy(), self.q[:n].copy()


class RangeView(QtWidgets.QWidget):
    """Current distance, the last markers and the live range plots of ``engine``."""

    def __init__(self, engine, parent=None):
        super().__init__(parent)
        self.engine = engine
        self.snr_db = SNR_DB
        self._rows = {c.name: _Rows() for c in engine.chains}
        self._marks_seen = -1
        self._rows_seen = -1
        engine.listeners.append(self._collect)

        palette.setup()
        self.now = QtWidgets.QLabel("target: no distance marked yet")
        self.now.setFont(palette.big_font(14))
        self.marks = QtWidgets.QLabel("")
        self.marks.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        self.marks.setAlignment(QtCore.Qt.AlignTop | QtCore.Qt.AlignLeft)
        self.fits = QtWidgets.QLabel("")
        self.fits.setWordWrap(True)
        self.fits.setAlignment(QtCore.Qt.AlignTop | QtCore.Qt.AlignLeft)
        side = QtWidgets.QVBoxLayout()
        side.addWidget(self.now)
        head = QtWidgets.QLabel("last markers")
        head.setStyleSheet(f"color: {palette.FOREGROUND}; font-weight: 600;")
        side.addWidget(head)
        side.addWidget(self.marks)
        side.addWidget(self.fits)
        side.addStretch(1)
        left = QtWidgets.QWidget()
        left.setLayout(side)
        left.setFixedWidth(260)

        self.amp_plot = pg.PlotWidget()
        self.amp_plot.setLogMode(x=True, y=True)
        self.amp_plot.setLabel("bottom", "distance", units="m")
        self.amp_plot.setLabel("left", "amplitude (rms)")
        self.amp_plot.showGrid(x=True, y=True, alpha=0.2)
        self.snr_plot = pg.PlotWidget()
        self.snr_plot.setLogMode(x=True, y=False)
        self.snr_plot.setLabel("bottom", "distance", units="m")
        self.snr_plot.setLabel("left", "SNR", units="dB")
        self.snr_plot.showGrid(x=True, y=True, alpha=0.2)
        self.snr_plot.addLegend(offset=(-10, 10))
        self.threshold = pg.InfiniteLine(self.snr_db, angle=0, pen=pg.mkPen(palette.FOREGROUND, style=QtCore.Qt.DashLine))
        self.snr_plot.addItem(self.threshold)
        self._items: list = []
        ticks = [(math.log10(v), f"{v:g}") for v in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100)]
        for plot in (self.amp_plot, self.snr_plot):
            plot.getAxis("bottom").setTicks([ticks, []])
        self.amp_plot.getAxis("left").enableAutoSIPrefix(False)

        plots = QtWidgets.QHBoxLayout()
        plots.addWidget(self.amp_plot, 1)
        plots.addWidget(self.snr_plot, 1)
        box = QtWidgets.QHBoxLayout(self)
        box.addWidget(left)
        box.addLayout(plots, 1)
        self.results: dict = {}

    # -- the engine thread's side: copy rows, nothing else --------------------------
    def _collect(self, engine, start, raw, outputs, rows_all) -> None:
        fs = engine.rate_hz
        for c, rows in zip(engine.chains, rows_all):
            if len(rows):
                store = self._rows.get(c.name)
                if store is None:
                    store = self._rows[c.name] = _Rows()
                store.add(rows["index"] / fs, rows["in_phase"], rows["quadrature"])

    # -- the window's timer -------------------------------------------------------
    def refresh(self) -> None:
        marks = list(self.engine.stats.marks)
        self._show_markers(marks)
        rows_now = sum(r.n for r in self._rows.values())
        if len(marks) == self._marks_seen and rows_now - self._rows_seen < 40:
            return  # nothing new worth a refit (about 1 s of rows per chain)
        self._marks_seen, self._rows_seen = len(marks), rows_now
        self.results = self._analyse(marks)
        self._draw()

    def _show_markers(self, marks) -> None:
        t_now = self.engine.stats.index / self.engine.rate_hz
        last = marks[-1] if marks else None
        if last is None:
            self.now.setText("target: no distance marked yet")
        elif last.get("distance_m") is None:
            self.now.setText("target: moving")
        else:
            self.now.setText(f"target: {distance_text(last['distance_m'])}\n"
                             f"(marked {max(t_now - last['time_s'], 0):.0f} s ago)")
        lines = []
        for m in marks[-LAST_MARKERS:][::-1]:
            d = m.get("distance_m")
            what = distance_text(d) if d is not None else "moving"
            note = m.get("note", "")
            lines.append(f"{m['time_s']:7.1f} s  {what}" + (f"  {note[:24]}" if note and d is not None else ""))
        self.marks.setText("\n".join(lines) if lines else "type a distance in the notes panel")

    def _analyse(self, marks) -> dict:
        e = self.engine
        dt = e.output_every / e.rate_hz
        end = e.stats.index / e.rate_hz
        ref = e.reference.frequency_hz if e.reference is not None else None
        out = {}
        for c in e.chains:
            if c.settings.detector.type != "lockin" or c.name not in self._rows:
                continue
            g = group_for_chain(c.name, c.name, {}, e.rate_hz, c.detector, c.filter.sos, ref)
            t, i, q = self._rows[c.name].view()
            add_segments(g, t, i, q, marks, dt, end, "live")
            if g.segments:
                analyse_group(g, self.snr_db)
            out[c.name] = g
        return out

    def _draw(self) -> None:
        for plot, item in self._items:
            plot.removeItem(item)
        self._items = []
        if self.snr_plot.plotItem.legend is not None:
            self.snr_plot.plotItem.legend.clear()
        texts = []
        dmax = max((s.distance_m for g in self.results.values() for s in g.segments), default=1.0)
        dmin = min((s.distance_m for g in self.results.values() for s in g.segments), default=1.0)
        for k, (name, g) in enumerate(self.results.items()):
            r = g.result
            colour = palette.chain_colour(k)
            pen = palette.chain_pen(k)
            segs = [s for s in g.segments if math.isfinite(s.along)]
            if not segs:
                texts.append(f"<b style='color:{colour}'>{name}</b>: waiting for a full segment "
                             f"({g.settling_s:.1f} s settling after each marker)")
                continue
            pos = [s for s in segs if s.along > 0]
            d = np.array([s.distance_m for s in pos])
            a = np.array([s.along for s in pos])
            e = np.array([s.along_err for s in pos])
            if len(pos):
                lx, ly = np.log10(d), np.log10(a)
                top = np.log10(a + e) - ly
                bottom = ly - np.log10(np.maximum(a - e, a * 0.05))
                self._add(self.amp_plot, pg.ErrorBarItem(x=lx, y=ly, top=top, bottom=bottom, pen=pen, beam=0.02))
                self._add(self.amp_plot, pg.ScatterPlotItem(x=lx, y=ly, pen=None, brush=colour, size=7))
                snr = 20 * np.log10(a / r["noise"])
                self._add(self.snr_plot, pg.ScatterPlotItem(x=lx, y=snr, pen=None, brush=colour, size=7))
                up = 20 * np.log10((a + e) / a)
                down = 20 * np.log10(a / np.maximum(a - e, a * 0.25))
                self._add(self.snr_plot, pg.ErrorBarItem(x=lx, y=snr, top=up, bottom=down, pen=pen, beam=0.02))
            noise = r.get("noise")
            line = f"<b style='color:{colour}'>{name}</b>: {len(segs)} point(s)"
            if noise:
                self._add(self.amp_plot, pg.InfiniteLine(math.log10(noise), angle=0,
                                                         pen=pg.mkPen(colour, width=1, style=QtCore.Qt.DotLine)))
            if "range_m" in r:
                hi = max(dmax, r["range_high_m"]) * 1.4
                xs = np.geomspace(dmin / 1.3, hi, 60)
                amp = r["amplitude_at_1m"] * xs ** -r["exponent"]
                self._add(self.amp_plot, pg.PlotDataItem(xs, amp, pen=pen))
                curve = pg.PlotDataItem(xs, 20 * np.log10(amp / noise), pen=pen, name=f"{name} fit")
                self._add(self.snr_plot, curve)
                band = pg.LinearRegionItem((math.log10(r["range_low_m"]), math.log10(r["range_high_m"])),
                                           movable=False, brush=pg.mkBrush(colour + "30"), pen=pg.mkPen(None))
                self._add(self.snr_plot, band)
                self._add(self.snr_plot, pg.InfiniteLine(math.log10(r["range_m"]), angle=90, pen=pen))
                line += (f"; k = {r['exponent']:.2f} ± {r['exponent_err']:.2f}; "
                         f"range {r['range_m']:.3g} m ({r['range_low_m']:.3g}–{r['range_high_m']:.3g})")
            elif "problem" in r:
                line += f"; {r['problem']}"
            texts.append(line)
        self.fits.setText("<br>".join(texts) + f"<br><span style='color:{palette.FOREGROUND}'>"
                          f"threshold {self.snr_db:g} dB SNR</span>")

    def _add(self, plot, item) -> None:
        plot.addItem(item)
        self._items.append((plot, item))

    def closeEvent(self, event) -> None:
        try:
            self.engine.listeners.remove(self._collect)
        except ValueError:
            pass
        super().closeEvent(event)
