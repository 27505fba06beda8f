"""Settings editor: a form per stage and one for the detector, per chain.

Every edit is sent at once to :meth:`Engine.change_chain`, which validates
the whole chain table with the config loader's own checks and applies it at
the next block boundary, without stopping acquisition.  A refused value
turns its field red, with the loader's one-line message beside it; the chain
keeps running on its last good settings.  Stages can be added and removed;
"Copy A to B" and "Save settings…" act on the settings in force.  The lock-in
reference (shared by every chain) is edited the same way, through
:meth:`Engine.change_reference`.

API
---
- :class:`ReferenceEditor`: the reference's fields; ``table()``, ``apply()``.
- :class:`ChainEditor`: one chain's forms; ``table()``, ``apply()``, ``load(settings)``.
- :class:`SettingsPanel`: the reference, all chains, copy, save (``save(path)``).
"""

from __future__ import annotations

import logging
import re
from pathlib import Path

from PySide6 import QtCore, QtWidgets

from livefilt.dsp.design import DESIGNS, STAGE_TYPES, describe
from livefilt.errors import SettingError
from livefilt.window import palette, words

__all__ = ["ReferenceEditor", "ChainEditor", "SettingsPanel", "parse_text"]

log = logging.getLogger(__name__)

_IIR = ("lowpass", "highpass", "bandpass", "bandstop")
_RIPPLE = ("chebyshev1", "elliptic")
_STOP = ("chebyshev2", "elliptic")
#: Form rows per stage type, in order: (key, kind) with kind line | design | response | check.
_ROWS = {
    "lowpass": [("design", "design"), ("order", "line"), ("cutoff_hz", "line"),
                ("ripple_db", "line"), ("stop_db", "line")],
    "notch": [("at_hz", "line"), ("harmonics", "line"), ("q", "line")],
    "rc": [("response", "response"), ("r_ohm", "line"), ("c_farad", "line"),
           ("sections", "line"), ("buffered", "check")],
}
_ROWS["highpass"] = _ROWS["lowpass"]
_ROWS["bandpass"] = _ROWS["bandstop"] = [("band_hz", "line") if k == "cutoff_hz" else (k, w)
                                         for k, w in _ROWS["lowpass"]]
#: Fallbacks shown for keys a stage table leaves at their default.
_SHOWN_DEFAULTS = {"design": "butterworth", "order": 2, "ripple_db": 1.0, "stop_db": 40.0,
                   "harmonics": 1, "q": 30.0, "sections": 1, "buffered": True,
                   "response": "lowpass", "gain_db": 0.0}
#: drop-down kinds: (config value, words) pairs, in the order shown
_CHOICE_KINDS = {
    "design": lambda: [(d, words.choice_words("design", d)) for d in DESIGNS],
    "response": lambda: words.choices("response"),
    "waveform": lambda: words.choices("waveform"),
    "detector": lambda: words.choices("detector"),
    "slope": lambda: words.choices("slope"),
}
_FIELD = re.compile(r"chains\[\d+\]\.(?:stages\[(\d+)\]\.|(detector)\.)?([a-z_]+)")


def parse_text(text: str):
    """Field text to a TOML value: int, float, list (``"1200, 1550"``) or the text
    itself (component values such as ``"4k7"``; the loader judges the rest)."""
    text = text.strip()
    if "," in text:
        return [parse_text(t) for t in text.split(",")]
    for conv in (int, float):
        try:
            return conv(text)
        except ValueError:
            pass
    return text


def _say(label: QtWidgets.QLabel, text: str, error: bool = False) -> None:
    """Show a form's message: red for a refusal, plain otherwise."""
    label.setText(text)
    label.setStyleSheet("color: #b23a30;" if error else f"color: {palette.FOREGROUND};")


def _show(v) -> str:
    if isinstance(v, (list, tuple)):
        return ", ".join(_show(x) for x in v)
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


