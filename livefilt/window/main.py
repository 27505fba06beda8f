"""The main window: lays out the panels and drives them from one display timer.

The timer fires every ``FRAME_MS``; each tick reads what the tap gained since
the last tick (strip chart and strength plots), and, less often, the big
read-out, the spectrum and the status line.  Nothing here waits on the
engine: if a tick runs late, the next one reads everything new at once, so a
slow display skips frames, never samples.

API
---
- :class:`MainWindow` (engine) with ``save_screenshot(path)``.
- :func:`run_window` (settings, duration_s, screenshot, out) -> exit status.
"""

from __future__ import annotations

import logging
import time

import numpy as np
from PySide6 import QtCore, QtGui, QtWidgets

from livefilt.errors import LivefiltError
from livefilt.window import palette
from livefilt.window.editor import SettingsPanel
from livefilt.window.notes import NotesBar, RecordBar
from livefilt.window.spectrum import SpectrumPanel
from livefilt.window.status import StatusLine
from livefilt.window.strength import BigReadout, RowHistory, StrengthPlots
from livefilt.window.strip import StripChart

__all__ = ["MainWindow", "run_window", "CAUTION_TEXT"]

log = logging.getLogger(__name__)

FRAME_MS = 30            # display tick (about 33 fps): the strip chart
STRENGTH_EVERY = 3       # strength plots and big read-out every 3rd tick (about 10 per second)
SLOW_EVERY = 6           # recording info and status every 6th tick
SPECTRUM_EVERY = 10      # spectrum every 10th tick (about 3 per second)

CAUTION_TEXT = (
    "Safety: the infrared LED or laser that lights the target can harm eyes with no visible "
    "warning: follow its laser-safety class and never look into the beam or its reflection "
    "from shiny surfaces. Lamps, grow lights and power supplies run on mains: mains wiring "
    "can kill; leave it to licensed practice and follow your local electrical codes.")

HELP_TEXT = """<h3>livefilt live window</h3>
<p><b>Strip</b>: raw input and each chain's filtered output over the last N seconds
(min/max per pixel column, so short peaks stay visible).<br>
<b>Strength</b>: each chain's detected amplitude (in dBFS per AES17: a sine reaching full
scale reads 0 dBFS; or dBV re 1 V RMS) and SNR over time; the large read-out shows the latest
values and A − B in dB, noise and SNR with ± one standard uncertainty, * marking an amplitude
read below 10 dB SNR (biased high). FS: fraction of the digitizer's full scale.<br>
<b>Spectrum</b>: Welch estimate of the last half second, with each chain's gain curve
(right axis), the modulation frequency (solid) and mains harmonics (dashed).</p>
<p><b>Settings</b>: every field applies on Enter, at the next block, without stopping
acquisition. A refused value turns red with the reason beside it; the chain keeps its last
good settings.<br>
<b>Distance notes</b>: type the distance and press Enter or <i>Mark</i>; Ctrl+Up and
Ctrl+Down step it by the chosen increment and mark. Markers are drawn on the charts and
stored in the recorded run.</p>
<p>Chain A: teal, solid line. Chain B: ochre, dashed line.</p>
"""


