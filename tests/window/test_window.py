"""The live window on the simulated greenhouse bench (Qt offscreen, pytest-qt).

Real parts: the real engine on the simulated source, real run folders on
disk.  Every test saves a screenshot under tests/artifacts/ for a person to
look at.  One window serves the module (opening one costs a second); the
tests leave it in a valid state for the next.
"""

from __future__ import annotations

import time

import numpy as np
import pytest
from scipy import signal

from tests.system import need_module  # noqa: E402

need_module("pyqtgraph", "pip install 'livefilt[window]'")
need_module("PySide6", "pip install 'livefilt[window]'")

from livefilt.config import demo_config, load_config, parse_config  # noqa: E402
from livefilt.stream.engine import Engine  # noqa: E402
from livefilt.errors import SettingError  # noqa: E402
from livefilt.runs.record import read_run  # noqa: E402
from livefilt.window import run_window  # noqa: E402
from livefilt.dsp.detect import READING_DTYPE  # noqa: E402
from livefilt.stream.taps import Tap  # noqa: E402
from livefilt.window.spectrum import welch_db  # noqa: E402
from livefilt.window.strip import MinMaxReducer  # noqa: E402

FS = 48000.0


def shot(w, artifacts, name):
    path = artifacts / f"window_{name}.png"
    assert w.save_screenshot(path)
    return path


def field(w, chain, stage, key):
    return w.settings_panel.editors[chain].stages[stage].fields[key]


def commit(f, text):
    f.w.setText(text)
    f.w.editingFinished.emit()


def test_reducer_split_equals_one_shot_and_numpy_minmax():
    # reference: numpy min/max over whole columns of the one-shot array
    rng = np.random.default_rng(3)
    x = rng.standard_normal((2, 50_000)).astype(np.float32)
    x[1, 45_678] = 40.0  # a one-sample spike must survive the reduction
    one = MinMaxReducer(2, 1000.0, 20.0, 300)
    one.push(0, x)
    split = MinMaxReducer(2, 1000.0, 20.0, 300)
    i = 0
    while i < x.shape[1]:
        n = int(rng.integers(1, 900))
        split.push(i, x[:, i:i + n])
        i += n
    (xa, ya), (xb, yb) = one.arrays(), split.arrays()
    assert np.array_equal(xa, xb) and np.array_equal(ya, yb)
    spc = one.spc
    c0 = int(round(xa[0] * 1000.0 / spc))
    m = len(xa) // 2 - 1  # complete columns (the last one is partial)
    cols = x[:, c0 * spc:(c0 + m) * spc].reshape(2, m, spc)
    assert np.array_equal(ya[:, 0:2 * m:2], cols.min(axis=2))
    assert np.array_equal(ya[:, 1:2 * m:2], cols.max(axis=2))
    assert ya[1].max() == 40.0


def _rows(first: int, n: int, every: int = 2400) -> np.ndarray:
    """Detector rows numbered first.. whose every field is a function of the number
    (a row mixed from two writes would not fit)."""
    k = np.arange(first, first + n)
    r = np.zeros(n, READING_DTYPE)
    r["index"] = k * every
    r["amplitude"], r["noise"], r["snr_db"] = k * 2.0, k * 3.0, -k * 1.0
    return r


def _whole(rows: np.ndarray, every: int = 2400) -> bool:
    k = rows["index"] // every
    return (np.array_equal(rows["amplitude"], k * 2.0) and np.array_equal(rows["noise"], k * 3.0)
            and np.array_equal(rows["snr_db"], -k * 1.0))


def test_rows_since_any_split_in_order_and_slow_reader_gets_newest():
    # reference: the same rows concatenated in one numpy array
    rng = np.random.default_rng(5)
    tap = Tap(48000.0, ["pd", "A"], ["A"], 1.0, rows_kept=500)
    assert len(tap.rows_since("A", 0)) == 0
    got, sent, cursor = [], 0, 0
    while sent < 1200:
        n = int(rng.integers(0, 40))
        tap.add_rows("A", _rows(sent, n))
        sent += n
        new = tap.rows_since("A", cursor)
        if len(new):
            cursor = int(new["index"][-1]) + 1
            got.append(new)
    np.testing.assert_array_equal(np.concatenate(got), _rows(0, sent))
    tap.add_rows("A", _rows(sent, 700))  # the reader falls 700 rows behind a 500-row ring
    late = tap.rows_since("A", cursor)
    np.testing.assert_array_equal(late, _rows(sent + 200, 500))
    mid = tap.rows_since("A", int(late["index"][123]))  # from the middle of a wrapped ring
    np.testing.assert_array_equal(mid, late[123:])


