"""The design view alone (Qt offscreen, pytest-qt): curves, interferer table and
parts follow every accepted edit; numbers equal the design report's."""

from __future__ import annotations

import numpy as np
from scipy import signal

from tests.system import need_module  # noqa: E402

need_module("pyqtgraph", "pip install 'livefilt[window]'")
need_module("PySide6", "pip install 'livefilt[window]'")

from livefilt.config import demo_config, load_config, parse_config  # noqa: E402
from livefilt.window.designview import DesignView  # noqa: E402


def _curve(view, name):
    for item in view.gain_plot.listDataItems():
        if item.name() == name:
            return item.xData, item.yData  # as given (getData is log-transformed)
    raise AssertionError(f"no curve {name!r}")


def test_design_view_draws_and_follows_edits(qtbot, artifacts):
    s = demo_config()
    view = DesignView(s)
    qtbot.addWidget(view)
    view.resize(1100, 900)
    view.show()
    qtbot.waitExposed(view)
    assert "1.37 kHz" in view.summary.text() and "image" in view.warnings.text()
    # chain A's curve is front end x stages; reference: scipy.signal.sosfreqz of a
    # Butterworth band-pass designed by scipy directly, times the RC law of the TIA pole
    f, gain_db = _curve(view, "chain A: front end × stages")
    view.grab().save(str(artifacts / "designview-demo.png"))
    doc = s.to_mapping()
    doc["chains"][0]["stages"] = [{"type": "bandpass", "order": 2, "band_hz": [1000, 2000]}]
    view.set_settings(parse_config(doc))
    f2, g2 = _curve(view, "chain A: front end × stages")
    sos = signal.butter(2, [1000, 2000], "bandpass", fs=48000, output="sos")
    tia = 1 / (1 + 1j * f2 * 2 * np.pi * 20e3 * 47e-12)
    want = 20 * np.log10(np.abs(signal.sosfreqz(sos, worN=f2, fs=48000)[1] * tia))
    keep = want > -150
    np.testing.assert_allclose(g2[keep], want[keep], atol=1e-6)
    assert not np.allclose(gain_db[:len(g2)], g2)
    # interferer table: DC, mains x1..x10, the four listed lines; lock-in columns
    t = view.lines_table
    assert t.rowCount() == 15
    heads = [t.horizontalHeaderItem(i).text() for i in range(t.columnCount())]
    assert heads == ["Line", "Frequency", "Chain A: filters", "Chain A: lock-in",
                     "Chain B: filters", "Chain B: lock-in"]
    assert view.parts_table.item(0, 0).text() == "TIA feedback pole"
    view.grab().save(str(artifacts / "designview-edited.png"))


def test_design_view_parts_and_plain_labels(qtbot, artifacts):
    s = load_config(__import__("pathlib").Path(__file__).parents[2] / "configs" / "soundcard-bench.toml")
    view = DesignView(s)
    qtbot.addWidget(view)
    view.resize(1100, 900)
    p = view.parts_table
    assert p.rowCount() == 2 and "(E12)" in p.item(0, 1).text()
    # no raw config keys in what the user reads
    texts = [view.chain_table.horizontalHeaderItem(i).text() for i in range(view.chain_table.columnCount())]
    assert not any("_" in x for x in texts + [view.summary.text()])
    # chain B has an RMS detector: no lock-in column for it
    heads = [view.lines_table.horizontalHeaderItem(i).text() for i in range(view.lines_table.columnCount())]
    assert "Chain B: lock-in" not in heads
    view.grab().save(str(artifacts / "designview-soundcard.png"))


def test_settings_without_a_reference_frequency_show_one_line(qtbot):
    doc = demo_config().to_mapping()
    doc["source"] = {"driver": "serial", "rate_hz": 8000, "port": "/dev/null"}
    doc["reference"] = {"channel": 1}
    view = DesignView(parse_config(doc))
    qtbot.addWidget(view)
    assert view.summary.text().startswith("No design view for these settings: reference.frequency_hz")
