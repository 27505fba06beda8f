"""A min/max envelope drawn as one filled band per unbroken run of columns.

The strip chart shows each column's lowest and highest sample.  Drawn as a
zigzag line (min, max, next min, ...) every column is stroked pixel by pixel,
about twice over; on a dense signal that is most of a frame's painting.  The
zigzag always lies inside the band between the line through the maxima and
the line through the minima, and at one column per pixel it fills that band,
so :class:`EnvelopeItem` fills the band instead (Qt fills by spans, several
times faster) and strokes its outline with the same pen: the same pixels to
within the outline's rounding, at a fraction of the cost.  Columns with no
data (NaN) break the band, as ``connect="finite"`` broke the line.

API
---
- :class:`EnvelopeItem` (pen): ``set_columns(t, lo, hi)`` -> (lowest, highest); ``getData()`` -> the
  zigzag (x, y) it stands for.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from pyqtgraph import functions as fn
from PySide6 import QtCore, QtGui

__all__ = ["EnvelopeItem", "zigzag"]


def zigzag(t: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Columns as the line through min, max of each in turn: x (2m,), y (..., 2m)."""
    y = np.empty(lo.shape[:-1] + (2 * lo.shape[-1],), np.float32)
    y[..., 0::2], y[..., 1::2] = lo, hi
    return np.repeat(t, 2), y


class EnvelopeItem(pg.GraphicsObject):
    """Band between per-column minima and maxima, in one pen's colour."""

    def __init__(self, pen):
        super().__init__()
        self.pen = pg.mkPen(pen)
        self.brush = QtGui.QBrush(self.pen.color())
        self._t = np.zeros(0)
        self._lo = self._hi = np.zeros(0, np.float32)
        self._polygons: list = []
        self._rect = QtCore.QRectF()
        self._bounds = None  # _rect with the pen's pixel margin, at the present scale

    def set_columns(self, t: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                    ok: np.ndarray | None = None) -> tuple[float, float] | None:
        """Columns at times ``t`` (increasing) with their ``lo`` and ``hi`` (NaN: no data;
        ``ok``: where both are finite, if the caller has it).  Returns the band's
        (lowest, highest) value, None if it is empty."""
        self.prepareGeometryChange()
        self._bounds = None
        self._t, self._lo, self._hi = t, lo, hi
        self._polygons = []
        if ok is None:
            ok = np.isfinite(lo) & np.isfinite(hi)
        whole = bool(ok.all())
        if not len(t) or (not whole and not ok.any()):
            self._rect = QtCore.QRectF()
            self.update()
            return None
        if whole:
            runs = [(0, len(t))]
            y0, y1 = float(lo.min()), float(hi.max())
            x0, x1 = float(t[0]), float(t[-1])
        else:
            edges = np.flatnonzero(np.diff(np.r_[0, ok.astype(np.int8), 0]))
            runs = list(zip(edges[0::2], edges[1::2]))
            y0, y1 = float(np.min(lo[ok])), float(np.max(hi[ok]))
            x0, x1 = float(t[runs[0][0]]), float(t[runs[-1][1] - 1])
        for a, b in runs:
            n = b - a
            poly = fn.create_qpolygonf(2 * n)
            v = fn.ndarray_from_qpolygonf(poly)
            v[:n, 0] = t[a:b]
            v[:n, 1] = hi[a:b]
            v[n:, 0] = t[a:b][::-1]
            v[n:, 1] = lo[a:b][::-1]
            self._polygons.append(poly)
        self._rect = QtCore.QRectF(x0, y0, x1 - x0, y1 - y0)
        self.update()
        return y0, y1

    def getData(self) -> tuple[np.ndarray, np.ndarray]:  # noqa: N802 (pyqtgraph name)
        """The zigzag this band stands for: x (2m,), y (2m,) = min, max of each column."""
        return zigzag(self._t, self._lo, self._hi)

    def boundingRect(self):  # noqa: N802 (Qt name)
        if not self._polygons:
            return QtCore.QRectF()
        if self._bounds is None:
            px, py = self.pixelVectors()  # the pen reaches about a pixel beyond the data
            dx = 2 * abs(px.x()) if px is not None else 0.0
            dy = 2 * abs(py.y()) if py is not None else 0.0
            bounds = self._rect.adjusted(-dx, -dy, dx, dy)
            vb = self.getViewBox()  # nothing outside the view shows: keep the axes beside it
            self._bounds = bounds.intersected(vb.viewRect()) if vb is not None else bounds  # clean
        return QtCore.QRectF(self._bounds)

    def viewTransformChanged(self):  # noqa: N802 (pyqtgraph name)
        self.prepareGeometryChange()  # the pixel margin of the bounds changed with the scale
        self._bounds = None

    def paint(self, p, opt, widget):
        if not self._polygons:
            return
        p.setRenderHint(QtGui.QPainter.RenderHint.Antialiasing, False)
        p.setPen(self.pen)
        p.setBrush(self.brush)
        for poly in self._polygons:
            p.drawPolygon(poly)