def test_rows_since_never_tears_while_the_engine_writes():
    import threading

    tap = Tap(48000.0, ["pd", "A"], ["A"], 1.0, rows_kept=64)
    stop = threading.Event()

    def writer():
        k = 0
        while not stop.is_set():
            tap.add_rows("A", _rows(k, 7))
            k += 7

    th = threading.Thread(target=writer)
    th.start()
    try:
        # until enough reads overlapped the writer (a count, not a time: machines are shared)
        cursor, reads, t_end = 0, 0, time.monotonic() + 20.0
        while reads < 50 and time.monotonic() < t_end:
            rows = tap.rows_since("A", cursor)
            if len(rows):
                assert _whole(rows)  # no row mixed from two writes
                assert np.all(np.diff(rows["index"]) == 2400)  # consecutive, in order
                assert rows["index"][0] >= cursor
                cursor = int(rows["index"][-1]) + 1
                reads += 1
    finally:
        stop.set()
        th.join()
    assert reads > 10


def test_welch_matches_scipy():
    # reference: scipy.signal.welch (Hann, 50 % overlap, constant detrend)
    rng = np.random.default_rng(2)
    for n, rate in ((24001, 48000.0), (96000, 192000.0), (301, 48000.0)):
        x = (rng.standard_normal((3, n)) + 0.4).astype(np.float32)
        f, db = welch_db(x, rate)
        nper = min(8192, n)
        f_ref, p_ref = signal.welch(x.astype(float), fs=rate, window="hann", nperseg=nper)
        np.testing.assert_allclose(f, f_ref)
        np.testing.assert_allclose(db, 10 * np.log10(p_ref), atol=1e-3)


def test_window_opens_and_plots_receive_data(win, qtbot, artifacts):
    assert win.room() == "range"  # the walk-away room opens first
    win.show_room("signals")  # the strip and the spectrum draw only when on screen
    qtbot.waitUntil(lambda: win.strip.drawn_index > FS * 1.5, timeout=8000)
    qtbot.waitUntil(lambda: all(len(h.t) > 10 for h in win.histories.values()), timeout=8000)
    for c in win.strip.curves:
        x, y = c.getData()
        assert len(x) > 100 and np.isfinite(y).sum() > 100
    win.spectrum.refresh()
    for c in win.spectrum.curves:
        assert len(c.getData()[0]) > 100
    qtbot.waitUntil(lambda: win.verdict.labels["A"][0].text() != "—", timeout=3000)
    assert "FS" in win.verdict.labels["A"][0].text()
    qtbot.waitUntil(lambda: "better than" in win.verdict.verdict.text(), timeout=5000)
    shot(win, artifacts, "running")
    win.show_room("range")


def test_strip_axis_stays_put_and_traces_and_marks_roll(win, qtbot):
    # the strip's time axis reads seconds before now (0 at the right) and does not move;
    # the newest column sits at 0 and a distance mark at (its time - now)
    win.show_room("signals")
    strip = win.strip
    qtbot.waitUntil(lambda: strip.drawn_index > FS * 1.0, timeout=8000)
    strip.add_marker(strip.drawn_index / FS - 0.5, "pot")
    ranges = []
    for _ in range(3):
        before = strip.drawn_index
        qtbot.waitUntil(lambda: strip.drawn_index > before, timeout=3000)
        ranges.append(tuple(strip.plots[0].vb.viewRange()[0]))
        x, _ = strip.curves[0].getData()
        assert -1.0 / 30 < x[-1] <= 0.0  # the newest column: at most one frame old
        t_mark, lines = strip._markers[-1]
        assert lines[0][1].value() == pytest.approx(t_mark - strip.drawn_index / FS)
    # as many seconds as the strip's columns (one per pixel, whole samples each) hold
    spc, width = strip.reducer.spc, strip._columns
    assert all(r == pytest.approx((-width * spc / FS, 0.0)) for r in ranges)
    assert width * spc / FS == pytest.approx(strip.seconds, rel=0.5 * width / (FS * strip.seconds) + 1e-9)
    assert strip.plots[-1].getAxis("bottom").labelText == "time before now (s)"
    win.show_room("range")


