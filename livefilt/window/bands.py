"""The strip chart's min/max bands, kept as an image that scrolls.

Each strip column (one pixel wide) shows the lowest and highest sample of its
stretch of time as a vertical run of pixels; the runs of neighbouring columns
together make a band, and its pixels cover those of the zigzag line (min,
max, next min, ...) that a plot would stroke through the same points (checked
against Qt's own stroker in the tests).  The strip scrolls by whole columns,
so the image is a ring of pixel columns (column c at pixel c mod width),
drawn in two pieces with the oldest column at the left edge: a frame draws
only the columns completed since the last one and the one still filling, a
few pixel runs, instead of filling and stroking every column's polygon again.
A change of the y range or of the view's size draws every column again, from
the reducer's ring.

The image is in the view's device pixels, drawn 1:1 (one column per pixel:
:class:`~livefilt.window.strip.StripChart` sizes its reducer so), opaque, in
the strip's background colour under everything else in the view.

API
---
- :class:`BandImage` (colours, background): ``set_columns(first, t, lo, hi, y_range)``;
  ``getData()`` -> the zigzag (x, y) of the first band, as a plot curve gives it.
- :func:`zigzag` (t, lo, hi) -> the zigzag of columns.
- :func:`band_rows` (lo, hi, y_range, height) -> each column's first and last pixel row.
"""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui

__all__ = ["BandImage", "zigzag", "band_rows"]