class _Field(QtWidgets.QWidget):
    """One editor with its error message underneath.

    A drop-down shows words and carries the config value as item data; the
    field's ``text()`` and ``value()`` are always the config's own.
    """

    committed = QtCore.Signal()

    def __init__(self, key: str, kind: str, value, parent=None, context: str = ""):
        super().__init__(parent)
        self.key = key
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(1)
        if kind == "check":
            self.w = QtWidgets.QCheckBox("buffered (unticked: loaded ladder)")
            self.w.setChecked(bool(value))
            self.w.toggled.connect(self.committed)
        elif kind in _CHOICE_KINDS:
            self.w = QtWidgets.QComboBox()
            for v, text in _CHOICE_KINDS[kind]():
                self.w.addItem(text, v)
            i = self.w.findData(value)
            if i < 0:  # a value the list lacks (the loader will judge it): show it as is
                self.w.addItem(_show(value), value)
                i = self.w.count() - 1
            self.w.setCurrentIndex(i)
            self.w.currentIndexChanged.connect(self.committed)
        else:
            self.w = QtWidgets.QLineEdit(_show(value))
            self.w.editingFinished.connect(self._edited)
        self.w.setToolTip(words.tooltip(key, context))
        lay.addWidget(self.w)
        self.error = QtWidgets.QLabel()
        self.error.setWordWrap(True)
        self.error.setStyleSheet("color: #b23a30;")
        self.error.hide()
        lay.addWidget(self.error)
        self.name_label: QtWidgets.QLabel | None = None  # set by the form that shows it
        self._last = self.text()

    def _edited(self):
        if self.text() != self._last:
            self._last = self.text()
            self.committed.emit()

    def text(self) -> str:
        """The field as config text (a drop-down's config value, not its words)."""
        w = self.w
        if isinstance(w, QtWidgets.QCheckBox):
            return "true" if w.isChecked() else "false"
        return _show(w.currentData()) if isinstance(w, QtWidgets.QComboBox) else w.text()

    def value(self):
        if isinstance(self.w, QtWidgets.QCheckBox):
            return self.w.isChecked()
        if isinstance(self.w, QtWidgets.QComboBox):
            return self.w.currentData()
        return parse_text(self.w.text())

    def select(self, value) -> None:
        """Choose the drop-down entry whose config value is ``value``."""
        self.w.setCurrentIndex(self.w.findData(value))

    def set_error(self, message: str | None) -> None:
        if isinstance(self.w, QtWidgets.QLineEdit):
            self.w.setStyleSheet(palette.ERROR_STYLE if message else "")
        self.error.setText(message or "")
        self.error.setVisible(bool(message))


class _Form(QtWidgets.QGroupBox):
    """A titled form of fields; ``table()`` gives the visible fields as a dict."""

    changed = QtCore.Signal()

    def __init__(self, title: str, parent=None, context: str = ""):
        super().__init__(title, parent)
        self.context = context
        self.form = QtWidgets.QFormLayout(self)
        self.form.setContentsMargins(6, 4, 6, 4)
        self.form.setVerticalSpacing(3)
        self.fields: dict[str, _Field] = {}

    def add(self, key: str, kind: str, value) -> _Field:
        f = _Field(key, kind, value, context=self.context)
        f.committed.connect(self.changed)
        f.name_label = QtWidgets.QLabel(words.label(key, self.context))
        f.name_label.setToolTip(f.w.toolTip())
        self.form.addRow(f.name_label, f)
        self.fields[key] = f
        return f

    def visible_fields(self):
        return [f for f in self.fields.values() if not f.isHidden()]


