"""Labels whose changing text repaints the label alone, not the window's layout.

Qt re-runs the layout of a label's parent whenever its text changes, unless
the label's size is fixed.  A read-out that changes several times a second
therefore gets a fixed size: :func:`fix_size` for a figure (sized to a sample
text), :class:`LineBox` for a sentence that spans whatever width its place in
the layout gives it.
"""

from __future__ import annotations

from PySide6 import QtGui, QtWidgets

__all__ = ["fix_size", "LineBox"]


def fix_size(label: QtWidgets.QLabel, sample: str) -> None:
    """Fix ``label``'s size to fit ``sample``."""
    fm = QtGui.QFontMetrics(label.font())
    label.setFixedSize(fm.horizontalAdvance(sample) + 6, fm.height() + 4)


class LineBox(QtWidgets.QWidget):
    """``lines`` lines of text in the label ``self.label``, as wide as the box's place."""

    def __init__(self, label: QtWidgets.QLabel, lines: int = 1, parent=None):
        super().__init__(parent)
        self.label = label
        label.setParent(self)
        fm = QtGui.QFontMetrics(label.font())
        self.setFixedHeight(lines * fm.lineSpacing() + 6)
        self.setSizePolicy(QtWidgets.QSizePolicy.Expanding, QtWidgets.QSizePolicy.Fixed)

    def resizeEvent(self, event) -> None:  # noqa: N802 (Qt name)
        self.label.setFixedSize(self.size())
        super().resizeEvent(event)
