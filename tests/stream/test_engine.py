"""The engine end to end on real parts: simulated bench, ring, chains, recorder, replay."""

import numpy as np
import pytest

from livefilt.config import demo_config, parse_config
from livefilt.stream.engine import Engine
from livefilt.runs.record import read_run
from livefilt.acquire.source import Source


def fast_demo(block=256, **source):
    d = demo_config().to_mapping()
    d["source"].update(pace="fast", block=block, **source)
    return parse_config(d)


def collect(engine, duration):
    rows = {c.name: [] for c in engine.chains}
    engine.listeners.append(lambda e, start, raw, ys, rs: [rows[c.name].append(r) for c, r in zip(e.chains, rs)])
    engine.run(duration)
    return {k: np.concatenate(v) for k, v in rows.items()}


def test_results_do_not_depend_on_block_size_or_batching():
    # Reference: scipy.signal.sosfilt state carry-over makes block processing
    # equal to one shot; rows fall on fixed sample indices.
    a = collect(Engine(fast_demo(block=64), batch=1), 2.0)
    b = collect(Engine(fast_demo(block=1024), batch=16), 2.0)
    for name in a:
        assert np.array_equal(a[name]["index"], b[name]["index"])
        for f in ("in_phase", "quadrature", "amplitude"):
            np.testing.assert_allclose(a[name][f], b[name][f], rtol=1e-9, atol=1e-15)
    # 2 s at 48 kHz with 50 ms rows: 40 rows per chain, exactly
    assert len(a["A"]) == 40


def test_chains_spread_over_workers_give_the_same_rows_bit_for_bit():
    # the groups' banks run the same kernels on the same samples: no number
    # may change; a long default step for a fast source changes the rows only
    # in the last bits (the lock-in's segments fall otherwise across steps)
    d = demo_config().to_mapping()
    d["source"].update(pace="fast")
    d["chains"] = [dict(c, name=f"{c['name']}{i}") for i in range(3) for c in d["chains"]]
    settings = parse_config(d)
    spread = Engine(settings, workers=3)
    assert spread.workers == 3 and spread.batch * spread.block >= 1 << 16
    one = collect(Engine(settings, batch=spread.batch), 1.0)
    three = collect(spread, 1.0)
    short = collect(Engine(settings, batch=4), 1.0)
    assert one.keys() == three.keys() == short.keys()
    for name in one:
        scale = np.max(np.abs(one[name]["amplitude"]))
        for f in ("index", "in_phase", "quadrature", "amplitude", "noise"):
            np.testing.assert_array_equal(one[name][f], three[name][f])
            np.testing.assert_allclose(short[name][f], one[name][f], rtol=1e-9,
                                       atol=1e-12 * scale)


def test_lockin_reads_the_scene_closed_form_at_a_fixed_distance():
    # Expected: Lambertian beam-filling reflection (REFERENCES row 9) of a 0..A
    # chopped LED, whose fundamental is 2A/pi peak = 0.4502 A rms (row 11,
    # Fourier series, common practice), times the chain's gain at 1370 Hz
    # (scipy.signal.sosfreqz through Chain.response).
    e = Engine(fast_demo(distance_m=0.8, seed=3))
    rows = collect(e, 3.0)
    scene = e.source.scene
    for c in e.chains:
        gain = abs(c.response(np.array([1370.0]))[0])
        expected = scene.signal_rms_fs(0.8) * gain
        got = np.median(rows[c.name]["amplitude"][-20:])
        assert got == pytest.approx(expected, rel=0.01), c.name


def test_record_then_replay_gives_identical_results(tmp_path):
    e = Engine(fast_demo())
    rec = e.start_recording(tmp_path)
    e.add_marker(0.4, "first pot")
    live = collect(e, 1.5)
    run = read_run(rec.folder)
    assert run.raw.shape == (72000, 2) and run.rate_hz == 48000
    assert run.markers[0]["distance_m"] == 0.4 and run.markers[0]["note"] == "first pot"
    assert run.meta["counts"]["dropped_frames"] == 0
    assert run.meta["source_info"]["driver"] == "simulated"
    assert run.meta["config"]["chains"][0]["name"] == "A"
    a = run.chain_rows("A")
    np.testing.assert_allclose(a["amplitude"], live["A"]["amplitude"], rtol=1e-8)
    # the raw file holds exactly what was acquired: replay it through the same engine
    d = demo_config().to_mapping()
    d["source"] = {"driver": "file", "path": str(rec.folder), "pace": "fast"}
    replay = collect(Engine(parse_config(d)), 10.0)
    for name in live:
        np.testing.assert_array_equal(replay[name]["index"], live[name]["index"])
        np.testing.assert_allclose(replay[name]["amplitude"], live[name]["amplitude"], rtol=1e-12)


