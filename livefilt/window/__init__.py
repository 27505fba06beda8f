"""The live window (pyqtgraph on PySide6).

Importing this package imports Qt; ``import livefilt`` does not.

Modules, in data-flow order: :mod:`.strip` (strip chart and its min/max
reducer), :mod:`.strength` (detected strength plots and the big read-out),
:mod:`.spectrum` (Welch spectra and chain responses), :mod:`.editor`
(settings forms), :mod:`.notes` (distance notes and recording),
:mod:`.status` (status line), :mod:`.main` (the window and
:func:`run_window`), :mod:`.bench` (frame rate, drawing load and latency).
"""

from livefilt.window.main import MainWindow, run_window

__all__ = ["MainWindow", "run_window"]
