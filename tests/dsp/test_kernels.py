"""Compiled kernels against scipy.signal and against the straightforward paths.

Reference library: scipy.signal (whole-array sosfilt); the straightforward
numpy/scipy detector path (``exact_path=True``) and the scipy fallback
(``LIVEFILT_NO_JIT=1``) are the references for the compiled detectors.
"""

import logging
import tracemalloc

import numpy as np
import pytest
from scipy import signal

from livefilt.dsp import kernels
from tests.system import require
from livefilt.config import demo_config, parse_config
from livefilt.dsp.detect import DetectorSpec, ReferenceSpec, make_detector
from livefilt.stream.engine import Engine
from livefilt.dsp.sections import FilterBank, SosFilter

FS = 48000.0
require(kernels.compiled() is not None, "numba kernels unavailable (pip install numba)", module_level=True)


def _splits(n, seed):
    rng = np.random.default_rng(seed)
    cuts = np.cumsum(rng.integers(1, 700, size=n // 50))
    return [c for c in cuts if c < n]


def _lockin(exact, **ref):
    ref.setdefault("frequency_hz", 1370.3)
    spec = DetectorSpec.from_mapping({"time_constant_s": 0.005, "slope_db_oct": 24,
                                      "noise_window_s": 0.05}, FS)
    return make_detector(spec, ReferenceSpec.from_mapping(ref, FS, 2), FS, 7, exact_path=exact)


def _feed(det, x, cuts, ref=None):
    rows, i = [], 0
    for j in list(cuts) + [len(x)]:
        rows.append(det.process(x[i:j], i, None if ref is None else ref[i:j]))
        i = j
    return np.concatenate(rows)


N = 24000
_rng = np.random.default_rng(11)
X = 0.4 * np.cos(2 * np.pi * 1370.3 * np.arange(N) / FS + 0.3) + _rng.normal(0, 0.2, N)
REF = np.sign(np.cos(2 * np.pi * 1370.3 * np.arange(N) / FS))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_sos_kernel_equals_whole_array_sosfilt(seed):
    # source: scipy.signal.sosfilt on the whole array (reference library)
    sos = signal.ellip(10, 0.5, 60, [0.05, 0.12], btype="bandpass", output="sos")
    x = np.random.default_rng(seed).standard_normal(5000)
    f = SosFilter(sos)
    got = np.concatenate([f.process(b) for b in np.split(x, _splits(x.size, seed))])
    want = signal.sosfilt(sos, x)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * np.max(np.abs(want)))


@pytest.mark.parametrize("sections", [1, 2, 3, 4, 5, 6, 7, 8, 9, 11])
def test_skewed_sections_are_bit_identical_to_sosfilt_for_every_group_and_block(sections):
    # source: scipy.signal.sosfilt on the whole array (reference library); the
    # kernels run sections in skewed groups of 4 and 2 and must not change a bit,
    # including blocks shorter than a group (1 to 5 samples)
    rng = np.random.default_rng(sections)
    sos = signal.butter(2 * sections, [0.03, 0.3], btype="bandpass", output="sos")[:sections]
    x = rng.standard_normal(3000)
    cuts = np.cumsum(np.r_[1, 2, 3, 4, 5, 1, rng.integers(1, 300, size=20)])
    f = SosFilter(sos)
    got = np.concatenate([f.process(b) for b in np.split(x, cuts[cuts < x.size])])
    np.testing.assert_array_equal(got, signal.sosfilt(sos, x))
    frames = x.reshape(-1, 2).astype(np.float32)
    fa, fb = SosFilter(sos), SosFilter(signal.butter(3, 0.1, output="sos"))
    bank = FilterBank([fa, fb], [1, 0])
    out, ys, i = np.empty((2, 400)), [], 0
    for j in list(cuts[cuts < len(frames)]) + [len(frames)]:
        bank.process(frames[i:j], out)
        ys.append(out[:, :j - i].copy())
        i = j
    y = np.concatenate(ys, axis=1)
    np.testing.assert_array_equal(y[0], signal.sosfilt(sos, frames[:, 1].astype(np.float64)))
    np.testing.assert_array_equal(y[1], signal.sosfilt(fb.sos, frames[:, 0].astype(np.float64)))
    assert fa._last == float(frames[-1, 1]) and fb._last == float(frames[-1, 0])


@pytest.mark.parametrize("sizes", [[8, 2], [2, 8], [10, 6, 1, 3], [4, 2, 2, 4], [6, 6], [2], [3, 7, 2, 11]])
def test_bank_pairs_cascades_and_stays_bit_identical_to_sosfilt(sizes):
    # source: scipy.signal.sosfilt per cascade on the whole array (reference
    # library); the bank's plan runs a cascade's last four sections beside
    # another cascade's two left over, in one loop, and must not change a bit,
    # for blocks shorter than a group (1 to 5 samples) as well
    rng = np.random.default_rng(sum(sizes))
    soses = [signal.butter(2 * k, [0.02 + 0.01 * i, 0.3], btype="bandpass", output="sos")[:k]
             for i, k in enumerate(sizes)]
    cols = rng.integers(0, 3, size=len(sizes))
    frames = rng.standard_normal((5000, 3)).astype(np.float32)
    bank = FilterBank([SosFilter(sos) for sos in soses], cols)
    plan = bank.plan
    nc = plan[0]
    ops = plan[2 * nc + 3:].reshape(-1, 5)
    assert len(ops) == plan[2 * nc + 2]
    # every section in exactly one operation
    covered = []
    for kind, c, first, d, other in ops:
        if kind == kernels.OP_CASCADE:
            covered += range(first, other)
        elif kind == kernels.OP_FOUR_TWO:
            covered += list(range(first, first + 4)) + list(range(other, other + 2))
    assert sorted(covered) == list(range(sum(sizes)))
    cuts = np.cumsum(np.r_[1, 2, 3, 4, 5, rng.integers(1, 3000, size=6)])
    out, ys, i = np.empty((len(sizes), 3000)), [], 0
    for j in list(cuts[cuts < len(frames)]) + [len(frames)]:
        bank.process(frames[i:j], out)
        ys.append(out[:, :j - i].copy())
        i = j
    y = np.concatenate(ys, axis=1)
    for k, (sos, col) in enumerate(zip(soses, cols)):
        np.testing.assert_array_equal(y[k], signal.sosfilt(sos, frames[:, col].astype(np.float64)))


def test_bank_direct_call_equals_the_dispatched_call_and_refuses_another_dtype():
    # source: scipy.signal.sosfilt per cascade on the whole array (reference
    # library); process_frames calls the compiled code without numba's
    # dispatcher (the engine's float32 blocks) and must not change a bit
    k = kernels.compiled()
    assert k.sos_bank_frames is not k.sos_bank  # the direct entry was found
    rng = np.random.default_rng(41)
    soses = [signal.butter(8, [0.01, 0.2], btype="bandpass", output="sos"), signal.butter(2, 0.05, output="sos")]
    frames = rng.standard_normal((3000, 2)).astype(np.float32)
    direct = FilterBank([SosFilter(s) for s in soses], [1, 0])
    dispatched = FilterBank([SosFilter(s) for s in soses], [1, 0])
    a, b = np.empty((2, 64)), np.empty((2, 64))
    ya, yb = [], []
    for i in range(0, 3000, 64):
        ya.append(direct.process_frames(frames[i:i + 64], a)[:, :len(frames[i:i + 64])].copy())
        yb.append(dispatched.process(frames[i:i + 64], b)[:, :len(frames[i:i + 64])].copy())
    ya, yb = np.concatenate(ya, axis=1), np.concatenate(yb, axis=1)
    np.testing.assert_array_equal(ya, yb)
    np.testing.assert_array_equal(ya[0], signal.sosfilt(soses[0], frames[:, 1].astype(np.float64)))
    with pytest.raises(TypeError):  # numba's own wrapper still checks the dtype
        direct.process_frames(frames.astype(np.float64), a)


def test_bank_pairs_a_two_section_chain_with_another_chains_four():
    # the demo's chains (8 and 2 sections): B's two sections run beside A's
    # last four; a cascade is in one pair at most
    plan = kernels.bank_plan([8, 2], [0, 0])
    ops = plan[7:].reshape(-1, 5)
    assert [tuple(op) for op in ops if op[0] == kernels.OP_FOUR_TWO] == [(kernels.OP_FOUR_TWO, 0, 4, 1, 8)]
    plan = kernels.bank_plan([2, 2, 2], [0, 0, 0])  # no cascade with four: no pair
    assert kernels.OP_FOUR_TWO not in plan[9:].reshape(-1, 5)[:, 0]


def test_bank_refuses_a_channel_list_that_does_not_fit():
    with pytest.raises(ValueError, match="one column index >= 0 per filter"):
        FilterBank([SosFilter(signal.butter(2, 0.1, output="sos"))], [0, 1])
    with pytest.raises(ValueError, match="one column index >= 0 per filter"):
        FilterBank([SosFilter(signal.butter(2, 0.1, output="sos"))], [-1])


def test_sos_kernel_writes_strided_out_and_keeps_state_arrays():
    sos = signal.butter(4, 0.1, output="sos")
    x = np.random.default_rng(4).standard_normal(300)
    f = SosFilter(sos)
    zi = f.zi
    out = np.zeros((300, 2))[:, 0]  # strided
    y = f.process(x, out=out)
    assert np.shares_memory(y, out) and f.zi is zi
    np.testing.assert_allclose(out, signal.sosfilt(sos, x), rtol=1e-12, atol=1e-15)


def test_filter_bank_equals_sosfilt_per_chain_and_repacks_after_retune():
    # source: scipy.signal.sosfilt per column (reference library)
    a = signal.butter(6, [0.02, 0.05], btype="bandpass", output="sos")
    b = signal.butter(2, 0.2, output="sos")
    frames = np.random.default_rng(5).standard_normal((6000, 2)).astype(np.float32)
    fa, fb = SosFilter(a), SosFilter(b)
    bank = FilterBank([fa, fb], [1, 0])
    out = np.empty((2, 6000))
    for i in range(0, 6000, 256):
        bank.process(frames[i:i + 256], out[:, i:i + 256])
    x1, x0 = frames[:, 1].astype(np.float64), frames[:, 0].astype(np.float64)
    np.testing.assert_allclose(out[0], signal.sosfilt(a, x1), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(out[1], signal.sosfilt(b, x0), rtol=1e-12, atol=1e-14)
    # a retune to more sections reallocates the filter's arrays: the bank packs again
    fb.retune(signal.butter(6, 0.2, output="sos"))
    state = fb.zi.copy()
    more = frames[:500]
    bank.process(more, out)
    ref = SosFilter(fb.sos)
    ref.zi[...] = state
    np.testing.assert_allclose(out[1, :500], ref.process(more[:, 0]), rtol=1e-12, atol=1e-14)
    assert np.shares_memory(fb.zi, bank.packed) and np.shares_memory(fa.sos, bank.packed)


@pytest.mark.parametrize("measured", [False, True])
def test_lockin_compiled_equals_straightforward(measured):
    # reference: the straightforward full-rate numpy/scipy path (exact_path=True)
    ref_kw = {"channel": 1} if measured else {}
    cuts = _splits(N, 8)
    fast = _feed(_lockin(False, **ref_kw), X, cuts, REF)
    exact = _feed(_lockin(True, **ref_kw), X, cuts, REF)
    scale = np.max(np.abs(exact["amplitude"]))
    np.testing.assert_array_equal(fast["index"], exact["index"])
    np.testing.assert_array_equal(fast["locked"], exact["locked"])
    for name in ("in_phase", "quadrature", "amplitude", "noise"):
        np.testing.assert_allclose(fast[name], exact[name], rtol=1e-9, atol=1e-9 * scale,
                                   equal_nan=True)


@pytest.mark.parametrize("offset_hz", [0.0, 3.0])
def test_compiled_readout_equals_numpy_readout(offset_hz):
    # reference: LockIn._readout (numpy, the read-out of the straightforward path) fed
    # the same I and Q rows: every column, through the settling rows, several noise
    # windows (the sums recomputed at each window boundary) and, with the signal
    # 3 Hz off the reference, the phase slope, its uncertainty and the drift flag
    fs, every = 48000.0, 48
    spec = DetectorSpec.from_mapping({"time_constant_s": 0.01, "slope_db_oct": 12,
                                      "noise_window_s": 0.5}, fs)
    ref = ReferenceSpec.from_mapping({"frequency_hz": 1370.0}, fs, 1)
    a, b = make_detector(spec, ref, fs, every), make_detector(spec, ref, fs, every)
    rng = np.random.default_rng(1057)
    m = 3000  # rows; the window holds 500
    t = np.arange(m) * every / fs
    z = 0.3 * np.exp(2j * np.pi * offset_hz * t + 0.4j) + rng.normal(0, 0.02, m) + 1j * rng.normal(0, 0.02, m)
    z[:30] *= np.linspace(0, 1, 30)  # a rise from zero, as at a start
    got, want = [], []
    for lo, hi in ((0, 7), (7, 333), (333, 334), (334, 2001), (2001, 3000)):
        i, q = z.real[lo:hi].copy(), z.imag[lo:hi].copy()
        got.append(a._readout_compiled(lo * every, i, q))
        want.append(b._readout(lo * every, i, q, 1370.0, None))
    got, want = np.concatenate(got), np.concatenate(want)
    assert np.isnan(want["noise"][:5]).all() and np.isfinite(want["noise"][-500:]).all()
    for name in want.dtype.names:
        if want.dtype[name].kind == "f":
            # the phase slope is a difference of window sums of row numbers and phases
            # in the thousands: its rounding is absolute (1e-13 Hz seen), not relative
            atol = 1e-12 if name.startswith("offset") else 1e-15
            np.testing.assert_allclose(got[name], want[name], rtol=1e-12, atol=atol,
                                       equal_nan=True, err_msg=name)
        else:
            np.testing.assert_array_equal(got[name], want[name], err_msg=name)
    assert (~want["locked"]).any() == (offset_hz > 0)  # 3 Hz off reads as drift, in places


def test_rms_compiled_equals_straightforward():
    spec = DetectorSpec.from_mapping({"type": "rms", "time_constant_s": 0.002,
                                      "noise_window_s": 0.05}, FS)
    cuts = _splits(N, 9)
    fast = _feed(make_detector(spec, None, FS, 5), X, cuts)
    exact = _feed(make_detector(spec, None, FS, 5, exact_path=True), X, cuts)
    for name in ("amplitude", "noise", "snr_db"):
        np.testing.assert_allclose(fast[name], exact[name], rtol=1e-9, atol=1e-12, equal_nan=True)


def test_compiled_lockin_rows_do_not_depend_on_block_split():
    # the phasor is anchored to the sample index (the same bits for any
    # split); the output low-pass takes a block's complete segments as one
    # matrix product and a segment cut by a block edge alone, so rows agree
    # to the last bits or so (1e-15 relative seen), not bit for bit
    one = _lockin(False).process(X, 0)
    split = _feed(_lockin(False), X, _splits(N, 10))
    np.testing.assert_array_equal(one["index"], split["index"])
    scale = np.max(np.abs(one["amplitude"]))
    for name in ("in_phase", "quadrature"):
        np.testing.assert_allclose(split[name], one[name], rtol=0, atol=1e-13 * scale)


def test_lockins_sharing_a_threads_mixer_array_read_as_they_do_alone():
    # every lock-in on a thread mixes into that thread's one array: lock-ins
    # interleaved block by block, and two threads at once, give the rows
    # each gives alone, bit for bit
    import threading
    x2 = X[::-1].copy()
    alone = [_feed(_lockin(False), X, range(512, N, 512)),
             _feed(_lockin(False, frequency_hz=911.0), x2, range(512, N, 512))]
    alone64 = [_feed(_lockin(False), X, range(64, N, 64)),
               _feed(_lockin(False, frequency_hz=911.0), x2, range(64, N, 64))]
    mixed = [_lockin(False), _lockin(False, frequency_hz=911.0)]
    got = [[], []]
    for i in range(0, N, 512):
        for k, x in enumerate((X, x2)):
            got[k].append(mixed[k].process(x[i:i + 512], i))
    def same(a, b):  # field by field: a structured comparison counts NaN (no noise yet) as unequal
        for name in b.dtype.names:
            np.testing.assert_array_equal(a[name], b[name], err_msg=name)

    for k in range(2):
        same(np.concatenate(got[k]), alone[k])
    out = [None, None]

    def run(k, x, hz):  # short blocks: many calls, so the threads overlap
        det = _lockin(False, frequency_hz=hz)
        out[k] = _feed(det, x, range(64, N, 64))

    threads = [threading.Thread(target=run, args=a) for a in ((0, X, 1370.3), (1, x2, 911.0))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for k in range(2):
        same(out[k], alone64[k])


@pytest.mark.parametrize("every, block, n", [
    (1, 1, 3000), (3, 97, 20000), (2400, 1, 5300), (2400, 97, 30000), (2400, 4096, 60000),
    (2400, 65536, 200000), (20000, 97, 50000), (20000, 4096, 100000), (16411 * 2, 65536, 140000)])
def test_row_lowpass_equals_sample_by_sample_sections(every, block, n):
    # reference: the straightforward path (scipy.signal.lfilter through every
    # sample); row intervals of one sample, of a whole segment (2400), of two
    # segments (20000 = 2 x 10000) and of many short ones (2 x a prime above
    # the longest segment: 2-sample segments)
    fs = 192000.0
    spec = DetectorSpec.from_mapping({"time_constant_s": 0.01, "slope_db_oct": 24,
                                      "noise_window_s": 0.5}, fs)
    ref = ReferenceSpec.from_mapping({"frequency_hz": 1370.3}, fs, 1)
    x = np.cos(2 * np.pi * 1370.3 * np.arange(n) / fs + 0.3) + np.random.default_rng(7).normal(0, 0.5, n)
    cuts = list(range(block, n, block))
    fast = _feed(make_detector(spec, ref, fs, every), x, cuts)
    exact = _feed(make_detector(spec, ref, fs, every, exact_path=True), x, cuts)
    np.testing.assert_array_equal(fast["index"], exact["index"])
    scale = np.max(np.abs(exact["amplitude"]))
    for name in ("in_phase", "quadrature"):
        np.testing.assert_allclose(fast[name], exact[name], rtol=0, atol=1e-11 * scale)


def test_row_lowpass_keeps_its_state_across_a_gap():
    # reference: the straightforward path, whose lfilter state is simply kept
    fast, exact = _lockin(False), _lockin(True)
    a, b, lost = 10003, 10003 + 4321, 777
    rows = []
    for det in (fast, exact):
        r1 = det.process(X[:a], 0)
        det.note_gap(lost)
        r2 = det.process(X[a:b], a + lost)
        rows.append(np.concatenate([r1, r2]))
    np.testing.assert_array_equal(rows[0]["index"], rows[1]["index"])
    scale = np.max(np.abs(rows[1]["amplitude"]))
    for name in ("in_phase", "quadrature"):
        np.testing.assert_allclose(rows[0][name], rows[1][name], rtol=0, atol=1e-11 * scale)


def test_no_jit_env_selects_scipy_path_with_one_warning(monkeypatch, caplog):
    monkeypatch.setenv(kernels.NO_JIT_ENV, "1")
    monkeypatch.setitem(kernels._state, "warned", False)
    with caplog.at_level(logging.WARNING, logger="livefilt.dsp.kernels"):
        assert kernels.compiled() is None
        f = SosFilter(signal.butter(2, 0.1, output="sos"))
        assert kernels.compiled() is None
    assert f._kernel is None and _lockin(False)._kern is None
    assert sum("scipy path" in r.message for r in caplog.records) == 1


def _demo(block=256):
    d = demo_config().to_mapping()
    d["source"].update(pace="fast", block=block, rate_hz=96000)
    return parse_config(d)


def _engine_rows(duration):
    e = Engine(_demo())
    rows = {c.name: [] for c in e.chains}
    e.listeners.append(lambda eng, s, raw, ys, rs: [rows[c.name].append(r)
                                                    for c, r in zip(eng.chains, rs)])
    e.run(duration)
    return {k: np.concatenate(v) for k, v in rows.items()}


def test_engine_compiled_equals_scipy_fallback(monkeypatch):
    # reference: the same engine on the scipy fallback (LIVEFILT_NO_JIT=1)
    fast = _engine_rows(1.0)
    monkeypatch.setenv(kernels.NO_JIT_ENV, "1")
    slow = _engine_rows(1.0)
    for name in fast:
        scale = np.max(np.abs(slow[name]["amplitude"]))
        for f in ("in_phase", "quadrature", "amplitude"):
            np.testing.assert_allclose(fast[name][f], slow[name][f], rtol=1e-9, atol=1e-9 * scale)


def test_steady_state_blocks_allocate_no_block_sized_buffers():
    e = Engine(_demo(), batch=1)
    data = e.source.generate(0, 256 * 300)
    try:
        for i in range(300):
            e.ring.write(data[i * 256:(i + 1) * 256])
            if i == 100:
                tracemalloc.start()
                peaks = []
            if i > 100:
                before = tracemalloc.get_traced_memory()[0]
                tracemalloc.reset_peak()
            e.step(0)
            if i > 100:
                peaks.append(tracemalloc.get_traced_memory()[1] - before)
        tracemalloc.stop()
    finally:
        e.source.stop()
    # a block of samples is 2 KiB in float64: no step may allocate one
    assert np.median(peaks) < 2048
    assert max(peaks) < 64 * 1024  # blocks with rows: small row arrays only


def test_row_lowpass_steps_the_same_without_the_compiled_stepper():
    # the numpy loop over segments (numba missing) against the compiled one
    from livefilt.dsp.segments import RowLowpass

    u = np.random.default_rng(3).standard_normal((2, 50000))
    got = []
    for compiled in (True, False):
        lp = RowLowpass(0.01, 0.01, -0.98, 4, 2, 2400)
        if not compiled:
            lp._steps = None
        rows = [lp.process(u[:, a:b], a)[0] for a, b in ((0, 3001), (3001, 40000), (40000, 50000))]
        got.append(np.concatenate(rows, axis=1))
    assert got[0].shape == (2, 21)
    np.testing.assert_allclose(got[1], got[0], rtol=1e-13, atol=1e-15)


def test_readout_kernel_is_ready_before_the_first_block():
    # warmed with the real calls' argument types when the lock-in is built: a
    # compile at the first block stalled a live source (frames dropped) on a fresh install
    engine = Engine(demo_config())
    before = len(kernels.lockin_readout.signatures)
    assert before >= 1
    engine.run(2.0)
    assert len(kernels.lockin_readout.signatures) == before