class BurstSource(Source):
    """A real source that writes faster than any ring holds: forces overruns."""

    driver = "burst"

    def __init__(self):
        self.rate_hz, self.channels, self.channel_names, self.device = 48000.0, 2, ["a", "b"], "burst"

    def start(self, ring):
        x = np.zeros((ring.capacity + 1000, 2), np.float32)
        ring.write(x)  # 1000 frames cannot fit
        ring.close()


def test_overrun_is_counted_reported_and_recorded(tmp_path):
    e = Engine(fast_demo(), source=BurstSource())
    rec = e.start_recording(tmp_path)
    e.run()
    assert e.stats.dropped == 1000 and e.stats.overruns == 1
    run = read_run(rec.folder)
    assert run.meta["counts"]["dropped_frames"] == 1000
    assert run.meta["counts"]["ring_overruns"] == 1


def test_change_chain_applies_at_a_block_boundary():
    e = Engine(fast_demo())
    table = e.chains[0].settings.to_mapping()
    table["stages"][0]["cutoff_hz"] = 500
    e.change_chain(0, table)
    e.run(0.1)
    assert e.chains[0].settings.stages[0].cutoff_hz == 500
    assert e.current_settings().chains[0].stages[0].cutoff_hz == 500


@pytest.mark.parametrize("workers", [1, 2])
def test_a_chain_moved_to_another_input_filters_that_input(workers):
    # reference: scipy.signal.sosfilt with the filter's state carried in (zi),
    # on the column the chain now reads; the filter bank keeps the columns,
    # so the move must reach the bank of the chain's group
    from scipy import signal
    e = Engine(fast_demo(), workers=workers, batch=1)
    data = e.source.generate(0, 256 * 4)
    table = e.chains[1].settings.to_mapping()
    table["input"] = 1  # the LED channel
    seen = []
    e.listeners.append(lambda eng, start, raw, ys, rs: seen.append(
        (raw[:, 1].astype(np.float64), ys[1].copy())))
    f = e.chains[1].filter
    try:
        e.ring.write(data[:256])
        e.step(0)
        e.change_chain(1, table)
        e.ring.write(data[256:512])
        e.step(0)  # the change applies at this block
        zi = f.zi.copy()
        e.ring.write(data[512:768])
        e.step(0)
    finally:
        e.source.stop()
    x, y = seen[-1]
    assert e.chains[1].channel == 1
    np.testing.assert_array_equal(y, signal.sosfilt(f.sos, x, zi=zi)[0])


def test_change_chain_refuses_bad_values_with_the_loader_message():
    from livefilt.errors import SettingError
    e = Engine(fast_demo())
    table = e.chains[1].settings.to_mapping()
    table["stages"][1]["c_farad"] = -1
    with pytest.raises(SettingError, match=r"chains\[1\]\.stages\[1\]\.c_farad"):
        e.change_chain(1, table)
    e.source.stop()


def test_change_reference_applies_to_every_chain_and_is_saved():
    from livefilt.errors import SettingError
    e = Engine(fast_demo())
    with pytest.raises(SettingError, match=r"reference\.frequency_hz = 30000"):
        e.change_reference({"frequency_hz": 30000})
    e.change_reference({"frequency_hz": 1371.5})
    rows = collect(e, 0.5)
    for name in rows:
        assert np.all(rows[name]["ref_hz"] == 1371.5)
    assert e.current_settings().reference.frequency_hz == 1371.5


def test_start_without_a_dc_step_transient():
    # The chains start in the steady state for the first sample (scipy.signal.sosfilt_zi
    # times that level): the high-passed output of a constant input is zero from the
    # first sample on (closed form: a high-pass has zero DC gain).
    class ConstantSource(BurstSource):
        def start(self, ring):
            ring.write(np.full((4800, 2), 0.8, np.float32))
            ring.close()

    e = Engine(fast_demo(), source=ConstantSource())
    outs = []
    e.listeners.append(lambda eng, start, raw, ys, rows: outs.append(ys[0, :len(raw)].copy()))
    e.run()
    assert np.max(np.abs(np.concatenate(outs))) < 1e-9


def test_an_engine_runs_numpys_blas_on_one_thread():
    # BLAS's own worker threads spin between the lock-ins' small products and take
    # the cores from the recorder, the reader and the engine's second worker
    import threadpoolctl
    e = Engine(fast_demo())
    e.source.stop()
    blas = [i for i in threadpoolctl.threadpool_info()
            if i["user_api"] == "blas" and "numpy" in i["filepath"]]
    assert blas and all(i["num_threads"] == 1 for i in blas)