class _StageForm(_Form):
    """Form of one stage; rows follow the type and (for IIR stages) the design."""

    remove = QtCore.Signal(object)

    def __init__(self, number: int, table: dict, parent=None):
        super().__init__(f"Stage {number + 1}: {words.STAGE_WORDS.get(table['type'], table['type'])}",
                         parent, context="stage")
        self.kind = table["type"]
        for key, kind in _ROWS[self.kind] + [("gain_db", "line")]:
            self.add(key, kind, table.get(key, _SHOWN_DEFAULTS.get(key, "")))
        btn = QtWidgets.QPushButton("Remove this stage")
        btn.clicked.connect(lambda: self.remove.emit(self))
        self.form.addRow("", btn)
        if "design" in self.fields:
            self.fields["design"].committed.connect(self._design_rows)
            self._design_rows()

    def _design_rows(self) -> None:
        d = self.fields["design"].text()
        self.form.setRowVisible(self.fields["ripple_db"], d in _RIPPLE)
        self.form.setRowVisible(self.fields["stop_db"], d in _STOP)

    def table(self) -> dict:
        t = {"type": self.kind}
        for f in self.visible_fields():
            if f.key in ("ripple_db", "stop_db") and f.text().strip() == "":
                continue
            t[f.key] = f.value()
        return t


class ReferenceEditor(QtWidgets.QGroupBox):
    """The lock-in reference shared by every chain, applied live.

    Fields: reference frequency and phase, plus channel and waveform for a
    measured reference (config keys frequency_hz, phase_deg, channel, waveform).  A reference the source announced (no ``[reference]``
    table in the settings) is shown as such; editing it overrides it, and the
    override is saved with the settings.
    """

    applied = QtCore.Signal(object)  # the new ReferenceSpec

    def __init__(self, engine, parent=None):
        super().__init__(parent)
        self.engine = engine
        ref = engine.reference
        self.origin = ("from the settings" if engine.settings.reference is not None
                       else "announced by the source; edit to override" if ref is not None
                       else "none; give a reference frequency to add one")
        keys = [("frequency_hz", "line"), ("phase_deg", "line")]
        if ref is not None and ref.measured:
            keys += [("channel", "line"), ("waveform", "waveform")]
        table = ref.to_mapping() if ref is not None else {"phase_deg": 0.0}
        grid = QtWidgets.QGridLayout(self)
        grid.setContentsMargins(6, 4, 6, 4)
        grid.setVerticalSpacing(2)
        self.fields: dict[str, _Field] = {}
        for j, (key, kind) in enumerate(keys):
            f = _Field(key, kind, table.get(key, ""), context="reference")
            r, c = divmod(j, 2)
            f.name_label = QtWidgets.QLabel(words.label(key, "reference"))
            f.name_label.setToolTip(f.w.toolTip())
            grid.addWidget(f.name_label, r, 2 * c,
                           alignment=QtCore.Qt.AlignRight | QtCore.Qt.AlignTop)
            grid.addWidget(f, r, 2 * c + 1, alignment=QtCore.Qt.AlignTop)
            f.committed.connect(self.apply)
            self.fields[key] = f
        grid.setColumnStretch(1, 1)
        grid.setColumnStretch(3, 1)
        self.message = QtWidgets.QLabel()
        self.message.setWordWrap(True)
        grid.addWidget(self.message, grid.rowCount(), 0, 1, 4)
        self._title()
        _say(self.message, "")

    def table(self) -> dict:
        """The ``[reference]`` table as the fields now read (possibly invalid)."""
        ref = self.engine.reference
        # keep what the form does not show (lock range, tracking, a measured channel)
        t = {k: v for k, v in ref.to_mapping().items() if k not in self.fields} \
            if ref is not None else {}
        t.update({k: f.value() for k, f in self.fields.items() if f.text().strip()})
        return t

    def apply(self) -> bool:
        """Send the table to the engine; mark the refused field on error."""
        for f in self.fields.values():
            f.set_error(None)
        try:
            spec = self.engine.change_reference(self.table())
        except SettingError as e:
            field = self.fields.get(e.field.rpartition(".")[2])
            if field is not None:
                field.set_error(str(e))
            _say(self.message, "" if field is not None else str(e), error=field is None)
            log.info("reference refused: %s", e)
            return False
        self.origin = "set here"
        self._title()
        _say(self.message, "applied to every chain (each lock-in restarts)")
        self.applied.emit(spec)
        return True

    def _title(self) -> None:
        self.setTitle(f"Lock-in reference ({self.origin})")


