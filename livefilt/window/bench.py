"""Benchmark of the live window: frame rate, drawing load, latency, losses.

:func:`measure_window` runs the real window (offscreen when there is no
display) on the simulated greenhouse bench at a chosen rate, with the strip
chart showing 10 s, in the Signals room (strip chart and spectrum on screen:
the room that draws the most, as the whole window did before it had rooms),
or another room by ``room``, and measures from the GUI thread:

- ``fps``: strip-chart paints per second (what the eye gets; 0 in a room
  without the strip);
- ``cpu_fraction``: CPU time of the GUI thread (``time.thread_time``: the
  reduction, the plot updates and Qt's painting) over wall time; 1.0 = one core;
- ``latency_ms`` (mean), ``latency_p95_ms``, ``latency_max_ms``: from the
  moment the engine handed a block to the tap (plus the engine's mean
  processing time per call) to the end of the first strip paint that shows
  it; the simulated source itself delivers 4096-frame chunks, a delay before
  that moment and not counted here;
- ``dropped`` and ``overruns``: the engine's losses during the run (the
  display must never cause any).

Used by ``livefilt speed --window``.
"""

from __future__ import annotations

import collections
import gc
import logging
import os
import time

import numpy as np

__all__ = ["measure_window"]

log = logging.getLogger(__name__)


def measure_window(seconds: float = 10, rate_hz: float = 192000, *, block: int = 256,
                   strip_s: float = 10.0, warmup_s: float = 1.5, room: str = "signals") -> dict:
    """Run the window ``seconds`` (after ``warmup_s``) and return its measures.

    Returns
    -------
    dict with keys fps, ticks_per_s, cpu_fraction, latency_ms, latency_p95_ms,
    latency_max_ms, dropped, overruns, engine_load, rate_hz, block, strip_s, seconds.
    """
    if not (os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6 import QtCore, QtWidgets

    from livefilt.config import demo_config, parse_config
    from livefilt.stream.engine import Engine
    from livefilt.window.main import MainWindow

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(["livefilt-bench"])
    doc = demo_config().to_mapping()
    doc["source"].update(rate_hz=rate_hz, block=int(block))
    settings = parse_config(doc, "<window benchmark>")
    engine = Engine(settings, tap_seconds=max(strip_s, 2.0) + 2.0)
    handed = collections.deque(maxlen=100000)  # (end index, time handed to the tap)
    calls = [0]

    def listener(eng, start, data, outputs, rows):
        handed.append((start + data.shape[0], time.perf_counter()))
        calls[0] += 1

    engine.listeners.append(listener)
    win = MainWindow(engine, strip_seconds=strip_s)
    win.show_room(room)
    strip = win.strip
    paints: list[tuple[float, int]] = []  # (end of paint, drawn index)
    original = strip.paintEvent

    def paint_event(ev):
        original(ev)
        paints.append((time.perf_counter(), strip.drawn_index))

    strip.paintEvent = paint_event
    engine.start()
    win.show()
    gc.collect()  # as run_window does
    gc.freeze()
    result: dict = {}

    def begin():
        paints.clear()
        result.update(t0=time.perf_counter(), cpu0=time.thread_time(), ticks0=win.frames,
                      d0=engine.stats.dropped, o0=engine.stats.overruns)
        QtCore.QTimer.singleShot(int(seconds * 1000), end)

    def end():
        result.update(t1=time.perf_counter(), cpu1=time.thread_time(), ticks1=win.frames)
        app.quit()

    QtCore.QTimer.singleShot(int(warmup_s * 1000), begin)
    app.exec()
    win.close()
    engine.listeners.remove(listener)
    wall = result["t1"] - result["t0"]
    st = engine.stats
    per_call = st.busy_s / max(calls[0], 1)
    lat = _latencies(list(handed), paints, per_call)
    return {
        "fps": len(paints) / wall,
        "ticks_per_s": (result["ticks1"] - result["ticks0"]) / wall,
        "cpu_fraction": (result["cpu1"] - result["cpu0"]) / wall,
        "latency_ms": float(np.mean(lat)) * 1e3 if len(lat) else float("nan"),
        "latency_p95_ms": float(np.percentile(lat, 95)) * 1e3 if len(lat) else float("nan"),
        "latency_max_ms": float(np.max(lat)) * 1e3 if len(lat) else float("nan"),
        "dropped": st.dropped - result["d0"],
        "overruns": st.overruns - result["o0"],
        "engine_load": st.load(engine.rate_hz),
        "rate_hz": float(engine.rate_hz),
        "block": engine.block,
        "strip_s": strip_s,
        "seconds": wall,
        "room": room,
    }


def _latencies(handed, paints, per_call: float) -> np.ndarray:
    """For each block handed to the tap: first paint showing it minus the hand-over time."""
    if not handed or not paints:
        return np.zeros(0)
    h_end = np.array([e for e, _ in handed])
    h_t = np.array([t for _, t in handed])
    p_t = np.array([t for t, _ in paints])
    p_idx = np.maximum.accumulate(np.array([i for _, i in paints]))
    k = np.searchsorted(p_idx, h_end, side="left")  # first paint with drawn_index >= block end
    ok = (k < len(p_t)) & (h_t >= p_t[0])  # handed while measuring
    lat = p_t[np.minimum(k, len(p_t) - 1)] - h_t + per_call
    return lat[ok & (lat > 0)]
