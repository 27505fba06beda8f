"""The strip chart's band image against the min/max zigzag it stands for (Qt
offscreen): the same data, every pixel of the zigzag as Qt's own stroker draws
it, and a frame drawn column by column equal to one drawn whole."""

import numpy as np

from tests.system import need_module

need_module("pyqtgraph", "pip install 'livefilt[window]'")
need_module("PySide6", "pip install 'livefilt[window]'")

import pyqtgraph as pg  # noqa: E402
from PySide6 import QtCore, QtGui  # noqa: E402

from livefilt.window.bands import BandImage, band_rows  # noqa: E402
from livefilt.window.strip import MinMaxReducer  # noqa: E402

W, H = 400, 120
BG = 0xFFF7F6F2  # "#f7f6f2" as an opaque 32-bit pixel
BG_NAME = "#f7f6f2"


def _columns(n=W, seed=5):
    rng = np.random.default_rng(seed)
    x = (np.sin(np.linspace(0, 6, 40 * n)) + 0.3 * rng.standard_normal(40 * n)).astype(np.float32)
    x[40 * 123 + 7] = 4.0  # a one-sample spike
    r = MinMaxReducer(1, 1000.0, 40 * n / 1000.0, n)
    r.push(0, x[None, :])
    t, lo, hi = r.columns()
    return t, lo[0], hi[0], r


def _view_with(item, w=W, h=H, y_range=(-2.0, 4.5)):
    """A bare ViewBox of w x h pixels in a GraphicsView, holding ``item``."""
    view = pg.GraphicsView()
    view.resize(w, h)
    vb = pg.ViewBox(enableMouse=False)
    view.setCentralItem(vb)
    view.setContentsMargins(0, 0, 0, 0)
    view.centralWidget.setGeometry(QtCore.QRectF(0, 0, w, h))
    vb.setGeometry(QtCore.QRectF(0, 0, w, h))
    vb.setRange(xRange=(0, 1), yRange=y_range, padding=0)
    vb.addItem(item, ignoreBounds=True)
    vb.updateMatrix()
    return view, vb


def test_image_stands_for_the_reducers_zigzag(qapp):
    # reference: MinMaxReducer.arrays(), the zigzag the strip drew before
    t, lo, hi, r = _columns()
    item = BandImage(["k"], BG_NAME)
    view, vb = _view_with(item)
    item.set_columns(0, t, lo[None], hi[None], (-2.0, 4.5))
    x, y = item.getData()
    xr, yr = r.arrays()
    assert np.array_equal(x, xr) and np.array_equal(y, yr[0])


def test_band_covers_every_pixel_of_the_zigzag(qapp):
    # reference: the zigzag as Qt's own stroker draws it (QPainter.drawPolyline, a
    # 1-pixel pen, no antialiasing) through the column centres on the same scale
    t, lo, hi, _ = _columns()
    y0, y1 = -2.0, 4.5
    item = BandImage([QtGui.QColor("black")], BG_NAME)
    view, vb = _view_with(item, y_range=(y0, y1))
    item.set_columns(0, t, lo[None], hi[None], (y0, y1))
    band = item.pixels() != BG

    img = QtGui.QImage(W, H, QtGui.QImage.Format_RGB32)
    img.fill(0xFFFFFF)
    p = QtGui.QPainter(img)
    p.setPen(pg.mkPen("k", width=1))
    scale = H / (y1 - y0)
    pts = [QtCore.QPointF(j + 0.5, (y1 - v) * scale) for j in range(W) for v in (lo[j], hi[j])]
    p.drawPolyline(QtGui.QPolygonF(pts))
    p.end()
    zz = np.frombuffer(img.constBits(), np.uint32).reshape(H, W) != 0xFFFFFFFF
    missed = zz & ~band
    # the stroker may end a run a pixel off the floor of its end (0.08 % here)
    assert missed.sum() <= 0.005 * zz.sum()
    # and little more: where the zigzag's diagonal joins two columns it lights its
    # pixels in one of them, the band in both (2 % here, a sparse trace)
    extra = band & ~zz
    assert extra.sum() <= 0.05 * zz.sum()
    # the one-sample spike is there, to the top of its pixel
    assert band[int((y1 - 4.0) * scale), 123]


def test_frames_drawn_column_by_column_equal_one_drawn_whole(qapp):
    # self-consistency: the ring drawn a few columns at a time (as the strip scrolls,
    # the last column still filling) is the image drawn from all the columns at once
    t, lo, hi, _ = _columns(2 * W)
    lo, hi = lo.copy()[None], hi.copy()[None]
    step = BandImage(["#225577"], BG_NAME)
    view, vb = _view_with(step)
    whole = BandImage(["#225577"], BG_NAME)
    vb.addItem(whole, ignoreBounds=True)
    y = (-2.0, 4.5)
    partial_lo, partial_hi = lo.copy(), hi.copy()
    for end in range(1, 2 * W, 7):
        # the newest column half filled first (its min and max so far), then complete
        partial_lo[0, end - 1], partial_hi[0, end - 1] = 0.5 * lo[0, end - 1], 0.5 * hi[0, end - 1]
        a = max(0, end - W)
        step.set_columns(a, t[a:end], partial_lo[:, a:end], partial_hi[:, a:end], y)
        partial_lo[0, end - 1], partial_hi[0, end - 1] = lo[0, end - 1], hi[0, end - 1]
    end = 2 * W
    step.set_columns(end - W, t[end - W:], lo[:, end - W:], hi[:, end - W:], y)
    whole.set_columns(end - W, t[end - W:], lo[:, end - W:], hi[:, end - W:], y)
    assert np.array_equal(np.roll(step.pixels(), -(end % W), axis=1),
                          np.roll(whole.pixels(), -(end % W), axis=1))
    # and painted with the oldest column at the left edge: the screen shows column order
    shot = view.grab().toImage().convertToFormat(QtGui.QImage.Format_RGB32)
    screen = np.frombuffer(shot.constBits(), np.uint32).reshape(shot.height(), -1)[:H, :W]
    top, bot = band_rows(lo[:, end - W:], hi[:, end - W:], y, H)
    lit = screen != BG
    for j in (0, 1, W // 2, W - 1):
        assert lit[top[0, j]:bot[0, j] + 1, j].all()


def test_blank_columns_stay_background_and_rows_are_clipped(qapp):
    lo = np.array([[0.0, np.nan, 10.0, -10.0]], np.float32)
    hi = np.array([[0.0, np.nan, 20.0, 0.5]], np.float32)
    top, bot = band_rows(lo, hi, (-1.0, 1.0), 100)
    # closed form: v at (1 - v) / 2 * 100 pixels from the top, clipped to the view
    assert (top[0, 0], bot[0, 0]) == (50, 50)  # a flat column: one pixel
    assert top[0, 1] > bot[0, 1]  # NaN: nothing
    assert (top[0, 2], bot[0, 2]) == (0, -1)  # wholly above the view: nothing
    assert (top[0, 3], bot[0, 3]) == (25, 99)  # from 0.5 down past the bottom
