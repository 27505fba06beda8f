"""The live window (pyqtgraph on PySide6). Placeholder until the window lands."""


def run_window(settings, duration_s=None, screenshot=None, out=None):
    raise ImportError("the live window is not built yet", name="livefilt.window")
