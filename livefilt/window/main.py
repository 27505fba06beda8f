"""The main window: the walk-away and the A/B verdict first, the rest in rooms.

Arranged around the user's task.  Down the left, the walk-away card (where
the target is now, how to mark it, the marks so far) and the recording card;
across the top right, the verdict (which chain sees the target better, by how
many dB, in words).  Under the verdict, one room at a time, picked by name:

- *Range*: the live range view (:mod:`.rangeview`, prime space) over the
  strength time line with the distance marks;
- *Signals*: the strip chart of raw input and chain outputs, and the spectrum;
- *Chains and design*: the settings forms beside the design view
  (:mod:`.designview`);
- *Safety and help*.

One display timer drives it all.  Each tick reads what the tap gained since
the last tick, and only for what is on screen: the strip chart and spectrum
draw only in the Signals room (the strip restarts from the tap's history when
the room opens), the strength plots only in the Range room; the detector
histories, the verdict, the marks and the range view are kept current in any
room.  Nothing here waits on the engine: a late tick reads everything new at
once, so a slow display skips frames, never samples.

API
---
- :class:`MainWindow` (engine) with ``show_room(name)``, ``room()``,
  ``settings_in_force()`` and ``save_screenshot(path)``.
- :func:`run_window` (settings, duration_s, screenshot, out) -> exit status.
"""

from __future__ import annotations

import gc
import logging
import time
from dataclasses import replace

from PySide6 import QtCore, QtGui, QtWidgets

from livefilt import safety
from livefilt.units import distance as distance_text
from livefilt.errors import LivefiltError
from livefilt.window import palette
from livefilt.window.designview import DesignView
from livefilt.window.editor import SettingsPanel
from livefilt.window.notes import NotesBar, RecordBar
from livefilt.window.rangeview import RangeView
from livefilt.window.spectrum import SpectrumPanel, line_key
from livefilt.window.status import StatusLine
from livefilt.window.strength import RowHistory, StrengthPlots
from livefilt.window.strip import StripChart
from livefilt.window.verdict import VerdictPanel

__all__ = ["MainWindow", "run_window", "ROOMS"]

log = logging.getLogger(__name__)

FRAME_MS = 30            # display tick (about 33 fps): the strip chart
STRENGTH_EVERY = 3       # detector histories and strength plots every 3rd tick
# Figures in words change about 4 times a second, as a meter's display does (faster
# is unreadable); they and the status line refresh on ticks of their own (phases
# below), as the spectrum does: two panels' repaints in one tick make Qt repaint the
# whole window between them.
VERDICT_EVERY = 8        # the verdict sentence and figures every 8th tick, phase 0
SLOW_EVERY = 6           # marks, recording info and status every 6th tick, phase 3
SPECTRUM_EVERY = 16      # spectrum every 16th tick (about twice a second: each estimate
                         # spans the half second since the last), phase 2
RANGE_EVERY = 16         # range view every 16th tick (about twice a second), phase 4
TIMELINE_S = 60.0        # the strength time line shows the last minute

#: (key, words) of the rooms, in the order of the switcher
ROOMS = (("range", "Range"), ("signals", "Signals"), ("chains", "Chains and design"),
         ("help", "Safety and help"))

HELP_TEXT = """<h3>The live window</h3>
<p><b>Walk-away</b> (left): type the target's distance and press Enter or <i>Mark</i>;
Ctrl+Up and Ctrl+Down step it by the chosen step and mark. The large figure is the
distance marked last. Every mark is drawn on the time lines and stored in the recorded
run.</p>
<p><b>Verdict</b> (top): which chain sees the target better, judged on their
signal-to-noise ratios, and by how many dB. A chain's gain lifts its
noise with its signal, so the signal alone does not decide. Under it, each chain's latest
signal and noise (RMS, in the input's units) and SNR, noise and SNR with ± one standard
uncertainty; * marks a signal read below 10 dB SNR (a magnitude reads high there). FS is the
fraction of the digitizer's full scale; levels in dBFS follow AES17 (a sine reaching full
scale reads 0 dBFS). Under the figures: the reference as the lock-in measures it, and why a
chain is not locked.</p>
<p><b>Range</b>: signal and SNR against distance as marks are added; under it, each
chain's signal and SNR over the last minute.<br>
<b>Signals</b>: the raw input and what each chain passes to its detector over the last
seconds (the minimum and maximum under each pixel, so short peaks stay visible); the
spectrum of the last half second (Welch) with each chain's gain.<br>
<b>Chains and design</b>: every field applies on Enter, at the next block, without
stopping acquisition. A refused value turns red with the reason beside it; the chain
keeps its last good settings. Hover over a field to see its config key.</p>
<p>Chain A: teal, solid line. Chain B: ochre, dashed line.</p>
"""


