"""Colours, pens and fonts of the live window (one calm palette of our own).

Chain A and chain B differ by colour *and* line style, so they stay apart for
colour-blind users and on a grey-scale print: A is a solid deep teal, B a
dashed ochre.  Further chains cycle through more colour/style pairs.  The raw
input is a neutral slate; marks (modulation, mains, distance notes) are muted.
"""

from __future__ import annotations

import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

__all__ = ["BACKGROUND", "FOREGROUND", "RAW", "chain_colour", "chain_pen", "raw_pen",
           "mark_pen", "big_font", "ERROR_STYLE", "CAUTION_STYLE", "CARD_STYLE", "CARD_HEAD",
           "VERDICT_RULE", "WALK_RULE", "ROOM_STYLE", "card"]

BACKGROUND = "#f7f6f2"      # warm paper
FOREGROUND = "#37414a"      # axis text
RAW = "#7d8a96"             # slate grey for raw input
MODULATION = "#6b4c9a"      # plum, for the modulation-frequency mark
MAINS = "#b0a8a0"           # light taupe, mains harmonics
MARKER = "#c0504d"          # brick, distance notes

_CHAINS = [("#1f6f78", QtCore.Qt.SolidLine),     # A: deep teal, solid
           ("#c98a1b", QtCore.Qt.DashLine),      # B: ochre, dashed
           ("#5a7d2a", QtCore.Qt.DotLine),       # moss, dotted
           ("#8b3a62", QtCore.Qt.DashDotLine)]   # mulberry, dash-dot

ERROR_STYLE = "QLineEdit { background: #f6d5d2; border: 1px solid #b23a30; }"
#: a card: pale sheet with a thick rule down its left edge in the card's colour
CARD_STYLE = ("QFrame#{name} {{ background: #fffdf8; border: 1px solid #e4dfd3; "
              "border-left: 5px solid {rule}; border-radius: 3px; }}"
              "QFrame#{name} QLabel {{ border: none; background: transparent; }}")
CARD_HEAD = "color: #7a756b; font-size: 9pt; letter-spacing: 1px;"
VERDICT_RULE = "#6b4c9a"    # plum, as the modulation mark: the question the chains answer
WALK_RULE = MARKER          # brick, as the distance marks
#: the room switcher: plain words, the chosen room underlined in plum
ROOM_STYLE = ("QToolButton { border: none; padding: 4px 12px 3px 12px; color: #5d6770; "
              "font-size: 10.5pt; background: transparent; }"
              "QToolButton:checked { color: #2c2540; border-bottom: 3px solid #6b4c9a; }"
              "QToolButton:hover { color: #2c2540; }")
CAUTION_STYLE = ("QFrame { background: #fbf0d0; border: 1px solid #d9b860; }"
                 "QLabel { color: #4a3b10; border: none; }")


def chain_colour(i: int) -> str:
    return _CHAINS[i % len(_CHAINS)][0]


def chain_pen(i: int, width: float = 1.6) -> QtGui.QPen:
    colour, style = _CHAINS[i % len(_CHAINS)]
    return pg.mkPen(colour, width=width, style=style)


def raw_pen(width: float = 1.0) -> QtGui.QPen:
    return pg.mkPen(RAW, width=width)


def mark_pen(kind: str) -> QtGui.QPen:
    colour = {"modulation": MODULATION, "mains": MAINS, "marker": MARKER}[kind]
    style = QtCore.Qt.DashLine if kind == "mains" else QtCore.Qt.SolidLine
    return pg.mkPen(colour, width=1.2, style=style)


def big_font(point_size: int, bold: bool = True, mono: bool = True) -> QtGui.QFont:
    f = QtGui.QFont()
    f.setPointSize(point_size)
    f.setBold(bold)
    if mono:
        f.setStyleHint(QtGui.QFont.Monospace)
    return f


def setup() -> None:
    """Global pyqtgraph options (call once, before plots are made)."""
    pg.setConfigOptions(background=BACKGROUND, foreground=FOREGROUND, antialias=False)


def card(frame: QtWidgets.QFrame, name: str, rule: str, title: str) -> QtWidgets.QLabel:
    """Dress ``frame`` as a card with a ``rule``-coloured left edge; return its head label."""
    frame.setObjectName(name)
    frame.setStyleSheet(CARD_STYLE.format(name=name, rule=rule))
    head = QtWidgets.QLabel(title)
    head.setStyleSheet(CARD_HEAD)
    return head
