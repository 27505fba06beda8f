"""The A/B verdict: which chain sees the target better, by how many dB, in words.

"Seeing better" is the higher signal-to-noise ratio (a chain's gain lifts its
noise with its signal, so amplitude alone does not decide).  The sentence
judges the latest SNRs, the same figures shown under it (each noise estimate
already spans the detector's noise window, so they move slowly); under it,
each chain's latest signal, noise and SNR, every number with its unit.  It
reads the chains' :class:`~.strength.RowHistory` (the window updates them).

API
---
- :func:`verdict_words` (snr_by_chain) -> the sentence.
- :class:`VerdictPanel` (histories, units) with ``refresh()``.
"""

from __future__ import annotations

import math

from PySide6 import QtCore, QtWidgets

from livefilt.dsp.detect import LOCK_REASONS
from livefilt.units import si
from livefilt.window import palette
from livefilt.window.labels import LineBox, fix_size

__all__ = ["VerdictPanel", "verdict_words", "reference_line", "EVEN_DB", "CLEAR_DB"]

EVEN_DB = 0.5    # closer than this: "equally well"
CLEAR_DB = 10.0  # below this a chain is said not to see the target clearly


def verdict_words(snr_db: dict[str, float]) -> str:
    """The verdict on chains' SNRs (dB, NaN while a chain settles), as a sentence."""
    ready = {k: v for k, v in snr_db.items() if math.isfinite(v)}
    if not snr_db:
        return "Waiting for the first readings."
    if len(ready) < len(snr_db):
        waiting = [k for k in snr_db if k not in ready]
        return (f"Waiting for {' and '.join(waiting)} to settle before judging "
                f"{'its' if len(waiting) == 1 else 'their'} noise.")
    if len(ready) == 1:
        (name, v), = ready.items()
        return f"{name} sees the target {v:.1f} dB above its noise."
    ranked = sorted(ready.items(), key=lambda kv: -kv[1])
    (best, hi), (second, lo) = ranked[0], ranked[1]
    if hi < CLEAR_DB:
        return (f"Neither {best} nor {second} sees the target clearly: SNR {hi:.1f} and "
                f"{lo:.1f} dB, under {CLEAR_DB:g} dB.")
    if hi - lo < EVEN_DB:
        return f"{best} and {second} see the target equally well (within {EVEN_DB:g} dB)."
    text = f"{best} sees the target {hi - lo:.1f} dB better than {second}"
    if lo < CLEAR_DB:
        text += f"; {second} has lost it in the noise"
    return text + "."


class VerdictPanel(QtWidgets.QFrame):
    """The verdict sentence in large type, each chain's figures under it."""

    def __init__(self, histories: dict, units: str, parent=None):
        super().__init__(parent)
        self.histories = histories
        self.units = units
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(14, 6, 10, 6)
        lay.setSpacing(2)
        lay.addWidget(palette.card(self, "verdict", palette.VERDICT_RULE,
                                   "Which chain sees the target better?"))
        self.verdict = QtWidgets.QLabel("Waiting for the first readings.")
        self.verdict.setFont(palette.big_font(19, bold=True, mono=False))
        self.verdict.setWordWrap(True)
        self.verdict.setAlignment(QtCore.Qt.AlignLeft | QtCore.Qt.AlignVCenter)
        lay.addWidget(LineBox(self.verdict, lines=2))
        grid = QtWidgets.QGridLayout()
        grid.setHorizontalSpacing(10)
        grid.setVerticalSpacing(0)
        self.labels = {}
        styles = ["──", "- -", "···", "-·-"]
        for k, name in enumerate(histories):
            colour = palette.chain_colour(k)
            tag = QtWidgets.QLabel(f"{name} {styles[k % len(styles)]}")
            tag.setFont(palette.big_font(13))
            tag.setStyleSheet(f"color: {colour};")
            grid.addWidget(tag, k, 0)
            row = []
            for j, (what, sample) in enumerate((("signal", "888.8 m" + units + " rms*"),
                                                ("noise", "888.8 m" + units + " rms ±888 %"),
                                                ("SNR", "−888.8 ±88.8 dB"))):
                cap = QtWidgets.QLabel(what)
                cap.setStyleSheet(f"color: {palette.FOREGROUND};")
                grid.addWidget(cap, k, 1 + 2 * j, alignment=QtCore.Qt.AlignRight)
                lab = QtWidgets.QLabel("—")
                lab.setFont(palette.big_font(13, bold=j == 2))
                lab.setStyleSheet(f"color: {colour};")
                lab.setAlignment(QtCore.Qt.AlignRight | QtCore.Qt.AlignVCenter)
                fix_size(lab, sample)
                grid.addWidget(lab, k, 2 + 2 * j)
                row.append(lab)
            self.labels[name] = row
        grid.setColumnStretch(7, 1)
        lay.addLayout(grid)
        # the reference as measured from the lock-in's phase, and why a chain is not locked
        self.reference = QtWidgets.QLabel("")
        self.reference.setStyleSheet(f"color: {palette.FOREGROUND};")
        fix_size(self.reference, "A: reference 88888.88 Hz (+888.88 Hz ±88.88 Hz)   not locked: "
                 "phase drifts faster than the output low-pass follows (reference off)")
        lay.addWidget(self.reference)
        self.snr_judged: dict[str, float] = {}

    def refresh(self) -> None:
        """Latest figures per chain and the sentence on them."""
        judged = {}
        for name, h in self.histories.items():
            r = h.latest
            if r is None:
                continue
            a, n, s = float(r["amplitude"]), float(r["noise"]), float(r["snr_db"])
            la, ln, ls = self.labels[name]
            u, su = float(r["noise_u"]), float(r["snr_u_db"])
            la.setText(_rms(a, self.units) + ("*" if r["biased"] else ""))
            ln.setText(_rms(n, self.units) + (f" ±{100 * u:.0f} %" if math.isfinite(u) and
                                              math.isfinite(n) else ""))
            ls.setText("—" if not math.isfinite(s) else f"{s:5.1f}"
                       + (f" ±{su:.1f}" if math.isfinite(su) else "") + " dB")
            judged[name] = s
        self.snr_judged = judged
        line = reference_line(self.histories)
        if line != self.reference.text():
            self.reference.setText(line)
        text = verdict_words(judged)
        if text != self.verdict.text():
            self.verdict.setText(text)


def reference_line(histories: dict) -> str:
    """The first chain's measured reference and, if so, why it is not locked."""
    for name, h in histories.items():
        r = h.latest
        if r is None:
            continue
        off, ref, u = float(r["offset_hz"]), float(r["ref_hz"]), float(r["offset_u_hz"])
        text = ""
        if math.isfinite(off) and math.isfinite(ref):
            text = f"{name}: reference {ref + off:.2f} Hz ({off:+.2f} Hz"
            text += f" ±{u:.2f} Hz)" if math.isfinite(u) else ")"
        if not r["locked"]:
            text += f"   not locked: {LOCK_REASONS.get(int(r['lock_reason']), '')}"
        return text
    return ""


def _rms(x: float, units: str) -> str:
    """``"78.43 µFS rms"``; a dash alone while the figure is not known yet."""
    return si(x, units) + " rms" if math.isfinite(x) else "—"