def test_cutoff_edit_changes_running_chain(win, qtbot, artifacts):
    win.show_room("chains")
    chain = win.engine.chains[0]
    f = np.array([150.0, 400.0, 700.0])
    before = chain.response(f)
    commit(field(win, 0, 0, "cutoff_hz"), "500")
    qtbot.waitUntil(lambda: chain.settings.stages[0].cutoff_hz == 500.0, timeout=3000)
    after = chain.response(f)
    # reference: scipy.signal.butter designs of the old and new high-pass; the
    # other stages are unchanged, so the chain's response changes by their ratio
    old = signal.sosfreqz(signal.butter(2, 300, "highpass", fs=FS, output="sos"), f, fs=FS)[1]
    new = signal.sosfreqz(signal.butter(2, 500, "highpass", fs=FS, output="sos"), f, fs=FS)[1]
    np.testing.assert_allclose(np.abs(after / before), np.abs(new / old), rtol=1e-6)
    assert not field(win, 0, 0, "cutoff_hz").error.isVisible()
    assert win.engine.stats.dropped == 0
    shot(win, artifacts, "cutoff_500")


def test_invalid_value_refused_in_place_with_loader_message(win, qtbot, artifacts):
    chain = win.engine.chains[0]
    good = chain.settings
    f = field(win, 0, 2, "band_hz")
    commit(f, "1200, 30000")
    doc = win.engine.current_settings().to_mapping()
    doc["chains"][0]["stages"][2]["band_hz"] = [1200, 30000]
    with pytest.raises(SettingError) as loader:
        parse_config(doc)
    assert f.error.isVisible() and f.error.text() == str(loader.value)
    assert "chains[0].stages[2].band_hz" in f.error.text()
    assert f.w.styleSheet()  # red field
    shot(win, artifacts, "refused")
    time.sleep(0.1)
    qtbot.wait(50)
    assert chain.settings == good  # the chain kept running on its last good settings
    commit(f, "1200, 1550")
    assert not f.error.isVisible() and not f.w.styleSheet()


def test_reference_edit_moves_every_lockin_and_saves(win, qtbot, tmp_path, artifacts):
    ref = win.settings_panel.reference
    tap = win.engine.tap

    def newest_ref_hz(name):
        rows = tap.rows_since(name, 0)
        return float(rows[-1]["ref_hz"]) if len(rows) else None

    assert newest_ref_hz("A") == 1370.0
    bad = ref.fields["frequency_hz"]
    commit(bad, "30000")
    doc = win.engine.current_settings().to_mapping()
    doc["reference"]["frequency_hz"] = 30000
    with pytest.raises(SettingError) as loader:
        parse_config(doc)
    assert bad.error.isVisible() and bad.error.text() == str(loader.value)
    assert bad.error.text().startswith("reference.frequency_hz = 30000:")
    shot(win, artifacts, "reference_refused")
    commit(ref.fields["frequency_hz"], "1371.5")
    assert not bad.error.isVisible() and "Lock-in reference (set here)" == ref.title()
    qtbot.waitUntil(lambda: newest_ref_hz("A") == 1371.5 and newest_ref_hz("B") == 1371.5,
                    timeout=3000)
    assert win.spectrum.marks[0].value() == pytest.approx(np.log10(1371.5))
    path = win.settings_panel.save(tmp_path / "ref.toml")
    assert load_config(path).reference.frequency_hz == 1371.5
    shot(win, artifacts, "reference_1371_5")
    commit(ref.fields["frequency_hz"], "1370")
    qtbot.waitUntil(lambda: newest_ref_hz("A") == 1370.0, timeout=3000)