def zigzag(t: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Columns as the line through min, max of each in turn: x (2m,), y (..., 2m)."""
    y = np.empty(lo.shape[:-1] + (2 * lo.shape[-1],), np.float32)
    y[..., 0::2], y[..., 1::2] = lo, hi
    return np.repeat(t, 2), y


def band_rows(lo: np.ndarray, hi: np.ndarray, y_range: tuple[float, float],
              height: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel rows (0 at the top) of each column's band: first (top) and last (bottom),
    inclusive, at least one pixel; NaN columns give first > last (nothing drawn).

    A value ``v`` lies at ``(y1 - v) / (y1 - y0) * height`` pixels from the top, and
    the pixel row holding that point is lit, as a 1-pixel pen through it lights it.
    """
    y0, y1 = y_range
    scale = height / (y1 - y0) if y1 > y0 else 0.0
    with np.errstate(invalid="ignore"):
        top = np.floor((y1 - hi.astype(np.float64)) * scale)
        bot = np.floor((y1 - lo.astype(np.float64)) * scale)
        bad = ~(np.isfinite(top) & np.isfinite(bot))
        top = np.clip(np.where(bad, height, top), 0, height).astype(np.int64)
        bot = np.clip(np.where(bad, -1, bot), -1, height - 1).astype(np.int64)
    return top, bot


class BandImage(pg.GraphicsObject):
    """Min/max bands of one plot's streams (drawn in order, the last on top).

    Parameters
    ----------
    colours : list of QColor or colour names, one per band
    background : QColor or colour name
    """

    def __init__(self, colours, background):
        super().__init__()
        self.colours = [_argb(c) for c in colours]
        self.background = _argb(background)
        self.setZValue(-100)  # under the marks and anything else in the view
        self._img = None   # QImage, and its pixels as a (h, w) uint32 view
        self._px = None
        self._key = None   # (w, h, y range) the pixels were drawn for
        self._last = None  # number of the newest column drawn (it may have been partial)
        # the image is a ring: column c at pixel c mod width, drawn in two pieces
        self._t = np.zeros(0)
        self._lo = self._hi = np.zeros((len(self.colours), 0), np.float32)
        self._bounds = QtCore.QRectF()

    # -- public ---------------------------------------------------------
    def set_columns(self, first: int, t: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                    y_range: tuple[float, float]) -> None:
        """Columns ``first .. first + m - 1`` (the last one may be partial) at times
        ``t`` (m,), their minima and maxima ``lo``, ``hi`` (bands, m), on the view's
        y range ``y_range``; only the columns new since the last call are drawn
        when nothing else changed."""
        self._t, self._lo, self._hi = t, lo, hi
        vb = self.getViewBox()
        view = vb.viewRect() if vb is not None else QtCore.QRectF()
        if view != self._bounds:
            self.prepareGeometryChange()
            self._bounds = QtCore.QRectF(view)
        widget = self.getViewWidget()
        dev = self.deviceTransform(widget.viewportTransform()) if widget is not None else None
        if dev is None or not t.shape[0]:
            self._key = None
            self.update()
            return
        rect = dev.mapRect(view)
        w, h = int(round(rect.width())), int(round(rect.height()))
        if w <= 0 or h <= 0:
            return
        m = t.shape[0]
        newest = first + m - 1
        key = (w, h, (float(y_range[0]), float(y_range[1])))
        if (key != self._key or self._last is None or not 0 <= newest - self._last < min(w, m)):
            self._new_image(w, h)
            self._key = key
            self._px.fill(self.background)
            a = max(0, m - w)  # every column that fits
        else:
            # the previously newest column (it may have been partial) and the new ones
            a = m - 1 - (newest - self._last)
        self._draw(first + a, lo[:, a:], hi[:, a:], key[2])
        self._last = newest
        self.update()

    def getData(self) -> tuple[np.ndarray, np.ndarray]:  # noqa: N802 (pyqtgraph name)
        """The zigzag of the first band: x (2m,), y (2m,) = min, max of each column."""
        return zigzag(self._t, self._lo[0], self._hi[0])

    def pixels(self) -> np.ndarray | None:
        """The image as drawn: (h, w) uint32 ARGB, a copy; None before the first draw."""
        return None if self._px is None else self._px.copy()

    def boundingRect(self):  # noqa: N802 (Qt name)
        return QtCore.QRectF(self._bounds)

    def paint(self, p, opt, widget):
        if self._img is None or self._key is None:
            return
        at = p.transform().mapRect(self._bounds).topLeft()
        x, y = round(at.x()), round(at.y())
        w, h = self._img.width(), self._img.height()
        cut = self._last % w + 1  # the ring's oldest column: the left edge
        p.save()
        p.resetTransform()  # device pixels: the image is drawn 1:1
        p.drawImage(QtCore.QRectF(x, y, w - cut, h), self._img, QtCore.QRectF(cut, 0, w - cut, h))
        p.drawImage(QtCore.QRectF(x + w - cut, y, cut, h), self._img, QtCore.QRectF(0, 0, cut, h))
        p.restore()

    # -- private --------------------------------------------------------
    def _new_image(self, w: int, h: int) -> None:
        if self._img is None or self._img.width() != w or self._img.height() != h:
            self._img = QtGui.QImage(w, h, QtGui.QImage.Format_RGB32)
            self._px = np.frombuffer(self._img.bits(), np.uint32).reshape(h, w)  # the image's pixels

    def _draw(self, col: int, lo: np.ndarray, hi: np.ndarray, y_range) -> None:
        """Columns ``col, col + 1, ...`` (lo, hi: (bands, n), n <= width) into their
        places in the ring (column c at pixel c mod width), on background."""
        w = self._px.shape[1]
        n = lo.shape[1]
        x0 = col % w
        k = min(n, w - x0)  # up to the ring's end, then on from its start
        for a, b, x in ((0, k, x0), (k, n, 0)):
            if b > a:
                self._draw_run(x, lo[:, a:b], hi[:, a:b], y_range)

    def _draw_run(self, x0: int, lo: np.ndarray, hi: np.ndarray, y_range) -> None:
        px = self._px
        n = lo.shape[1]
        region = px[:, x0:x0 + n]
        region.fill(self.background)
        top, bot = band_rows(lo, hi, y_range, px.shape[0])  # (bands, n)
        if n <= 16:  # a frame's few new columns: a slice each
            for colour, tops, bots in zip(self.colours, top.tolist(), bot.tolist()):
                for j, (a, b) in enumerate(zip(tops, bots)):
                    region[a:b + 1, j] = colour
            return
        rows = np.arange(px.shape[0])[:, None]
        for colour, tops, bots in zip(self.colours, top, bot):
            region[(rows >= tops) & (rows <= bots)] = colour


def _argb(colour) -> int:
    """A colour as an opaque 32-bit ARGB pixel value (QImage.Format_RGB32)."""
    return pg.mkColor(colour).rgb() | 0xFF000000
