"""The design view: what chains A and B will do, drawn from their settings.

Placeholder: the window gives this view a side panel beside the settings
forms and calls :meth:`DesignView.set_settings` after every accepted edit;
the response figures, the interferer table and the picked parts replace this
label.
"""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

__all__ = ["DesignView"]


class DesignView(QtWidgets.QWidget):
    """Design figures of the settings in force."""

    def __init__(self, settings, parent=None):
        super().__init__(parent)
        self.settings = settings
        lay = QtWidgets.QVBoxLayout(self)
        self.label = QtWidgets.QLabel(
            "Each chain's response, its rejection of mains and lamp flicker, and the parts "
            "for its RC stages appear here.")
        self.label.setAlignment(QtCore.Qt.AlignCenter)
        self.label.setWordWrap(True)
        self.label.setStyleSheet("color: #7a756b; font-size: 12pt;")
        lay.addWidget(self.label)

    def set_settings(self, settings) -> None:
        """Show ``settings`` (a Settings: the engine's, after an accepted edit)."""
        self.settings = settings
