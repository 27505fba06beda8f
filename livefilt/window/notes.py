"""The walk-away: distance marks and recording controls.

:class:`NotesBar`: the current distance in large type; the user types the
target's distance (metres) and an optional note, or steps the distance by a
chosen increment (buttons, or Ctrl+Up / Ctrl+Down anywhere in the window);
each becomes a marker through :meth:`Engine.add_marker`, stored in the run
when recording.  Every mark the engine holds (also a script's or a simulated
scene's) is listed and announced with ``marked`` so the charts can draw it.

:class:`RecordBar`: start/stop a recording into a run folder under a chosen
parent folder; shows elapsed time, bytes written, free disk and the folder.
"""

from __future__ import annotations

import logging
import math
import time

from PySide6 import QtCore, QtWidgets

from livefilt.units import distance as distance_text
from livefilt.errors import LivefiltError
from livefilt.window import palette
from livefilt.window.labels import LineBox

__all__ = ["NotesBar", "RecordBar"]

log = logging.getLogger(__name__)


def _bytes(n: float) -> str:
    """``123456789`` -> ``"123.5 MB"`` (decimal units, as disks are sold)."""
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000.0
    return ""


def _metres(text: str, what: str) -> float:
    try:
        v = float(text.strip().replace(",", "."))
    except ValueError:
        raise ValueError(f"{what} = {text!r}: must be a number of metres, e.g. 1.25") from None
    if not math.isfinite(v):
        raise ValueError(f"{what} = {text!r}: must be a finite number of metres")
    return v


class NotesBar(QtWidgets.QFrame):
    """The walk-away card: where the target is now, how to mark it, the marks so far.

    Marks come from :attr:`engine.stats.marks`, whoever made them (this card,
    a script, a simulated scene's truth marks): :meth:`sync` shows the new
    ones and announces each with ``marked``.
    """

    marked = QtCore.Signal(dict)

    def __init__(self, engine, parent=None):
        super().__init__(parent)
        self.engine = engine
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(14, 6, 10, 8)
        lay.setSpacing(3)
        lay.addWidget(palette.card(self, "walk", palette.WALK_RULE,
                                   "Walk-away: where is the target?"))
        self.current = QtWidgets.QLabel("— m")
        self.current.setFont(palette.big_font(26, mono=False))
        self.current.setStyleSheet("color: #b9b2a6;")  # pale until the first mark
        lay.addWidget(LineBox(self.current))
        self.age = QtWidgets.QLabel("no mark yet: type the target's distance and press Enter")
        self.age.setStyleSheet(f"color: {palette.FOREGROUND};")
        lay.addWidget(LineBox(self.age))
        form = QtWidgets.QFormLayout()
        form.setContentsMargins(0, 4, 0, 0)
        self.distance = QtWidgets.QLineEdit()
        self.distance.setPlaceholderText("e.g. 1.5")
        self.distance.setToolTip("The target's distance from the sensor, in metres; Enter marks it.")
        self.distance.returnPressed.connect(self.mark)
        self.note = QtWidgets.QLineEdit()
        self.note.setPlaceholderText("optional, e.g. leaf edge")
        self.note.returnPressed.connect(self.mark)
        self.step = QtWidgets.QLineEdit("0.25")
        self.step.setToolTip("How far the step buttons and Ctrl+Up / Ctrl+Down move the target, "
                             "in metres.")
        form.addRow("Distance (m)", self.distance)
        form.addRow("Note", self.note)
        row = QtWidgets.QHBoxLayout()
        mark = QtWidgets.QPushButton("Mark")
        mark.clicked.connect(self.mark)
        down = QtWidgets.QPushButton("− step (Ctrl+↓)")
        down.clicked.connect(lambda: self.step_by(-1))
        up = QtWidgets.QPushButton("+ step (Ctrl+↑)")
        up.clicked.connect(lambda: self.step_by(+1))
        for w in (mark, down, up):
            row.addWidget(w)
        form.addRow(row)
        form.addRow("Step (m)", self.step)
        lay.addLayout(form)
        self.error = QtWidgets.QLabel()
        self.error.setStyleSheet("color: #b23a30;")
        self.error.setWordWrap(True)
        lay.addWidget(self.error)
        lay.addWidget(QtWidgets.QLabel("Marks so far (newest first)"))
        self.recent = QtWidgets.QListWidget()
        self.recent.setMinimumHeight(60)
        lay.addWidget(self.recent, 1)
        self._seen = 0
        self.last_distance = None  # (time_s, distance_m) of the newest mark with a distance

    def mark(self) -> dict | None:
        """Marker from the typed distance and note; None (and a message) if invalid."""
        text = self.distance.text()
        try:
            d = _metres(text, "distance") if text.strip() else None
        except ValueError as e:
            return self._refuse(self.distance, str(e))
        if d is None and not self.note.text().strip():
            return self._refuse(self.distance, "distance: type the target's distance in metres "
                                               "(or a note)")
        self._refuse(None, "")
        m = self.engine.add_marker(d, self.note.text().strip())
        self.note.clear()
        self.sync()
        return m

    def sync(self) -> list[dict]:
        """Show the engine's marks made since the last look; return them."""
        marks = self.engine.stats.marks
        new = list(marks[self._seen:])
        self._seen += len(new)
        for m in new:
            label = (distance_text(m["distance_m"]) if "distance_m" in m else "") + (
                f"  {m['note']}" if m.get("note") else "")
            self.recent.insertItem(0, f"{m['time_s']:8.2f} s   {label.strip()}")
            if "distance_m" in m:
                self.last_distance = (m["time_s"], m["distance_m"])
                self.current.setText(distance_text(m["distance_m"]))
                self.current.setStyleSheet(f"color: {palette.MARKER};")
            self.marked.emit(m)
        if new:
            self.refresh_age()
        return new

    def refresh_age(self) -> None:
        """How long ago (acquisition time) the current distance was marked."""
        if self.last_distance is None:
            return
        now = self.engine.stats.index / self.engine.rate_hz
        self.age.setText(f"marked at {self.last_distance[0]:.1f} s, "
                         f"{max(0.0, now - self.last_distance[0]):.0f} s ago")

    def step_by(self, sign: int) -> dict | None:
        """Move the distance by ± step and mark it."""
        try:
            step = _metres(self.step.text(), "step")
            d = _metres(self.distance.text() or "0", "distance")
        except ValueError as e:
            return self._refuse(self.step if str(e).startswith("step") else self.distance, str(e))
        self.distance.setText(f"{d + sign * step:.4g}")
        return self.mark()

    def _refuse(self, field, message: str):
        for w in (self.distance, self.step):
            w.setStyleSheet(palette.ERROR_STYLE if w is field else "")
        self.error.setText(message)
        return None


