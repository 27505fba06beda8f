"""The live range view on its own (pytest-qt, Qt offscreen) with a real engine
on the simulated walk-away scene; a screenshot goes to tests/artifacts/."""

from __future__ import annotations

import time

import pytest

from tests.system import need_module

need_module("pyqtgraph", "pip install 'livefilt[window]'")
need_module("PySide6", "pip install 'livefilt[window]'")

from livefilt.config import load_config, parse_config  # noqa: E402
from livefilt.drivers.simulated import Scene  # noqa: E402
from livefilt.stream.engine import Engine  # noqa: E402
from livefilt.window.rangeview import RangeView  # noqa: E402
from tests.analysis.test_range_report import ROOT  # noqa: E402


def _walk_engine(walk, hold=3.0):
    doc = load_config(ROOT / "configs/walk-away.toml").to_mapping()
    doc["source"].update(pace="fast", walk_m=walk, hold_s=hold, move_s=0.5, adc_bits=24, rate_hz=24000)
    return Engine(parse_config(doc), tap_seconds=10)


def test_range_view_grows_with_the_markers(qtbot, artifacts):
    walk = [0.7, 1.0, 1.4, 2.0, 2.8, 4.0, 5.6, 8.0]
    engine = _walk_engine(walk)
    view = RangeView(engine)
    qtbot.addWidget(view)
    view.resize(1100, 440)
    view.show()
    view.refresh()
    assert "no distance marked" in view.now.text()
    # a fast source covers the walk in a few long steps, quicker than the view's
    # polls: each step held a moment, so the view is seen while it grows
    engine.listeners.append(lambda *args: time.sleep(0.3))
    engine.start()
    seen_points = []
    deadline = time.monotonic() + 120
    while not engine.finished.is_set() and time.monotonic() < deadline:
        qtbot.wait(100)
        view.refresh()
        if "A" in view.results:
            seen_points.append(len(view.results["A"].segments))
    engine.stop()
    assert engine.error is None
    view._marks_seen = -1  # one last refit on everything
    view.refresh()
    # the last poll may come before the last marker's segment is complete
    # (a fast source ends in a few long steps): count after the final refit
    seen_points.append(len(view.results["A"].segments))
    assert seen_points[-1] == len(walk) and min(seen_points) < len(walk)  # it grew
    assert "8 m" in view.now.text() and "moving" in view.marks.text()
    for name in ("A", "B"):
        r = view.results[name].result
        assert abs(r["exponent"] - 2.0) < 0.1  # the beam-filling canopy: 1/d^2 (REFERENCES row 9)
        assert r["range_low_m"] < r["range_m"] < r["range_high_m"]
    sc = Scene(24000, 1370, 50, "canopy", None, 7)
    sc.adc_bits = 24
    truth = sc.true_range_m(10.0, view.results["A"].enbw_hz)  # chain A: white noise only
    assert view.results["A"].result["range_m"] == pytest.approx(truth, rel=0.15)
    assert "range" in view.fits.text()
    qtbot.wait(50)
    assert view.grab().save(str(artifacts / "rangeview_walk_away.png"))