class MainWindow(QtWidgets.QMainWindow):
    """The live window of one running engine (started by the caller)."""

    closed = QtCore.Signal()  # the window closed (its engine is stopped)

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
        self.verdict = VerdictPanel(self.histories, units)
        self.settings_panel = SettingsPanel(engine, mains_hz)
        self.range_view = RangeView(engine)
        self.design_view = DesignView(engine.current_settings())
        self.notes = NotesBar(engine)
        self.record = RecordBar(engine)
        self.status = StatusLine(engine)
        self.setStatusBar(self.status)
        self._reference_in_force = None
        self.notes.marked.connect(self._draw_marker)
        for ed in self.settings_panel.editors:
            ed.applied.connect(lambda _i: self.spectrum.refresh_responses())
            ed.applied.connect(lambda _i: self._settings_changed())
        self.settings_panel.reference.applied.connect(self.spectrum.set_reference)
        self.settings_panel.reference.applied.connect(self._reference_changed)

        names = [c.name for c in engine.chains]
        raw = ", ".join(tap.names[i] for i in inputs)
        keys = " ".join(line_key(palette.chain_pen(k), f"chain {n}") for k, n in enumerate(names))
        self.rooms = QtWidgets.QStackedWidget()
        self._room_keys = [k for k, _ in ROOMS]

        # Range: the range view in prime space over the strength time line
        rng = QtWidgets.QSplitter(QtCore.Qt.Vertical)
        rng.addWidget(self.range_view)
        rng.addWidget(_captioned(
            self.strength,
            f"How strongly each chain sees the target over the last minute: its signal on "
            f"top and how far it stands above its noise below; {keys}; the brick lines are "
            f"the distance marks."))
        rng.setSizes([520, 340])
        self.rooms.addWidget(rng)

        # Signals: strip chart (with its length) over the spectrum
        sig = QtWidgets.QSplitter(QtCore.Qt.Vertical)
        strip_box = _captioned(
            self.strip,
            f"The input as it arrives ({raw}, grey) and what each chain passes on to its "
            f"detector ({keys}), the last seconds; each pixel shows the lowest and highest "
            f"sample under it, so short peaks stay visible.")
        bar = QtWidgets.QHBoxLayout()
        bar.addWidget(QtWidgets.QLabel("Strip length"))
        self.seconds = QtWidgets.QSpinBox()
        self.seconds.setRange(1, 60)
        self.seconds.setSuffix(" s")
        self.seconds.setValue(int(strip_seconds))
        self.seconds.valueChanged.connect(self.strip.set_seconds)
        bar.addWidget(self.seconds)
        bar.addStretch(1)
        strip_box.layout().insertLayout(0, bar)
        sig.addWidget(strip_box)
        sig.addWidget(self.spectrum)
        sig.setSizes([520, 350])
        self.rooms.addWidget(sig)

        # Chains and design: the forms beside the design view
        chn = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        chn.addWidget(self.settings_panel)
        chn.addWidget(self.design_view)
        chn.setSizes([800, 340])
        self.rooms.addWidget(chn)

        # Safety and help
        cautions = "".join(f"<p>{c}</p>" for c in safety.CAUTIONS)
        help_label = QtWidgets.QLabel(f"<h3>Safety</h3>{cautions}" + HELP_TEXT)
        help_label.setWordWrap(True)
        help_label.setAlignment(QtCore.Qt.AlignTop)
        help_label.setMargin(10)
        help_scroll = QtWidgets.QScrollArea()
        help_scroll.setWidgetResizable(True)
        help_scroll.setWidget(help_label)
        self.rooms.addWidget(help_scroll)

        switcher = QtWidgets.QHBoxLayout()
        switcher.setSpacing(2)
        self.room_buttons = QtWidgets.QButtonGroup(self)
        for i, (key, text) in enumerate(ROOMS):
            b = QtWidgets.QToolButton()
            b.setText(text)
            b.setCheckable(True)
            b.setStyleSheet(palette.ROOM_STYLE)
            b.setToolTip(f"Show {text.lower()} (Ctrl+{i + 1})")
            self.room_buttons.addButton(b, i)
            switcher.addWidget(b)
            sc = QtGui.QShortcut(QtGui.QKeySequence(f"Ctrl+{i + 1}"), self)
            sc.activated.connect(lambda k=key: self.show_room(k))
        switcher.addStretch(1)
        self.room_buttons.idClicked.connect(lambda i: self.show_room(self._room_keys[i]))

        right = QtWidgets.QWidget()
        rl = QtWidgets.QVBoxLayout(right)
        rl.setContentsMargins(6, 0, 0, 0)
        rl.setSpacing(4)
        rl.addWidget(self.verdict)
        rl.addLayout(switcher)
        rl.addWidget(self.rooms, 1)

        left = QtWidgets.QWidget()
        ll = QtWidgets.QVBoxLayout(left)
        ll.setContentsMargins(0, 0, 0, 0)
        ll.setSpacing(6)
        ll.addWidget(self.notes, 1)
        ll.addWidget(self.record)

        split = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        split.addWidget(left)
        split.addWidget(right)
        split.setStretchFactor(0, 0)
        split.setStretchFactor(1, 1)
        split.setSizes([380, 1140])

        central = QtWidgets.QWidget()
        cl = QtWidgets.QVBoxLayout(central)
        cl.setContentsMargins(6, 4, 6, 2)
        self.banner = self._caution_banner()
        cl.addWidget(self.banner)
        cl.addWidget(split, 1)
        self.setCentralWidget(central)
        self.resize(1520, 960)
        self.show_room("range")

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
        """One display tick: draw what is on screen, keep the rest current."""
        self.frames += 1
        room = self.room()
        if room == "signals":
            self.strip.refresh()
        if self.frames % STRENGTH_EVERY == 0:
            for h in self.histories.values():
                h.update()
            if room == "range":
                self.strength.refresh(*self._timeline())
        if self.frames % VERDICT_EVERY == 0:
            self.verdict.refresh()
        if room == "signals" and self.frames % SPECTRUM_EVERY == 2:
            self.spectrum.refresh()
        if room == "range" and self.frames % RANGE_EVERY == 4:
            self.range_view.refresh()  # off screen it waits (show_room brings it up to date)
        if self.frames % SLOW_EVERY == 3:
            self.notes.sync()
            self.notes.refresh_age()
            self.record.refresh()
            now = time.monotonic()
            if now - self._fps_t0 >= 1.0:
                self.fps = (self.frames - self._fps_n) / (now - self._fps_t0)
                self._fps_t0, self._fps_n = now, self.frames
            self.status.refresh(self.fps)

    def room(self) -> str:
        """Key of the room on screen (see :data:`ROOMS`)."""
        return self._room_keys[self.rooms.currentIndex()]

    def show_room(self, key: str) -> None:
        """Put room ``key`` on screen."""
        i = self._room_keys.index(key)
        if key == "signals" and self.rooms.currentIndex() != i:
            self.strip.set_seconds(self.strip.seconds)  # restart from the tap's history
        self.rooms.setCurrentIndex(i)
        self.room_buttons.button(i).setChecked(True)
        if key == "range":
            self.strength.refresh(*self._timeline())
            self.range_view.refresh()

    def settings_in_force(self):
        """The settings as the last accepted edits leave them (the engine applies
        them at its next block, so its own copy may lag by a block)."""
        s = self.engine.current_settings()
        for i, ed in enumerate(self.settings_panel.editors):
            s = s.with_chain(i, ed.settings)
        if self._reference_in_force is not None:
            s = replace(s, reference=self._reference_in_force)
        return s

    def save_screenshot(self, path) -> bool:
        """Save a PNG of the whole window."""
        return self.grab().save(str(path), "PNG")

    def closeEvent(self, event) -> None:  # noqa: N802 (Qt name)
        self.timer.stop()
        self.engine.stop()  # also closes a recording, with its files complete
        super().closeEvent(event)
        self.closed.emit()

    # -- private --------------------------------------------------------
    def _timeline(self) -> tuple[float, float]:
        tap = self.engine.tap
        t_end = tap.end_index / tap.rate_hz
        return max(0.0, t_end - TIMELINE_S), max(t_end, TIMELINE_S)

    def _settings_changed(self) -> None:
        self.design_view.set_settings(self.settings_in_force())

    def _reference_changed(self, spec) -> None:
        self._reference_in_force = spec
        self._settings_changed()

    def _draw_marker(self, m: dict) -> None:
        label = distance_text(m["distance_m"]) if "distance_m" in m else m.get("note", "")
        self.strip.add_marker(m["time_s"], label)
        self.strength.add_marker(m["time_s"])

    def _caution_banner(self) -> QtWidgets.QFrame:
        box = QtWidgets.QFrame()
        box.setStyleSheet(palette.CAUTION_STYLE)
        lay = QtWidgets.QHBoxLayout(box)
        lay.setContentsMargins(8, 3, 4, 3)
        text = QtWidgets.QLabel("⚠ " + safety.CAUTION + " (More under Safety and help.)")
        text.setWordWrap(True)
        lay.addWidget(text, 1)
        close = QtWidgets.QPushButton("Dismiss")
        close.clicked.connect(box.hide)
        lay.addWidget(close, 0, QtCore.Qt.AlignTop)
        return box