class MainWindow(QtWidgets.QMainWindow):
    """The live window of one running engine (started by the caller)."""

    def __init__(self, engine, strip_seconds: float = 10.0, parent=None):
        super().__init__(parent)
        palette.setup()
        self.engine = engine
        tap = engine.tap
        if tap is None:
            raise ValueError("the window needs an engine made with tap_seconds > 0")
        self.setWindowTitle(f"livefilt: {engine.settings.origin}")
        n_raw = len(tap.names) - len(engine.chains)
        inputs = sorted({c.channel for c in engine.chains}) or [0]
        chains = [(n_raw + k, c.name) for k, c in enumerate(engine.chains)]
        units = engine.source.units
        mains_hz = float(engine.settings.source.options.get("mains_hz", 50.0))

        self.histories = {c.name: RowHistory(tap, c.name, units=engine.source.units)
                          for c in engine.chains}
        self.strip = StripChart(tap, inputs, chains, units, strip_seconds)
        self.strength = StrengthPlots(self.histories, units)
        self.spectrum = SpectrumPanel(engine, inputs, mains_hz)
        self.readout = BigReadout(self.histories, units)
        self.settings_panel = SettingsPanel(engine, mains_hz)
        self.notes = NotesBar(engine)
        self.record = RecordBar(engine)
        self.status = StatusLine(engine)
        self.setStatusBar(self.status)
        self.notes.marked.connect(self._draw_marker)
        for ed in self.settings_panel.editors:
            ed.applied.connect(lambda _i: self.spectrum.refresh_responses())
        self.settings_panel.reference.applied.connect(self.spectrum.set_reference)

        # left: strip (with its length), strength, spectrum
        left = QtWidgets.QSplitter(QtCore.Qt.Vertical)
        strip_box = QtWidgets.QWidget()
        sl = QtWidgets.QVBoxLayout(strip_box)
        sl.setContentsMargins(0, 0, 0, 0)
        sl.setSpacing(0)
        bar = QtWidgets.QHBoxLayout()
        bar.addWidget(QtWidgets.QLabel("strip length (s)"))
        self.seconds = QtWidgets.QSpinBox()
        self.seconds.setRange(1, 60)
        self.seconds.setValue(int(strip_seconds))
        self.seconds.valueChanged.connect(self.strip.set_seconds)
        bar.addWidget(self.seconds)
        bar.addStretch(1)
        sl.addLayout(bar)
        sl.addWidget(self.strip, 1)
        for w in (strip_box, self.strength, self.spectrum):
            left.addWidget(w)
        left.setSizes([380, 300, 300])

        # right: big read-out, then settings / notes and recording / help
        right = QtWidgets.QWidget()
        rl = QtWidgets.QVBoxLayout(right)
        rl.setContentsMargins(4, 0, 0, 0)
        rl.addWidget(self.readout)
        tabs = self.tabs = QtWidgets.QTabWidget()
        tabs.addTab(self.settings_panel, "Settings")
        notes_page = QtWidgets.QWidget()
        nl = QtWidgets.QVBoxLayout(notes_page)
        nl.addWidget(self.notes)
        nl.addWidget(self.record)
        nl.addStretch(1)
        tabs.addTab(notes_page, "Notes && recording")
        help_label = QtWidgets.QLabel(HELP_TEXT + f"<p><b>Caution.</b> {CAUTION_TEXT}</p>")
        help_label.setWordWrap(True)
        help_label.setAlignment(QtCore.Qt.AlignTop)
        help_scroll = QtWidgets.QScrollArea()
        help_scroll.setWidgetResizable(True)
        help_scroll.setWidget(help_label)
        tabs.addTab(help_scroll, "Help")
        rl.addWidget(tabs, 1)

        split = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        split.addWidget(left)
        split.addWidget(right)
        split.setStretchFactor(0, 3)
        split.setStretchFactor(1, 2)
        split.setSizes([900, 620])

        central = QtWidgets.QWidget()
        cl = QtWidgets.QVBoxLayout(central)
        cl.setContentsMargins(6, 4, 6, 2)
        self.banner = self._caution_banner()
        cl.addWidget(self.banner)
        cl.addWidget(split, 1)
        self.setCentralWidget(central)
        self.resize(1520, 960)

        for key, sign in ((QtGui.QKeySequence("Ctrl+Up"), +1), (QtGui.QKeySequence("Ctrl+Down"), -1)):
            sc = QtGui.QShortcut(key, self)
            sc.setContext(QtCore.Qt.WindowShortcut)
            sc.activated.connect(lambda s=sign: self.notes.step_by(s))

        self.frames = 0
        self.fps = 0.0
        self._fps_t0 = time.monotonic()
        self._fps_n = 0
        self.timer = QtCore.QTimer(self)
        self.timer.setTimerType(QtCore.Qt.PreciseTimer)
        self.timer.timeout.connect(self.frame)
        self.timer.start(FRAME_MS)

    # -- public ---------------------------------------------------------
    def frame(self) -> None:
        """One display tick."""
        self.frames += 1
        self.strip.refresh()
        if self.frames % STRENGTH_EVERY == 0:
            self.strength.refresh(*self.strip.window)
            self.readout.refresh()
        if self.frames % SPECTRUM_EVERY == 1:
            self.spectrum.refresh()
        if self.frames % SLOW_EVERY == 0:
            self.record.refresh()
            now = time.monotonic()
            if now - self._fps_t0 >= 1.0:
                self.fps = (self.frames - self._fps_n) / (now - self._fps_t0)
                self._fps_t0, self._fps_n = now, self.frames
            self.status.refresh(self.fps)

    def save_screenshot(self, path) -> bool:
        """Save a PNG of the whole window."""
        return self.grab().save(str(path), "PNG")

    def closeEvent(self, event) -> None:  # noqa: N802 (Qt name)
        self.timer.stop()
        self.engine.stop()  # also closes a recording, with its files complete
        super().closeEvent(event)

    # -- private --------------------------------------------------------
    def _draw_marker(self, m: dict) -> None:
        label = f"{m['distance_m']:g} m" if "distance_m" in m else m.get("note", "")
        self.strip.add_marker(m["time_s"], label)
        self.strength.add_marker(m["time_s"])

    def _caution_banner(self) -> QtWidgets.QFrame:
        box = QtWidgets.QFrame()
        box.setStyleSheet(palette.CAUTION_STYLE)
        lay = QtWidgets.QHBoxLayout(box)
        lay.setContentsMargins(8, 3, 4, 3)
        text = QtWidgets.QLabel("⚠ " + CAUTION_TEXT + " (Also under Help.)")
        text.setWordWrap(True)
        lay.addWidget(text, 1)
        close = QtWidgets.QPushButton("Dismiss")
        close.clicked.connect(box.hide)
        lay.addWidget(close, 0, QtCore.Qt.AlignTop)
        return box


def run_window(settings, duration_s: float | None = None, screenshot=None, out=None) -> int:
    """Open the live window on ``settings``; return the exit status.

    Parameters
    ----------
    settings : livefilt.config.Settings
    duration_s : float, optional
        Close by itself after this many seconds.
    screenshot : path, optional
        Save a PNG of the whole window just before closing.
    out : path, optional
        Start recording at once into a new run folder under this folder.

    Raises
    ------
    LivefiltError
        A setting or source problem (the CLI prints it in one line).
    """
    from livefilt.stream.engine import Engine

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(["livefilt"])
    engine = Engine(settings, tap_seconds=60)
    try:
        win = MainWindow(engine)
    except BaseException:
        engine.stop()
        raise
    engine.start()
    if out:
        rec = win.record.start(out)
        if rec is not None:
            log.info("recording to %s", rec.folder)
    win.show()

    def finish():
        if screenshot:
            if not win.save_screenshot(screenshot):
                log.warning("could not save the screenshot to %s", screenshot)
        win.close()  # stops the engine and closes the recording
        app.quit()  # other windows may be open (a test's); exec() must return

    if duration_s is not None:
        QtCore.QTimer.singleShot(int(max(0.0, duration_s) * 1000), finish)
    app.exec()
    win.close()
    err = engine.error
    if isinstance(err, LivefiltError):
        raise err
    if err is not None:
        log.error("acquisition stopped: %s", err)
        return 1
    return 0
