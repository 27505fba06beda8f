"""The live range view: signal and SNR against distance as the walk-away grows.

Placeholder: the window gives this view its prime space and calls
:meth:`RangeView.refresh` about twice a second; the plot itself (points with
error bars per chain, the fit and the predicted range) replaces this label.
"""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

__all__ = ["RangeView"]


class RangeView(QtWidgets.QWidget):
    """Range plot of one running engine (its markers and detector rows)."""

    def __init__(self, engine, parent=None):
        super().__init__(parent)
        self.engine = engine
        lay = QtWidgets.QVBoxLayout(self)
        self.label = QtWidgets.QLabel(
            "Distance markers and the range plot appear here once you add markers.")
        self.label.setAlignment(QtCore.Qt.AlignCenter)
        self.label.setWordWrap(True)
        self.label.setStyleSheet("color: #7a756b; font-size: 12pt;")
        lay.addWidget(self.label)

    def refresh(self) -> None:
        """Take what is new in the engine (called by the window's timer)."""
