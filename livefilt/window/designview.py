"""The design view: the chains on paper beside the live view.

Gain and phase of front end x digital stages for every chain (pyqtgraph, log
frequency, reference and Nyquist marked), a table of the known interferers and how
much each chain leaves of them, the parts of the front end's RC stages, and each
chain's ENBW and lag.  Every number comes from
:func:`livefilt.analysis.design_report.design`, the same as ``livefilt design``
(without the simulated step, so an edit redraws at once).
"""

from __future__ import annotations

import logging

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from livefilt.analysis.design_report import design, line_hz
from livefilt.dsp import frontend as front
from livefilt.dsp import predict
from livefilt.errors import LivefiltError
from livefilt.units import si
from livefilt.window import palette

__all__ = ["DesignView"]

log = logging.getLogger(__name__)

_FLOOR_DB = -160.0


class DesignView(QtWidgets.QWidget):
    """Responses, interferers and parts of the current settings."""

    def __init__(self, settings, parent=None):
        super().__init__(parent)
        self.design = None
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(6, 6, 6, 6)
        self.summary = QtWidgets.QLabel()
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        self.warnings = QtWidgets.QLabel()
        self.warnings.setWordWrap(True)
        self.warnings.setStyleSheet("color: #a33b00;")
        lay.addWidget(self.warnings)

        plots = pg.GraphicsLayoutWidget()
        plots.setBackground(palette.BACKGROUND)
        self.gain_plot = plots.addPlot(row=0, col=0)
        self.phase_plot = plots.addPlot(row=1, col=0)
        for p, label in ((self.gain_plot, "gain (dB)"), (self.phase_plot, "phase (degrees)")):
            p.setLogMode(x=True, y=False)
            p.showGrid(x=True, y=True, alpha=0.25)
            p.setLabel("left", label)
        self.phase_plot.setLabel("bottom", "frequency (Hz)")
        self.phase_plot.setXLink(self.gain_plot)
        self.legend = self.gain_plot.addLegend(offset=(10, 10))
        lay.addWidget(plots, 3)

        self.chain_table = _table(["Chain", "Gain at the reference", "Group delay",
                                   "Noise bandwidth (ENBW)", "Detector settling (99 %)",
                                   "ENBW × settling"])
        lay.addWidget(_titled("Chains at the reference", self.chain_table), 1)
        row = QtWidgets.QHBoxLayout()
        self.lines_table = _table(["Line", "Frequency"])
        row.addWidget(_titled("Known interferers, relative to the reference", self.lines_table), 3)
        self.parts_table = _table(["Stage", "Resistor", "Capacitor", "-3 dB point", "95 % of boards"])
        row.addWidget(_titled("Parts of the RC stages on the board", self.parts_table), 2)
        lay.addLayout(row, 2)
        self.set_settings(settings)

    # -- public -----------------------------------------------------------------
    def set_settings(self, settings) -> None:
        """Recompute and redraw for ``settings`` (after every accepted edit)."""
        self.settings = settings
        try:
            self.design = design(settings, simulate=False)
        except LivefiltError as e:  # one line for the user, never a traceback
            self._no_design(str(e))
            return
        except Exception as e:  # noqa: BLE001 (a slot must not raise into Qt)
            log.debug("design view failed", exc_info=True)
            self._no_design(f"{type(e).__name__}: {e}")
            return
        d = self.design
        self.summary.setText(f"Sampled at {si(d.fs, 'Hz')} (Nyquist {si(d.nyquist_hz, 'Hz')}), "
                             f"modulation at {si(d.ref_hz, 'Hz')}, mains {d.mains_hz:g} Hz. "
                             + ("The front end on the board is included in every curve."
                                if settings.frontend else "No front end given: digital stages only."))
        self.warnings.setText("\n".join("⚠ " + w for w in d.warnings))
        self._draw_curves(d)
        self._fill_chains(d)
        self._fill_lines(d)
        self._fill_parts(d)

    def _no_design(self, why: str) -> None:
        self.design = None
        self.summary.setText(f"No design view for these settings: {why}")
        self.warnings.setText("")
        for p in (self.gain_plot, self.phase_plot):
            p.clear()
        for t in (self.chain_table, self.lines_table, self.parts_table):
            t.setRowCount(0)

    # -- drawing ----------------------------------------------------------------
    def _draw_curves(self, d) -> None:
        for p in (self.gain_plot, self.phase_plot):
            p.clear()
        self.legend.clear()
        f = _grid(d)
        hf = front.response(d.settings.frontend, f)
        if d.settings.frontend is not None:
            pen = pg.mkPen(palette.RAW, width=1.0)
            self.gain_plot.plot(f, _db(hf), pen=pen, name="front end alone")
        for i, ch in enumerate(d.settings.chains):
            h = hf * predict.digital_response(ch.stages, f, d.fs)
            pen = palette.chain_pen(i, 2.0)
            self.gain_plot.plot(f, _db(h), pen=pen, name=f"chain {ch.name}: front end × stages")
            self.phase_plot.plot(f, np.degrees(np.unwrap(np.angle(h))), pen=pen)
        for p in (self.gain_plot, self.phase_plot):
            p.addItem(pg.InfiniteLine(np.log10(d.ref_hz), angle=90, pen=palette.mark_pen("modulation")))
            p.addItem(pg.InfiniteLine(np.log10(d.nyquist_hz), angle=90,
                                      pen=pg.mkPen(palette.FOREGROUND, width=1, style=QtCore.Qt.DashLine)))
            for _, hz, _ in d.lines[1:]:
                if hz < d.nyquist_hz:
                    p.addItem(pg.InfiniteLine(np.log10(hz), angle=90, pen=palette.mark_pen("mains")))
        self.gain_plot.setYRange(-100, 10)
        self.gain_plot.setXRange(np.log10(f[0]), np.log10(f[-1]), padding=0)
        ticks = _decade_ticks(f[0], f[-1])
        for p in (self.gain_plot, self.phase_plot):
            p.getAxis("bottom").setTicks(ticks)

    def _fill_chains(self, d) -> None:
        t = self.chain_table
        t.setRowCount(len(d.chains))
        for r, c in enumerate(d.chains):
            gain = 0.0 if abs(c.gain_db) < 0.05 else c.gain_db
            _row(t, r, [c.name, f"{gain:+.1f} dB", si(c.group_delay_s, "s", 3),
                        f"{si(c.detector.enbw_hz, 'Hz', 3)} ({'lock-in' if c.detector.kind == 'lockin' else c.detector.kind})",
                        si(c.detector.settling_s, "s", 3), f"{c.detector.enbw_settling:.3f}"])
        t.resizeColumnsToContents()

    def _fill_lines(self, d) -> None:
        t = self.lines_table
        head = ["Line", "Frequency"]
        for c in d.chains:
            head.append(f"Chain {c.name}: filters")
            if c.detector.baseband is not None:
                head.append(f"Chain {c.name}: lock-in")
        t.setColumnCount(len(head))
        t.setHorizontalHeaderLabels(head)
        rows = d.chains[0].interferers if d.chains else []
        t.setRowCount(len(rows))
        for r, first in enumerate(rows):
            cells = [first["label"], line_hz(first)]
            for c in d.chains:
                row = c.interferers[r]
                cells.append(_db_text(row["attenuation_db"]))
                if c.detector.baseband is not None:
                    cells.append(_db_text(row["lockin_rejection_db"]))
            _row(t, r, cells)
        t.resizeColumnsToContents()

    def _fill_parts(self, d) -> None:
        t = self.parts_table
        t.setRowCount(max(1, len(d.parts)))
        if not d.parts:
            _row(t, 0, ["no RC stages on the board", "", "", "", ""])
            return
        for r, p in enumerate(d.parts):
            _row(t, r, [p["stage"],
                        si(p["r_ohm"], "Ω", 3) + (f" ({p['series']})" if p["picked"] else ""),
                        si(p["c_farad"], "F", 3) + (f" ({p['c_series']})" if p["picked"] else ""),
                        si(p["cutoff_hz"], "Hz"),
                        f"{si(p['cutoff_low_hz'], 'Hz')} to {si(p['cutoff_high_hz'], 'Hz')}"])
        t.resizeColumnsToContents()


