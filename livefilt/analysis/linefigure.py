"""One picture for the check and the survey: a noise density with its lines marked.

:func:`draw_density` draws a :class:`~livefilt.dsp.spectrum.Density` on log
axes and marks the lines found (mains and flicker first, then humps, then
the strongest spurs), labelling those with room for a label in short words
("mains", "x3 mains", "flicker", "spur 1.00 kHz", "hump").
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["draw_density", "short_label"]

_MAINS = "#7a2d8c"
_OTHER = "#444444"
_SIGNAL = "#c25400"


def short_label(ln) -> str:
    """A few words for a figure."""
    if ln.kind == "mains":
        return "mains" if ln.harmonic == 1 else f"×{ln.harmonic} mains"
    if ln.kind == "flicker":
        return "flicker" if ln.harmonic == 2 else f"×{ln.harmonic} mains"
    if ln.kind == "hump":
        return "hump"
    if ln.kind == "signal":
        return "modulation"
    return ln.label.split(" (")[0]


def draw_density(ax, spec, lines, max_marks: int = 16, skip=("tone",)) -> None:
    """Density curve, line marks and labels on ``ax`` (log-log)."""
    f, d = spec.freqs_hz[1:], spec.density[1:]
    ax.loglog(f, d, lw=0.6, color="#33507a", label="noise density")
    order = {"signal": 0, "mains": 1, "flicker": 1, "hump": 2}
    marks = sorted((ln for ln in lines if ln.kind not in skip), key=lambda ln: order.get(ln.kind, 3))
    placed: list[float] = []
    for ln in marks[:max_marks]:
        k = int(np.argmin(np.abs(spec.freqs_hz - ln.hz)))
        y = float(spec.density[k])
        colour = {"mains": _MAINS, "flicker": _MAINS, "signal": _SIGNAL}.get(ln.kind, _OTHER)
        ax.plot(ln.hz, y, marker="v", ms=4, ls="none", color=colour)
        if all(abs(math.log(ln.hz / p)) > 0.25 for p in placed):
            placed.append(ln.hz)
            ax.annotate(short_label(ln), (ln.hz, y), textcoords="offset points", xytext=(2, 5),
                        fontsize=7, rotation=55, color="#333333")
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"density ({spec.units}/√Hz)")
    ax.set_xlim(max(f[0], 5.0), f[-1])
    ax.grid(True, which="both", lw=0.3, alpha=0.5)
