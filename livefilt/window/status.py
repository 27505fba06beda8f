"""Status line: driver, device, rate, block, losses and bad input samples (red when
non-zero), load, display fps."""

from __future__ import annotations

from PySide6 import QtWidgets

from livefilt.window.labels import fix_size

__all__ = ["StatusLine"]

_ALARM = "color: #b23a30; font-weight: bold;"


class StatusLine(QtWidgets.QStatusBar):
    """Refreshed a few times a second from the engine's counters."""

    def __init__(self, engine, parent=None):
        super().__init__(parent)
        self.engine = engine
        src = engine.source
        self.source = QtWidgets.QLabel(f"{src.driver}: {src.device}")
        self.rate = QtWidgets.QLabel(f"{engine.rate_hz:g} Hz, blocks of {engine.block} samples")
        self.losses = QtWidgets.QLabel()
        self.input = QtWidgets.QLabel()
        self.load = QtWidgets.QLabel()
        self.fps = QtWidgets.QLabel()
        self.note = QtWidgets.QLabel()
        # fixed sizes: a changing text then repaints its label alone, not the window's layout
        for w, sample in ((self.losses, "overruns 99999, dropped 9999999999 samples"),
                          (self.input, "non-finite 9999999999, clipped 9999999999 samples"),
                          (self.load, "processing 100.0 % of real time"),
                          (self.fps, "display 999 frames/s")):
            fix_size(w, sample)
        for w in (self.source, self.rate, self.losses, self.input, self.load, self.fps):
            self.addWidget(w)
        self.addPermanentWidget(self.note)
        self.input.setToolTip("input samples that were NaN or Inf (replaced by the last finite "
                              "value) or at or beyond full scale (clipping)")

    def refresh(self, fps: float) -> None:
        e = self.engine
        st = e.stats
        bad = st.overruns or st.dropped
        self.losses.setText(f"overruns {st.overruns}, dropped {st.dropped} samples")
        _style(self.losses, _ALARM if bad else "")
        g = e.guard.counts()
        self.input.setText(f"non-finite {g['nonfinite_samples']}, "
                           f"clipped {g['clipped_samples']} samples")
        _style(self.input, _ALARM if any(g.values()) else "")
        self.load.setText(f"processing {100 * st.load(e.rate_hz):.1f} % of real time")
        self.fps.setText(f"display {fps:.0f} frames/s")
        if e.error is not None:
            self.note.setText(f"acquisition stopped: {e.error}")
            _style(self.note, _ALARM)
        elif e.finished.is_set():
            self.note.setText("source ended")


def _style(label: QtWidgets.QLabel, sheet: str) -> None:
    """Set ``sheet`` only when it changes: setting a style sheet, even the same
    one, polishes the label again and repaints the window around it."""
    if label.styleSheet() != sheet:
        label.setStyleSheet(sheet)
