"""Scrolling strip chart of the raw input and each chain's output.

The strip shows the last N seconds (1 to 60) on a shared time axis that
stays put: seconds before now, the newest sample at 0 on the right, and the
traces roll leftwards under it.  (An axis in seconds since the start would
move every frame, and redrawing its ticks and labels cost more than drawing
the traces.)  Drawing every sample is far too slow
(10 s at 192 kHz is 1.9 M points), so :class:`MinMaxReducer` keeps a ring of
per-column (min, max) pairs, one column per pixel of the views, and reduces
only the samples that arrived since the last frame; peaks are never hidden.
Each column is a whole number of samples, so the strip holds that many
pixels' worth of time (within half a sample per pixel of the length asked
for) and its axis spans exactly that; the bands are images that scroll by
whole pixels (:mod:`livefilt.window.bands`).

API
---
- :class:`MinMaxReducer`: push(start_index, data); arrays() -> (x, y) for drawing.
- :class:`StripChart`: the two linked plots (input, filtered outputs); refresh().
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from livefilt.window import palette
from livefilt.window.bands import BandImage, zigzag

__all__ = ["MinMaxReducer", "StripChart", "fit_range"]

log = logging.getLogger(__name__)


class MinMaxReducer:
    """Ring of per-column (min, max) pairs of several streams.

    Column ``c`` covers sample indices ``[c * spc, (c + 1) * spc)`` (``spc``
    samples per column, fixed for the reducer's life), so a column's value
    never depends on how the samples were split into frames.  The samples of
    the column still filling are kept aside and drawn as a partial column.

    Parameters
    ----------
    n_streams : int
    rate_hz : float
    seconds : float
        Time span the ring covers.
    columns : int
        Wanted number of columns over ``seconds`` (about the plot's pixel width).
    """

    def __init__(self, n_streams: int, rate_hz: float, seconds: float, columns: int):
        self.rate_hz = float(rate_hz)
        self.seconds = float(seconds)
        self.spc = max(1, int(round(rate_hz * seconds / max(columns, 1))))
        self.n_cols = int(math.ceil(rate_hz * seconds / self.spc)) + 1
        self.n_streams = n_streams
        self.lo = np.full((n_streams, self.n_cols), np.nan, np.float32)
        self.hi = np.full((n_streams, self.n_cols), np.nan, np.float32)
        self.newest = None  # number of the newest complete column
        self.oldest = None  # number of the oldest column ever written
        self._pending = np.zeros((n_streams, 0), np.float32)
        self._pending_start = 0

    @property
    def end_index(self) -> int:
        """Sample index one past the last sample pushed."""
        return self._pending_start + self._pending.shape[1]

    def push(self, start_index: int, data: np.ndarray) -> None:
        """Reduce ``data`` (n_streams, n) that starts at sample ``start_index``."""
        n = data.shape[1]
        if n == 0:
            return
        spc = self.spc
        if self.oldest is None:
            self.oldest = start_index // spc
            self._pending_start = start_index
        elif start_index != self.end_index:
            # a gap (the display fell behind or the source lost frames): close
            # the partial column and leave the skipped columns blank.
            self._close_pending()
            self._blank_until(start_index // spc - 1)
            self._pending = self._pending[:, :0]
            self._pending_start = start_index
        if self._pending.shape[1]:
            buf = np.concatenate([self._pending, data], axis=1)
        else:
            buf = data
        b0 = self._pending_start
        end = b0 + buf.shape[1]
        first_col = b0 // spc
        last_done = end // spc - 1  # newest column now complete
        if last_done >= first_col:
            cut = (last_done + 1) * spc - b0
            seg = buf[:, :cut]
            col = first_col
            offset = b0 - first_col * spc
            if offset:
                head = seg[:, :spc - offset]
                self._write(col, head.min(axis=1)[:, None], head.max(axis=1)[:, None])
                seg = seg[:, spc - offset:]
                col += 1
            k = seg.shape[1] // spc
            if k > self.n_cols:  # only the last n_cols columns can be shown
                seg = seg[:, (k - self.n_cols) * spc:]
                col += k - self.n_cols
                k = self.n_cols
            if k:
                r = seg.reshape(self.n_streams, k, spc)
                self._write(col, r.min(axis=2), r.max(axis=2))
            self._pending = np.array(buf[:, cut:], dtype=np.float32)
            self._pending_start = b0 + cut
        else:
            self._pending = np.array(buf, dtype=np.float32)

    def columns(self, since: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """t (m,) in seconds, lo and hi (n_streams, m): each column's min and max
        in time order, the partial column last; NaN where nothing arrived.
        ``since``: the first column number wanted (None: the oldest held)."""
        n_part = 1 if self._pending.shape[1] else 0
        if self.newest is None and not n_part:
            empty = np.zeros((self.n_streams, 0), np.float32)
            return np.zeros(0), empty, empty
        newest = self.newest if self.newest is not None else self.oldest - 1
        first = max(self.oldest, newest - self.n_cols + 1, since if since is not None else self.oldest)
        n = max(0, newest - first + 1)
        lo = np.empty((self.n_streams, n + n_part), np.float32)
        hi = np.empty_like(lo)
        p0 = first % self.n_cols
        k = min(n, self.n_cols - p0)  # the ring read as (at most) two runs
        lo[:, :k], hi[:, :k] = self.lo[:, p0:p0 + k], self.hi[:, p0:p0 + k]
        lo[:, k:n], hi[:, k:n] = self.lo[:, :n - k], self.hi[:, :n - k]
        cols = np.arange(first, first + n + n_part, dtype=np.float64)
        if n_part:
            cols[-1] = self._pending_start // self.spc
            self._pending.min(axis=1, out=lo[:, -1])
            self._pending.max(axis=1, out=hi[:, -1])
        cols *= self.spc / self.rate_hz
        return cols, lo, hi

    def last_column(self) -> int:
        """Number of the last column :meth:`columns` returns (the partial one if any)."""
        if self._pending.shape[1]:
            return self._pending_start // self.spc
        return self.newest if self.newest is not None else (self.oldest or 0) - 1

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """x (2m,) in seconds and y (n_streams, 2m): :meth:`columns` as a zigzag
        (min, max of each column in turn)."""
        return zigzag(*self.columns())

    # -- private --------------------------------------------------------
    def _write(self, col0: int, lo: np.ndarray, hi: np.ndarray) -> None:
        pos = np.arange(col0, col0 + lo.shape[1]) % self.n_cols
        self.lo[:, pos] = lo
        self.hi[:, pos] = hi
        self.newest = col0 + lo.shape[1] - 1

    def _close_pending(self) -> None:
        p = self._pending
        if p.shape[1]:
            self._write(self._pending_start // self.spc, p.min(axis=1)[:, None], p.max(axis=1)[:, None])

    def _blank_until(self, col: int) -> None:
        start = (self.newest + 1) if self.newest is not None else self.oldest
        if col < start:
            return
        start = max(start, col - self.n_cols + 1)
        blank = np.full((self.n_streams, col - start + 1), np.nan, np.float32)
        self._write(start, blank, blank)


class StripChart(pg.GraphicsLayoutWidget):
    """Input and each chain's output over the last ``seconds``, scrolling.

    One plot for the raw input(s), then one per chain, stacked on a shared
    time axis.  Each chain's plot carries its name and colour; its band is
    solid on purpose: a dashed style on a dense min/max band reads as noise
    (the strength and spectrum plots use the dashed style).
    Y ranges are set here, with hysteresis, rather than by pyqtgraph's
    auto-range, which repaints every view a second time per frame.

    Parameters
    ----------
    tap : livefilt.stream.taps.Tap
    inputs : list of int
        Tap stream indices of the raw channels to show (the chains' inputs).
    chains : list of (stream index, name)
    units : str
    seconds : float
    """

    def __init__(self, tap, inputs: list[int], chains: list[tuple[int, str]], units: str,
                 seconds: float = 10.0, parent=None):
        super().__init__(parent=parent)
        self.tap = tap
        self.streams = list(inputs) + [i for i, _ in chains]
        self.seconds = float(seconds)
        self.ci.setSpacing(0)
        # the traces are drawn without antialiasing: no 2-pixel margin around each
        # changed area, which reached the axes beside the views and repainted them
        self.setOptimizationFlag(QtWidgets.QGraphicsView.OptimizationFlag.DontAdjustForAntialiasing, True)
        # the three views change every frame: one rectangle around them is repainted
        # (the axes beside them stay outside it), cheaper for Qt than three
        self.setViewportUpdateMode(QtWidgets.QGraphicsView.ViewportUpdateMode.BoundingRectViewportUpdate)
        names = tap.names
        self.plots, self.curves = [], []
        # short axis titles (three plots share the height); the window's caption says the rest
        rows = [(", ".join(names[i] for i in inputs), [palette.RAW] * len(inputs), inputs)]
        rows += [(f"chain {name}", [palette.chain_pen(k, 1.0).color()], [i])
                 for k, (i, name) in enumerate(chains)]
        self._rows = []  # (first, end) of each plot's streams in self.streams
        for r, (title, colours, streams) in enumerate(rows):
            p = self.addPlot(row=r, col=0,
                             axisItems={side: _FixedAxis(side) for side in ("left", "bottom", "top", "right")})
            p.setLabel("left", f"{title} ({units})", color=pg.mkColor(colours[0]).name())
            p.setMenuEnabled(False)
            p.hideButtons()
            p.disableAutoRange()
            p.getAxis("left").setWidth(70)
            for side in ("left", "bottom", "top", "right"):
                axis = p.getAxis(side)
                # no units on these axes, so no prefix ever shows; left on, each axis would
                # rewrite its label's HTML on every range change (hidden ones too)
                axis.enableAutoSIPrefix(False)
                # ticks outside the view: an axis whose ticks reach into the view
                # overlaps it, and Qt repaints it (labels and all) every frame the traces move
                axis.setStyle(tickLength=5)
                # kept as a picture of its pixels: repainted beside a changing view, an
                # axis then copies them instead of drawing its ticks and labels again
                axis.setCacheMode(QtWidgets.QGraphicsItem.CacheMode.DeviceCoordinateCache)
            if r:
                p.setXLink(self.plots[0])
            if r < len(rows) - 1:
                p.hideAxis("bottom")  # one time axis, under the last plot
            # the view box draws nothing itself (no border): Qt need not call its paint
            p.vb.setFlag(QtWidgets.QGraphicsItem.GraphicsItemFlag.ItemHasNoContents, True)
            bands = BandImage(colours, palette.BACKGROUND)  # every stream's band (see .bands)
            p.addItem(bands, ignoreBounds=True)
            self.curves.append(bands)
            first = self._rows[-1][1] if self._rows else 0
            self._rows.append((first, first + len(streams)))
            self.plots.append(p)
        self.plots[-1].setLabel("bottom", "time before now (s)")
        self._markers: list[tuple[float, list]] = []
        self.reducer: MinMaxReducer | None = None
        self._cursor = 0
        self.drawn_index = 0  # sample index one past the newest sample drawn
        self.window = (0.0, self.seconds)  # time span shown, seconds since the start
        self._span = None  # the x range set on the plots: (-columns x seconds per column, 0)
        self._columns = 0  # the views' width in pixels when the reducer was made

    # -- public ---------------------------------------------------------
    def set_seconds(self, seconds: float) -> None:
        """Change the strip length (1 to 60 s); rebuilt from the tap's history."""
        self.seconds = float(min(60.0, max(1.0, seconds)))
        self.reducer = None

    def refresh(self) -> None:
        """Reduce what arrived since the last frame and redraw."""
        tap = self.tap
        width = self._width()
        r = self.reducer
        if r is None or width != self._columns:
            # one column per pixel of the views (the bands scroll by whole pixels): the
            # strip holds `width` columns of a whole number of samples each, as near
            # its length as that allows
            self._columns = width
            spc = max(1, round(tap.rate_hz * self.seconds / width))
            r = self.reducer = MinMaxReducer(len(self.streams), tap.rate_hz,
                                             width * spc / tap.rate_hz, width)
            self._cursor = max(0, tap.end_index - width * spc)
        start, data = tap.read_since(self._cursor)
        if not data.shape[1] and r.end_index == self.drawn_index and r.newest is not None:
            return  # nothing new: leave every item as it is (no repaint)
        if data.shape[1]:
            self._cursor = start + data.shape[1]
            r.push(start, data[self.streams])
        t_end = r.end_index / tap.rate_hz
        last = r.last_column()
        # the newest `width` columns, the rightmost pixel the one still filling
        t, lo, hi = r.columns(since=last - width + 1)
        t -= t_end  # seconds before now (<= 0)
        span = (-width * r.spc / tap.rate_hz, 0.0)  # as many seconds as the columns hold
        if self._span != span:  # only when the strip length or the width changes
            self._span = span
            self.plots[0].setXRange(*span, padding=0)
        for p, (a, b) in zip(self.plots, self._rows):
            # fmin/fmax pass over NaN (no data); all NaN gives NaN, which fit_range ignores
            fit_range(p, np.fmin.reduce(lo[a:b], axis=None), np.fmax.reduce(hi[a:b], axis=None))
            # move the views now: left to the paint (pyqtgraph's default), the move
            # dirties every item again and Qt paints the strip a second time each frame
            p.vb.updateMatrix()
        for p, bands, (a, b) in zip(self.plots, self.curves, self._rows):
            bands.set_columns(last - t.shape[0] + 1, t, lo[a:b], hi[a:b], tuple(p.vb.viewRange()[1]))
        self.window = (max(0.0, t_end + span[0]), max(t_end, -span[0]))  # the span the axis shows
        for time_s, lines in self._markers:
            for _, ln in lines:
                ln.setValue(time_s - t_end)
        self.drawn_index = r.end_index
        self._prune_markers(t_end - 60.0)  # kept for the longest strip (set_seconds)

    def add_marker(self, time_s: float, label: str) -> None:
        """Vertical line at ``time_s`` (seconds since the start) on every plot,
        labelled on the top one; it rolls left with the traces."""
        lines = []
        t_end = self.drawn_index / self.tap.rate_hz
        for p in self.plots:
            ln = pg.InfiniteLine(time_s - t_end, angle=90, pen=palette.mark_pen("marker"),
                                 label=label if p is self.plots[0] else None,
                                 labelOpts={"position": 0.9 - 0.15 * (len(self._markers) % 4),
                                            "color": palette.MARKER})
            p.addItem(ln, ignoreBounds=True)
            lines.append((p, ln))
        self._markers.append((time_s, lines))

    def _width(self) -> int:
        """The views' width in pixels (at least 200; the scene is drawn 1:1)."""
        return max(200, int(round(self.plots[0].vb.width())))

    def _prune_markers(self, before_s: float) -> None:
        while self._markers and self._markers[0][0] < before_s:
            _, lines = self._markers.pop(0)
            for p, ln in lines:
                p.removeItem(ln)


class _FixedAxis(pg.AxisItem):
    """An axis whose bounds are worked out again only when its geometry changes: Qt
    asks for them several times a frame while the views beside it repaint, and
    pyqtgraph's computes them anew each time (about 28 us a call)."""

    _key = None
    _rect = None

    def boundingRect(self):  # noqa: N802 (Qt name)
        key = (self.geometry(), self.style["tickLength"], self.grid)
        if key != self._key:
            self._key, self._rect = key, super().boundingRect()
        return QtCore.QRectF(self._rect)


def fit_range(plot, lo: float, hi: float) -> None:
    """Set ``plot``'s y range to hold [lo, hi], with hysteresis: it widens at
    once, and narrows only when the data use less than half of it."""
    lo, hi = float(lo), float(hi)  # numpy float32 overflows in pyqtgraph's range checks
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return
    span = hi - lo
    if span <= 0:
        span = abs(hi) * 0.1 or 1e-9
    (a, b) = plot.vb.viewRange()[1]
    if lo < a or hi > b or span < 0.5 * (b - a):
        plot.setYRange(lo - 0.08 * span, hi + 0.08 * span, padding=0)