# --------------------------------------------------------------------------- private

def _grid(d) -> np.ndarray:
    lo = max(1.0, min(d.mains_hz, d.ref_hz) / 20)
    return np.geomspace(lo, d.nyquist_hz * 0.999, 800)


def _decade_ticks(lo: float, hi: float):
    """Labels at the decades only (1 Hz, 10 Hz, ... 10 kHz), unlabelled 2..9 between."""
    major, minor = [], []
    for k in range(int(np.floor(np.log10(lo))), int(np.ceil(np.log10(hi))) + 1):
        major.append((float(k), si(10.0 ** k, "Hz", 3)))
        minor.extend((float(np.log10(m * 10.0 ** k)), "") for m in range(2, 10))
    return [major, minor]


def _db(h) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.maximum(20 * np.log10(np.abs(h)), _FLOOR_DB)


def _db_text(x: float) -> str:
    return "blocked" if x <= predict.FLOOR_DB else f"{x:.1f} dB"


def _table(head) -> QtWidgets.QTableWidget:
    t = QtWidgets.QTableWidget(0, len(head))
    t.setHorizontalHeaderLabels(head)
    t.verticalHeader().setVisible(False)
    t.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
    t.horizontalHeader().setStretchLastSection(True)
    return t


def _row(t: QtWidgets.QTableWidget, r: int, cells) -> None:
    for c, text in enumerate(cells):
        item = QtWidgets.QTableWidgetItem(str(text))
        if c:
            item.setTextAlignment(QtCore.Qt.AlignRight | QtCore.Qt.AlignVCenter)
        t.setItem(r, c, item)


def _titled(title: str, w: QtWidgets.QWidget) -> QtWidgets.QGroupBox:
    box = QtWidgets.QGroupBox(title)
    QtWidgets.QVBoxLayout(box).addWidget(w)
    return box
