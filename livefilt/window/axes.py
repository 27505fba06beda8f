"""An axis that draws like pyqtgraph's own, with less work per redraw.

A scrolling axis regenerates its ticks and labels every frame.  pyqtgraph's
:meth:`AxisItem.generateDrawSpecs` then measures every label string with the
painter and recomputes the axis's bounding rectangle once per label; both
results are the same from one frame to the next.  :class:`QuickAxis` keeps
them: label sizes by string (per font), the bounding rectangle for the length
of one regeneration.  The ticks, labels and their places are computed by
pyqtgraph exactly as before.

API
---
- :class:`QuickAxis` (orientation, ...): a drop-in ``pg.AxisItem``.
"""

from __future__ import annotations

import pyqtgraph as pg
from PySide6 import QtCore

__all__ = ["QuickAxis"]


class QuickAxis(pg.AxisItem):
    """``pg.AxisItem`` with label sizes and its bounding rectangle kept between uses."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._sizes: dict = {}   # (font key, text) -> QRectF from QPainter.boundingRect
        self._bounds = None      # the bounding rectangle while specs are generated

    def generateDrawSpecs(self, p):  # noqa: N802 (pyqtgraph name)
        font = self.style["tickFont"]
        if font is not None:
            p.setFont(font)
        self._bounds = super().boundingRect()
        try:
            return super().generateDrawSpecs(_Measurer(p, self._sizes))
        finally:
            self._bounds = None

    def boundingRect(self):  # noqa: N802 (Qt name)
        if self._bounds is not None:
            return QtCore.QRectF(self._bounds)
        return super().boundingRect()


class _Measurer:
    """The painter as ``generateDrawSpecs`` uses it, with text sizes remembered."""

    def __init__(self, painter, sizes: dict):
        self._p = painter
        self._sizes = sizes
        self._font = painter.font().key()

    def setFont(self, font) -> None:  # noqa: N802 (Qt name)
        self._p.setFont(font)
        self._font = font.key()

    def boundingRect(self, rect, flags, text):  # noqa: N802 (Qt name)
        key = (self._font, rect.width(), rect.height(), flags, text)
        r = self._sizes.get(key)
        if r is None:
            if len(self._sizes) > 4096:
                self._sizes.clear()
            r = self._sizes[key] = self._p.boundingRect(rect, flags, text)
        return QtCore.QRectF(r)  # the caller scales the height of what it gets