class ChainEditor(QtWidgets.QWidget):
    """The stages and detector of chain ``index``, applied live."""

    applied = QtCore.Signal(int)

    def __init__(self, engine, index: int, mains_hz: float = 50.0, parent=None):
        super().__init__(parent)
        self.engine = engine
        self.index = index
        self.mains_hz = mains_hz
        self.settings = engine.chains[index].settings
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(2, 2, 2, 2)
        self.message = QtWidgets.QLabel()
        self.message.setWordWrap(True)
        lay.addWidget(self.message)
        self.stage_box = QtWidgets.QGridLayout()  # stages and detector, two to a row
        self.stage_box.setSpacing(4)
        lay.addLayout(self.stage_box)
        add = QtWidgets.QHBoxLayout()
        self.new_type = QtWidgets.QComboBox()
        for kind in STAGE_TYPES:
            self.new_type.addItem(words.choice_words("stage", kind), kind)
        self.new_type.setToolTip("Kind of stage to append to this chain.\nConfig key: type")
        btn = QtWidgets.QPushButton("Add a stage")
        btn.clicked.connect(lambda: self.add_stage(self.new_type.currentData()))
        add.addWidget(self.new_type)
        add.addWidget(btn)
        add.addStretch(1)
        lay.addLayout(add)
        lay.addStretch(1)
        self.stages: list[_StageForm] = []
        self.detector: _Form | None = None
        self.load(self.settings)

    # -- public ---------------------------------------------------------
    def load(self, settings) -> None:
        """Rebuild the forms from ``settings`` (a ChainSettings)."""
        self.settings = settings
        table = settings.to_mapping()
        for f in self.stages:
            f.setParent(None)
            f.deleteLater()
        self.stages = []
        for j, st in enumerate(table["stages"]):
            form = _StageForm(j, st)
            form.changed.connect(self.apply)
            form.remove.connect(self._remove)
            self.stage_box.addWidget(form, *divmod(j, 2))
            self.stages.append(form)
        if self.detector is not None:
            self.detector.setParent(None)
            self.detector.deleteLater()
        det = table["detector"]
        self.detector = _Form("Detector", context="detector")
        self.detector.add("type", "detector", det["type"])
        self.detector.add("time_constant_s", "line", det["time_constant_s"])
        self.detector.add("slope_db_oct", "slope", det["slope_db_oct"])
        if "noise_window_s" in det:
            self.detector.add("noise_window_s", "line", det["noise_window_s"])
        self.detector.changed.connect(self.apply)
        self.stage_box.addWidget(self.detector, *divmod(len(self.stages), 2))
        self._titles()
        self._say("")

    def table(self) -> dict:
        """The chain table as the forms now read (possibly invalid)."""
        return {"name": self.settings.name, "input": self.settings.input,
                "stages": [f.table() for f in self.stages],
                "detector": {f.key: f.value() for f in self.detector.visible_fields()}}

    def apply(self, table: dict | None = None) -> bool:
        """Send the table to the engine; mark the refused field on error."""
        table = table if table is not None else self.table()
        for f in self._all_fields():
            f.set_error(None)
        try:
            self.settings = self.engine.change_chain(self.index, table)
        except SettingError as e:
            field = self._field_for(e.field)
            if field is not None:
                field.set_error(str(e))
                self._say("")
            else:
                self._say(str(e), error=True)
            log.info("setting refused: %s", e)
            return False
        self._titles()
        self._say("Applied: the chain runs on these settings from the next block.")
        self.applied.emit(self.index)
        return True

    def add_stage(self, kind: str) -> bool:
        """Append a stage of ``kind`` with starting values suited to the scene."""
        table = self.table()
        table["stages"].append(self._new_stage(kind))
        if self.apply(table):
            self.load(self.settings)
            return True
        return False

    # -- private --------------------------------------------------------
    def _remove(self, form: _StageForm) -> None:
        table = self.table()
        del table["stages"][self.stages.index(form)]
        if self.apply(table):
            self.load(self.settings)

    def _new_stage(self, kind: str) -> dict:
        ref = self.engine.reference
        f0 = ref.frequency_hz if ref is not None and ref.frequency_hz else self.engine.rate_hz / 20
        nyq = self.engine.rate_hz / 2
        return {"lowpass": {"type": "lowpass", "cutoff_hz": round(min(3 * f0, 0.8 * nyq))},
                "highpass": {"type": "highpass", "cutoff_hz": round(f0 / 4)},
                "bandpass": {"type": "bandpass", "band_hz": [round(0.8 * f0), round(1.25 * f0)]},
                "bandstop": {"type": "bandstop", "band_hz": [round(1.8 * self.mains_hz),
                                                             round(2.2 * self.mains_hz)]},
                "notch": {"type": "notch", "at_hz": self.mains_hz},
                "rc": {"type": "rc", "r_ohm": "10k", "c_farad": "10n"}}[kind]

    def _all_fields(self):
        for form in self.stages + [self.detector]:
            yield from form.fields.values()

    def _field_for(self, path: str):
        m = _FIELD.match(path)
        if not m:
            return None
        stage, det, key = m.groups()
        form = self.detector if det else (self.stages[int(stage)]
                                          if stage is not None and int(stage) < len(self.stages)
                                          else None)
        return form.fields.get(key) if form is not None else None

    def _titles(self) -> None:
        for j, (form, spec) in enumerate(zip(self.stages, self.settings.stages)):
            text = describe(spec, self.engine.rate_hz)
            form.setTitle(f"Stage {j + 1}: {text[:1].upper()}{text[1:]}")

    def _say(self, text: str, error: bool = False) -> None:
        _say(self.message, text, error)


