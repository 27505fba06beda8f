"""Spectrum of the raw input and of each chain's output, with the chains' responses.

Power spectral density by Welch's method (Hann window, 50 % overlap, each
segment's mean removed: what :func:`scipy.signal.welch` computes, done here
in float32 with one batched FFT, several times faster) over the last half
second of the tap, in dB re units²/Hz; drawn as the min/max of the bins under
each pixel column, as the strip chart does.
Each chain's magnitude response (:meth:`Chain.response`) is drawn over it on
its own gain axis at the right.  Vertical marks: the modulation frequency and
the mains harmonics.  Frequency axis log or linear.
"""

from __future__ import annotations

import logging

import numpy as np
import pyqtgraph as pg
from numpy.lib.stride_tricks import sliding_window_view
from PySide6 import QtCore, QtWidgets
from scipy import fft, signal

from livefilt.window import palette
from livefilt.window.strip import fit_range

__all__ = ["SpectrumPanel", "welch_db", "column_minmax", "line_key"]

log = logging.getLogger(__name__)

RESOLUTION_HZ = 6.0   # aimed Welch bin width...
MAX_SEGMENT = 8192    # ...but at most this many points per segment (4097 bins to draw)
SPAN_S = 0.5          # data per estimate


def welch_db(x: np.ndarray, rate_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """(f, 10 log10 PSD) of each row of ``x`` (last axis time)."""
    nper = int(2 ** round(np.log2(rate_hz / RESOLUTION_HZ)))
    nper = max(64, min(nper, MAX_SEGMENT, x.shape[-1]))
    win = _hann(nper)
    seg = sliding_window_view(np.asarray(x, np.float32), nper, axis=-1)[..., ::nper - nper // 2, :]
    # the segments demeaned and windowed in one reused buffer: fresh 2 MB
    # temporaries at every estimate cost more (page faults) than the arithmetic
    buf = _workspace(seg.shape)
    np.subtract(seg, seg.mean(axis=-1, keepdims=True, dtype=np.float32), out=buf)
    buf *= win
    spec = fft.rfft(buf, axis=-1, overwrite_x=True)
    v = spec.view(np.float32)  # re, im interleaved: |X|^2 summed over the segments
    p = np.einsum("...sk,...sk->...k", v, v)
    p = p[..., 0::2] + p[..., 1::2]
    p *= 1.0 / (seg.shape[-2] * rate_hz * float(np.dot(win, win)))
    p[..., 1:nper - nper // 2] *= 2  # one-sided: every bin but DC and (even nper) Nyquist
    with np.errstate(divide="ignore"):
        return np.fft.rfftfreq(nper, 1.0 / rate_hz), 10 * np.log10(p)


_HANN: dict = {}
_WORK: dict = {}


def _hann(n: int) -> np.ndarray:
    if n not in _HANN:
        _HANN[n] = signal.get_window("hann", n).astype(np.float32)
    return _HANN[n]


def _workspace(shape: tuple) -> np.ndarray:
    if _WORK.get("shape") != shape:
        _WORK.update(shape=shape, buf=np.empty(shape, np.float32))
    return _WORK["buf"]


def column_minmax(x: np.ndarray, y: np.ndarray, columns: int) -> tuple[np.ndarray, np.ndarray]:
    """Reduce a curve sampled at increasing ``x`` to (min, max) pairs per
    ``columns`` equal steps of x (a step holding one point keeps it once)."""
    if len(x) <= 2 * columns:
        return x, y
    xs, starts = _column_starts(x, columns)
    ys = np.empty(2 * len(starts), y.dtype)
    ys[0::2] = np.fmin.reduceat(y, starts)
    ys[1::2] = np.fmax.reduceat(y, starts)
    return xs, ys


_STARTS: dict = {}


def _column_starts(x: np.ndarray, columns: int) -> tuple[np.ndarray, np.ndarray]:
    """(x of each pair, first index of each column) for the grid ``x``: the
    same grid comes back at every estimate, so the last answer is kept."""
    key = (len(x), float(x[0]), float(x[-1]), columns)
    if _STARTS.get("key") != key:
        edges = np.linspace(x[0], x[-1], columns + 1)[:-1]
        starts = np.unique(np.searchsorted(x, edges))
        _STARTS.update(key=key, value=(np.repeat(x[starts], 2), starts))
    xs, starts = _STARTS["value"]
    return xs.copy(), starts


class SpectrumPanel(QtWidgets.QWidget):
    """Welch spectra, response overlays and frequency marks.

    Parameters
    ----------
    engine : Engine (read: tap, chains, rate_hz, reference)
    inputs : list of int
        Tap stream indices of the raw channels to show.
    mains_hz : float
    """

    def __init__(self, engine, inputs: list[int], mains_hz: float = 50.0, parent=None):
        super().__init__(parent)
        self.engine = engine
        self.tap = engine.tap
        self.rate_hz = engine.rate_hz
        n_raw = len(self.tap.names) - len(engine.chains)
        self.streams = list(inputs) + [n_raw + k for k in range(len(engine.chains))]
        self.mains_hz = mains_hz
        self.log_x = True
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        bar = QtWidgets.QHBoxLayout()
        self.legend = QtWidgets.QLabel()  # above the plot: a legend inside would hide curves
        self.legend.setStyleSheet(f"color: {palette.FOREGROUND};")
        bar.addWidget(self.legend, 1)
        self.log_box = QtWidgets.QCheckBox("Log frequency axis")
        self.log_box.setChecked(True)
        self.log_box.toggled.connect(self.set_log)
        bar.addWidget(self.log_box, 0, QtCore.Qt.AlignTop)
        lay.addLayout(bar)
        self.plot = pg.PlotWidget()
        lay.addWidget(self.plot, 1)
        p = self.p = self.plot.getPlotItem()
        p.setMenuEnabled(False)
        p.hideButtons()
        p.setLabel("left", f"PSD (dB re {engine.source.units}²/Hz)")
        p.setLabel("bottom", "frequency (Hz)")
        p.getAxis("left").setWidth(70)
        p.getAxis("left").enableAutoSIPrefix(False)
        p.disableAutoRange()
        # as in the strip chart: no antialiasing margin, ticks outside the view, so a
        # new estimate repaints the view and not the axes with their labels
        self.plot.setOptimizationFlag(QtWidgets.QGraphicsView.OptimizationFlag.DontAdjustForAntialiasing,
                                      True)
        for side in ("left", "bottom", "right"):
            p.getAxis(side).setStyle(tickLength=5)
        # a second view box for the chains' gain, sharing x, with its own axis
        self.gain_vb = pg.ViewBox()
        p.showAxis("right")
        p.scene().addItem(self.gain_vb)
        p.getAxis("right").linkToView(self.gain_vb)
        p.getAxis("right").setLabel("chain gain (dB)")
        self.gain_vb.setXLink(p)
        self.gain_vb.setYRange(-90, 10, padding=0)
        self.gain_vb.setMouseEnabled(x=False, y=False)
        p.vb.sigResized.connect(self._sync_views)
        names = self.tap.names
        self.curves = []
        for k, i in enumerate(self.streams):
            if k < len(inputs):
                pen = palette.raw_pen()
                label = names[i]
            else:
                pen = palette.chain_pen(k - len(inputs), 1.0)  # wider pens cost 2x to paint
                label = f"{names[i]} output"
            # a bare curve item: the plot's data item wrapper redoes its bookkeeping
            # (bounds, display copies) at each estimate, three times the curve's own cost
            c = _ViewCurve(pen=pen, name=label, skipFiniteCheck=True)
            p.addItem(c)
            self.curves.append(c)
        raw = " and ".join(names[i] for i in inputs)
        outs = ", ".join(line_key(c.opts["pen"], f"after chain {ch.name}")
                         for c, ch in zip(self.curves[len(inputs):], engine.chains))
        self.legend.setText(
            f"Noise and signal by frequency, last half second: {line_key(palette.raw_pen(), raw)} "
            f"as it arrives, {outs}. The wide pale curves are each chain's gain, read on the "
            f"right axis.")
        self.legend.setWordWrap(True)
        self.gain_curves = []
        for k, _ in enumerate(engine.chains):
            c = pg.PlotCurveItem(pen=palette.chain_pen(k, 2.4))
            c.setOpacity(0.55)
            # a gain curve changes only with its chain's settings: kept as a picture
            # of its pixels, not stroked (wide, translucent) again at every estimate
            c.setCacheMode(QtWidgets.QGraphicsItem.CacheMode.DeviceCoordinateCache)
            self.gain_vb.addItem(c)
            self.gain_curves.append(c)
        self._gain_for = [None] * len(engine.chains)
        self.marks = []
        self.reference = engine.reference
        self._f = None
        self._spec = None
        self._place_marks()
        self.set_log(True)

    # -- public ---------------------------------------------------------
    def set_log(self, on: bool) -> None:
        """Log or linear frequency axis."""
        self.log_x = bool(on)
        self.p.getAxis("bottom").setTicks(_log_ticks(self.rate_hz / 2) if self.log_x else None)
        self._gain_for = [None] * len(self._gain_for)
        self._place_marks()
        nyq = self.rate_hz / 2
        lo, hi = (self._x(np.array([10.0, nyq])))
        self.p.setXRange(lo if self.log_x else 0.0, hi, padding=0)
        if self._f is not None:
            self._draw_spectra()
        self.refresh_responses()

    def refresh(self) -> None:
        """New Welch estimate from the last half second of the tap; responses if changed."""
        start, data = self.tap.last(SPAN_S)
        if data.shape[1] < 256:
            return
        self._f, self._spec = welch_db(data[self.streams], self.rate_hz)
        self._draw_spectra()
        self.refresh_responses()

    def refresh_responses(self) -> None:
        """Redraw a chain's gain curve when its settings changed."""
        f = self._grid()
        for k, ch in enumerate(self.engine.chains):
            if self._gain_for[k] is ch.settings:
                continue
            with np.errstate(divide="ignore"):
                g = 20 * np.log10(np.abs(ch.response(f)))
            self.gain_curves[k].setData(self._x(f), np.clip(g, -200, 60))
            self._gain_for[k] = ch.settings

    def set_reference(self, reference) -> None:
        """Move the modulation mark to a new reference (a ReferenceSpec)."""
        self.reference = reference
        self._place_marks()

    # -- private --------------------------------------------------------
    def _x(self, f: np.ndarray) -> np.ndarray:
        if not self.log_x:
            return f
        with np.errstate(divide="ignore"):
            return np.log10(f)

    def _grid(self) -> np.ndarray:
        nyq = self.rate_hz / 2
        if self.log_x:
            return np.logspace(0, np.log10(nyq * 0.999), 800)
        return np.linspace(1.0, nyq * 0.999, 1200)

    def _draw_spectra(self) -> None:
        f = self._f[1:]
        x = self._x(f)
        cols = max(200, int(self.p.vb.width()) or 800)
        top = -np.inf
        for c, s in zip(self.curves, self._spec):
            xs, ys = column_minmax(x, np.where(np.isfinite(s[1:]), s[1:], -400.0), cols)
            c.setData(xs, ys)
            top = max(top, float(ys.max()))
        if top > -400:
            # 160 dB below the top: the quietest chain output stays in view
            fit_range(self.p, top - 160, top + 5)

    def _place_marks(self) -> None:
        for ln in self.marks:
            self.p.removeItem(ln)
        self.marks = []
        ref = self.reference
        nyq = self.rate_hz / 2
        if ref is not None and ref.frequency_hz:
            f0 = ref.frequency_hz
            self.marks.append(pg.InfiniteLine(
                self._x(np.array([f0]))[0], angle=90, pen=palette.mark_pen("modulation"),
                label=f"modulation {f0:g} Hz",
                labelOpts={"position": 0.95, "color": palette.MODULATION}))
        for h in range(1, 11):
            fh = h * self.mains_hz
            if fh >= nyq:
                break
            self.marks.append(pg.InfiniteLine(
                self._x(np.array([fh]))[0], angle=90, pen=palette.mark_pen("mains"),
                label=f"mains {self.mains_hz:g} Hz" if h == 1 else None,
                labelOpts={"position": 0.06, "color": palette.FOREGROUND}))
        for ln in self.marks:
            self.p.addItem(ln, ignoreBounds=True)

    def _sync_views(self) -> None:
        self.gain_vb.setGeometry(self.p.vb.sceneBoundingRect())
        self.gain_vb.linkedViewChanged(self.p.vb, self.gain_vb.XAxis)


class _ViewCurve(pg.PlotCurveItem):
    """A curve whose bounds stop at its view: the parts it draws outside (the
    floor of empty bins far below, the pen's margin) are clipped away anyway,
    and left in its bounds they make Qt repaint the axes around the view at
    every estimate."""

    def boundingRect(self):  # noqa: N802 (Qt name)
        r = super().boundingRect()
        vb = self.getViewBox()  # the range it was set to (the view's own transform may lag)
        return r.intersected(vb.viewRect()) if vb is not None else r


def line_key(pen, name: str) -> str:
    """Rich-text legend entry: a line sample in the pen's colour and style, then the name."""
    pen = pg.mkPen(pen)
    sample = {QtCore.Qt.SolidLine: "——", QtCore.Qt.DashLine: "- - -"}.get(pen.style(), "· · ·")
    return f'<b style="color:{pen.color().name()}">{sample}</b> {name}'


def _log_ticks(nyq: float) -> list:
    """Tick levels for a log10 frequency axis: labelled 1, 10, 100 Hz, 1 k...; 2 and 5 unlabelled."""
    major, minor = [], []
    for e in range(0, 7):
        for m in (1, 2, 5):
            f = m * 10.0 ** e
            if f > nyq:
                break
            if m == 1:
                major.append((e, f"{f / 1000:g} k" if f >= 1000 else f"{f:g}"))
            else:
                minor.append((np.log10(f), f"{f / 1000:g} k" if f >= 1000 else f"{f:g}"))
    return [major, minor]