class RecordBar(QtWidgets.QFrame):
    """Start/stop recording; elapsed time, bytes written, free disk, folder."""

    def __init__(self, engine, parent_dir: str = "runs", parent=None):
        super().__init__(parent)
        self.engine = engine
        self._t0 = None
        form = QtWidgets.QFormLayout(self)
        form.setContentsMargins(14, 6, 10, 6)
        form.addRow(palette.card(self, "record", palette.WALK_RULE,
                                 "Recording: the run and its marks on disk"))
        self.parent_dir = QtWidgets.QLineEdit(parent_dir)
        self.parent_dir.setToolTip("A new run folder is made inside this folder.")
        form.addRow("Into folder", self.parent_dir)
        self.button = QtWidgets.QPushButton("Start recording")
        self.button.clicked.connect(self.toggle)
        form.addRow(self.button)
        self.info = QtWidgets.QLabel("not recording")
        self.info.setWordWrap(True)
        self.info.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
        form.addRow(self.info)
        self.last_folder = None

    @property
    def recording(self) -> bool:
        return self.engine.recorder is not None

    def toggle(self) -> None:
        if self.recording:
            self.stop()
        else:
            self.start()

    def start(self, parent_dir: str | None = None):
        """Start a run folder under ``parent_dir`` (default: the field); returns the writer."""
        if parent_dir is not None:
            self.parent_dir.setText(str(parent_dir))
        try:
            rec = self.engine.start_recording(self.parent_dir.text().strip() or "runs")
        except (LivefiltError, OSError) as e:
            self.info.setText(f"cannot record: {e}")
            self.info.setStyleSheet("color: #b23a30;")
            return None
        self._t0 = time.monotonic()
        self.last_folder = rec.folder
        self.button.setText("Stop recording")
        self.info.setStyleSheet("")
        self.refresh()
        return rec

    def stop(self):
        """Stop and close the run folder (its files complete); returns the writer."""
        rec = self.engine.stop_recording()
        self.button.setText("Start recording")
        if rec is not None:
            self.info.setText(f"saved {_bytes(rec.bytes_written)} to\n{rec.folder}")
        return rec

    def refresh(self) -> None:
        rec = self.engine.recorder
        if rec is None or self._t0 is None:
            return
        t = time.monotonic() - self._t0
        m, s = divmod(int(t), 60)
        try:
            free = _bytes(rec.free_bytes())
        except OSError:
            free = "?"
        self.info.setText(f"● recording {m:02d}:{s:02d}   {_bytes(rec.bytes_written)} written"
                          f"   {free} free\n{rec.folder}")
