"""The live window (pyqtgraph on PySide6).

Importing this package imports Qt; ``import livefilt`` does not.

Modules, in data-flow order: :mod:`.strip` (strip chart and its min/max
reducer), :mod:`.strength` (detector histories and the strength time line),
:mod:`.verdict` (which chain sees better, in words), :mod:`.spectrum` (Welch
spectra and chain responses), :mod:`.rangeview` (the live range view),
:mod:`.designview` (the chains' design figures), :mod:`.words` (labels and
choices for config keys), :mod:`.editor` (settings forms), :mod:`.notes`
(the walk-away marks and recording), :mod:`.status` (status line),
:mod:`.main` (the window and :func:`run_window`), :mod:`.bench` (frame rate,
drawing load and latency).
"""

from livefilt.window.main import MainWindow, run_window

__all__ = ["MainWindow", "run_window"]