def test_reference_announced_by_the_source_is_shown_and_overridable(qapp, qtbot, artifacts):
    from livefilt.stream.engine import build_source
    from livefilt.window.editor import SettingsPanel

    # a driving sound card or the serial firmware announce their modulation; here the
    # simulated bench does (its config could not go without a [reference] table for a
    # lock-in, so the chains detect RMS and the announced reference is what is shown)
    doc = demo_config().to_mapping()
    del doc["reference"]
    for c in doc["chains"]:
        c["detector"]["type"] = "rms"
    settings = parse_config(doc)
    source = build_source(settings)
    source.reference_hint = {"frequency_hz": 1370.0, "phase_deg": 12.0}
    engine = Engine(settings, source=source, tap_seconds=5)
    try:
        panel = SettingsPanel(engine)
        qtbot.addWidget(panel)
        ref = panel.reference
        assert "announced by the source" in ref.title()
        assert ref.fields["frequency_hz"].text() == "1370"
        assert ref.fields["phase_deg"].text() == "12"
        engine.start()
        commit(ref.fields["phase_deg"], "30")
        qtbot.waitUntil(lambda: engine.reference.phase_deg == 30.0, timeout=3000)
        assert engine.current_settings().reference.phase_deg == 30.0
        panel.resize(620, 700)
        panel.show()
        path = artifacts / "window_reference_from_source.png"
        assert panel.grab().save(str(path), "PNG")
    finally:
        engine.stop()


def test_copy_a_to_b_and_saved_settings_load_back(win, qtbot, tmp_path, artifacts):
    assert win.settings_panel.copy_first_to_second()
    a, b = win.engine.chains[0], win.engine.chains[1]
    qtbot.waitUntil(lambda: b.settings.stages == a.settings.stages, timeout=3000)
    assert b.settings.detector == a.settings.detector and b.settings.name == "B"
    np.testing.assert_array_equal(b.sos, a.sos)
    path = win.settings_panel.save(tmp_path / "saved.toml")
    assert load_config(path).to_mapping() == win.engine.current_settings().to_mapping()
    win.settings_panel.tabs.setCurrentIndex(1)
    shot(win, artifacts, "copied_to_b")
    win.settings_panel.tabs.setCurrentIndex(0)
    win.show_room("range")


def test_recording_with_markers_gives_readable_run(win, qtbot, tmp_path, artifacts):
    rec = win.record.start(tmp_path)
    assert rec is not None and win.record.recording
    win.notes.distance.setText("1.5")
    win.notes.note.setText("leaf edge")
    m1 = win.notes.mark()
    win.notes.step.setText("0.25")
    m2 = win.notes.step_by(+1)
    win.notes.distance.setText("one metre")
    assert win.notes.mark() is None and "distance" in win.notes.error.text()
    qtbot.wait(800)
    win.record.refresh()
    assert "written" in win.record.info.text()
    shot(win, artifacts, "recording")
    stopped = win.record.stop()
    assert stopped.folder == rec.folder
    run = read_run(rec.folder)
    dist = [(m.get("distance_m"), m.get("note", "")) for m in run.markers]
    assert dist == [(1.5, "leaf edge"), (1.75, "")]
    assert run.markers[0]["time_s"] == m1["time_s"] and run.markers[1]["time_s"] == m2["time_s"]
    assert run.raw.shape[0] > FS * 0.5 and run.raw.shape[1] == 2
    assert len(run.chain_rows("A")["amplitude"]) > 5
    assert len(win.strip._markers) >= 2  # drawn on the strip
    assert len(win.strength._markers) >= 2  # and on the strength time line


@pytest.mark.slow
def test_window_runs_30_s_without_a_crash(win, qtbot, artifacts):
    # PySide6 6.12.0 aborts after about 10 s of updates; short tests do not show it
    f0, i0 = win.frames, win.engine.stats.index
    win.seconds.setValue(20)
    t_end = time.monotonic() + 30.0
    while time.monotonic() < t_end:
        qtbot.wait(500)
        assert win.engine.error is None
    assert win.frames - f0 > 30 * 8  # the display kept ticking (2 shared cores)
    assert win.engine.stats.index - i0 > 29 * FS
    assert win.fps > 5
    shot(win, artifacts, "after_30s")


def test_run_window_closes_itself_saves_png_and_records(qapp, tmp_path, artifacts):
    png = artifacts / "window_run_window.png"
    png.unlink(missing_ok=True)
    assert run_window(demo_config(), duration_s=2.0, screenshot=png, out=tmp_path) == 0
    assert png.stat().st_size > 10_000
    (folder,) = [p for p in tmp_path.iterdir() if p.is_dir()]
    run = read_run(folder)
    assert run.raw.shape[0] > FS