def _captioned(widget: QtWidgets.QWidget, text: str) -> QtWidgets.QWidget:
    """``widget`` under a one-sentence legend (rich text, line samples in the pens)."""
    box = QtWidgets.QWidget()
    lay = QtWidgets.QVBoxLayout(box)
    lay.setContentsMargins(0, 0, 0, 0)
    lay.setSpacing(2)
    cap = QtWidgets.QLabel(text)
    cap.setWordWrap(True)
    cap.setStyleSheet(f"color: {palette.FOREGROUND};")
    lay.addWidget(cap)
    lay.addWidget(widget, 1)
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

    app = QtWidgets.QApplication.instance()
    # an application already running (a test's, an embedding one) gets a loop of our own:
    # quitting the application itself would leave its later event loops returning at once
    loop = QtCore.QEventLoop() if app is not None else None
    app = app or QtWidgets.QApplication(["livefilt"])
    loop = loop or app
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
    # what start-up made (modules, compiled kernels, the window's items) lives as long
    # as the window: out of the collector's reach, its full passes while drawing then
    # walk only what came since (about 200 000 objects fewer); garbage first collected,
    # so that none is kept
    gc.collect()
    gc.freeze()

    def finish():
        if screenshot:
            if not win.save_screenshot(screenshot):
                log.warning("could not save the screenshot to %s", screenshot)
        win.close()  # stops the engine and closes the recording
        loop.quit()  # other windows may be open (a test's); exec() must return

    if duration_s is not None:
        QtCore.QTimer.singleShot(int(max(0.0, duration_s) * 1000), finish)
    win.closed.connect(loop.quit)
    loop.exec()
    win.close()
    err = engine.error
    if isinstance(err, LivefiltError):
        raise err
    if err is not None:
        log.error("acquisition stopped: %s", err)
        return 1
    return 0