class SettingsPanel(QtWidgets.QWidget):
    """Editors of every chain in tabs, with copy and save."""

    def __init__(self, engine, mains_hz: float = 50.0, parent=None):
        super().__init__(parent)
        self.engine = engine
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        self.reference = ReferenceEditor(engine)
        lay.addWidget(self.reference)
        self.tabs = QtWidgets.QTabWidget()
        self.editors = []
        for i, ch in enumerate(engine.chains):
            ed = ChainEditor(engine, i, mains_hz)
            scroll = QtWidgets.QScrollArea()
            scroll.setWidgetResizable(True)
            scroll.setWidget(ed)
            self.tabs.addTab(scroll, f"Chain {ch.name}")
            self.editors.append(ed)
        lay.addWidget(self.tabs, 1)
        row = QtWidgets.QHBoxLayout()
        if len(engine.chains) >= 2:
            a, b = engine.chains[0].name, engine.chains[1].name
            copy = QtWidgets.QPushButton(f"Copy {a} to {b}")
            copy.clicked.connect(self.copy_first_to_second)
            row.addWidget(copy)
        save = QtWidgets.QPushButton("Save settings…")
        save.clicked.connect(self._ask_save)
        row.addWidget(save)
        row.addStretch(1)
        lay.addLayout(row)
        self.saved_label = QtWidgets.QLabel()
        self.saved_label.setWordWrap(True)
        lay.addWidget(self.saved_label)

    def copy_first_to_second(self) -> bool:
        """Give the second chain the first chain's stages and detector."""
        a, b = self.editors[0], self.editors[1]
        table = a.settings.to_mapping()
        table["name"] = b.settings.name
        table["input"] = b.settings.input
        if b.apply(table):
            b.load(b.settings)
            return True
        return False

    def save(self, path) -> Path:
        """Write the settings in force as a TOML config the CLI accepts."""
        path = Path(path)
        text = self.engine.current_settings().to_toml(
            header="livefilt settings saved from the live window")
        path.write_text(text, encoding="utf-8")
        self.saved_label.setText(f"saved to {path}")
        return path

    def _ask_save(self) -> None:
        name, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Save settings", "livefilt.toml",
                                                        "TOML config (*.toml)")
        if name:
            try:
                self.save(name)
            except OSError as e:
                self.saved_label.setText(f"not saved: {name}: {e.strerror}")
