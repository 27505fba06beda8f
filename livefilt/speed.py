"""``livefilt speed``: does this machine keep up with this config?

API map
-------
- :func:`run_speed` (the CLI entry): measures, prints the table, optionally
  writes it as JSON; returns the exit status (0; a missed target is a
  result, not an error).
- :func:`measure` returns the rows (list of dict) without printing.

Measures (each row: measure, value, unit, target, pass)
-------------------------------------------------------
- ``startup``: a fresh interpreter imports livefilt, loads the compiled
  kernels from the cache, builds the engine on the simulated bench and
  processes its first block (s; target < 1).  Run twice, the second timed,
  so the first fills the cache: this is the warm-cache start-up and it
  includes any JIT compile; the timings below exclude it (warm-up runs).
- ``filter ratio``: at every block size in :data:`BLOCKS`, the throughput
  of the engine's filter stage (:class:`~livefilt.dsp.sections.FilterBank`:
  every chain on 2-channel float32 frames, one call per block, as the
  engine runs it) divided by that of scipy's whole-array ``sosfilt`` on
  the same samples, chain after chain, timed alternately in the same run
  (median of the repetitions; targets >= 0.8 at 64 and >= 1.0 at 256).
- ``filter exactness``: the filter stage against whole-array ``sosfilt``, largest
  difference relative to the largest output (target <= 1e-12).
- ``lock-in exactness``: compiled lock-in against ``exact_path=True`` on
  the chain's output of simulated bench data, largest I/Q difference
  relative to the largest amplitude (target <= 1e-9).
- ``pipeline``: the engine on a float32 recording of the simulated bench
  (photodiode + LED channels) at pace "fast", all chains, recorder writing
  to a temporary folder, headless: acquired time / engine processing time (the engine's
  own time, as a core would see it), that factor divided by whole-array
  ``sosfilt``'s on the same sections and as many samples, timed in the same
  repetition (target >= 0.6: everything around the filters costs less than
  the filters' own limit), and acquired time / wall time (information: it
  includes the file driver reading the recording on another thread).
- ``allocations``: traced Python heap (tracemalloc) per engine block in
  steady state (ring read, every chain, no recorder): median peak bytes
  above the level before the block (target: below one block of samples,
  8 bytes x block, i.e. no block-sized buffer); the net growth over all
  blocks is shown beside it (objects replaced, such as the latest rows;
  the memory row checks that nothing accumulates).
- ``memory``: resident set growth over a simulated hour at the config's
  rate processed as fast as possible, recorder on (MB; target < 5).  With
  ``--quick`` the run is scaled down to 60 s and the row says so.

Timings are medians of several repetitions with warm-up; compare ratios,
which are taken within one run, rather than absolute rates on a shared
machine.
"""

from __future__ import annotations

import json
import logging
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc

import numpy as np
from scipy import signal

from livefilt.config import demo_config, load_config, parse_config
from livefilt.dsp.design import chain_sos
from livefilt.dsp.detect import make_detector
from livefilt.stream.engine import Engine, build_source
from livefilt.dsp.sections import FilterBank, SosFilter

__all__ = ["run_speed", "measure", "channel_rows", "BLOCKS"]

log = logging.getLogger(__name__)

#: Block sizes of the filter-ratio measure, samples.
BLOCKS = (64, 256, 1024, 4096)
_RATIO_TARGETS = {64: 0.8, 256: 1.0}
_DEMO_RATES = (48000.0, 192000.0)


def run_speed(args) -> int:
    """Measure, print the table, write JSON when ``args.json`` is set."""
    settings = load_config(args.config) if getattr(args, "config", None) else None
    quick = bool(getattr(args, "quick", False))
    rows = measure(settings, quick)
    if getattr(args, "channels", None):
        rows += channel_rows(int(args.channels), quick)
    if getattr(args, "window_bench", None) is not None:
        rows += window_rows(args.window_bench, quick)
    print(_table(rows))
    missed = [r for r in rows if r["pass"] is False]
    print(f"{len(missed)} target(s) missed" if missed else "every target met")
    if getattr(args, "json", None):
        doc = {"livefilt_speed": 1, "quick": quick, "config": getattr(args, "config", None),
               "machine": {"python": platform.python_version(), "cpus": os.cpu_count(),
                           "platform": platform.platform(), "numpy": np.__version__},
               "all_met": not missed, "measures": rows}
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(doc, f, indent=2, allow_nan=False, default=_plain)
    return 0


def measure(settings=None, quick: bool = False) -> list[dict]:
    """Every measure for ``settings`` (None: the demo chains at 48 and 192 kHz)."""
    variants = ([settings] if settings is not None
                else [_with_rate(demo_config(), rate) for rate in _DEMO_RATES])
    benches = [_bench(s) for s in variants]
    rows = [_startup(benches[-1])]
    for bench in benches:
        rows += _filter_rows(bench, quick)
        rows.append(_lockin_exactness(bench, quick))
    for bench in benches:
        rows += _pipeline(bench, quick)
    rows.append(_allocations(benches[-1]))
    rows += _memory(benches[0] if settings is None else benches[-1], quick)
    return rows


def window_rows(measure_window, quick: bool = False) -> list[dict]:
    """The live window's figures: frame rate and drawing CPU with a 10 s strip at
    192 kHz and both chains, and sample-to-screen latency at 48 kHz with
    256-sample blocks.  ``measure_window`` is ``livefilt.window.bench.measure_window``
    (passed in by the CLI, so this module never imports Qt)."""
    seconds, runs = (4.0, 1) if quick else (8.0, 3)
    # measured once the 10 s strip is full and scrolling (warm-up longer than
    # the strip): the steady load, about twice what a strip still filling costs
    warm = 11.0
    # the median run by drawing CPU (a shared machine swings a few points)
    fast_runs = sorted((measure_window(seconds, 192000.0, block=256, strip_s=10.0, warmup_s=warm)
                        for _ in range(runs)), key=lambda r: r["cpu_fraction"])
    fast = fast_runs[len(fast_runs) // 2]
    slow = measure_window(seconds, 48000.0, block=256, strip_s=10.0, warmup_s=warm)
    return [
        _row("window at 192 kHz, 10 s strip, chains A and B: frames per second", fast["fps"], "fps",
             ">= 30", fast["fps"] >= 30),
        _row(f"window at 192 kHz, 10 s strip full and scrolling: drawing CPU, share of one core "
             f"(median of {runs})",
             100 * fast["cpu_fraction"],
             "%", "< 15", fast["cpu_fraction"] < 0.15),
        _row("window at 192 kHz: samples dropped while drawing", fast["dropped"], "", "0",
             fast["dropped"] == 0),
        _row("window at 48 kHz, 256-sample blocks: sample-to-screen latency, mean", slow["latency_ms"],
             "ms", "<= 50", slow["latency_ms"] <= 50),
        _row("window at 48 kHz, 256-sample blocks: sample-to-screen latency, 95th percentile",
             slow["latency_p95_ms"], "ms", "-", None),
    ]


def channel_rows(channels: int, quick: bool = False) -> list[dict]:
    """Many inputs: ``channels`` inputs at 192 kHz from a float32 recording
    (pace fast), the demo's chains A and B on each (2 x ``channels`` chains),
    no recorder.  The engine's processing real-time factor with every chain on
    one thread (target >= 4 at 8 inputs), then with the chains spread over
    the machine's cores (:class:`~livefilt.stream.engine.Engine` ``workers``):
    the speed-up over one thread (target >= 0.7 x cores), both timed in the
    same run, alternately."""
    import soundfile  # only here: the other measures need no audio library

    fs, cores = 192000.0, max(1, min(os.cpu_count() or 1, 2 * channels))
    seconds = 4.0 if quick else 8.0
    base = demo_config().to_mapping()
    n = int(fs * seconds)
    bench = _with_rate(demo_config(), fs)
    pd = _bench_samples(_bench(bench), n)[:, 0]
    rng = np.random.default_rng(1057)
    frames = (pd[:, None] + rng.normal(0.0, 1e-3, (n, channels))).astype(np.float32)
    chains = [dict(c, name=f"{c['name']}{i + 1}", input=i) for i in range(channels) for c in base["chains"]]
    reps = 3  # alternating; a run costs well under a second, a single one swings 1.1-1.9
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "inputs.wav")
        soundfile.write(path, frames, int(fs), subtype="FLOAT")
        del frames
        doc = dict(base, chains=chains,
                   source={"driver": "file", "path": path, "pace": "fast", "rate_hz": fs,
                           "block": base["source"]["block"]})
        settings = parse_config(doc, demo_config().origin)
        factors = {1: [], cores: []}
        for _ in range(reps):
            for workers in sorted(factors):
                engine = Engine(settings, workers=workers)
                engine.run()
                if engine.error is not None:
                    raise engine.error
                factors[workers].append(engine.stats.frames / fs / engine.stats.busy_s)
    one = statistics.median(factors[1])
    what = f"{channels} inputs x 192 kHz, chains A and B on each ({len(chains)} chains, recorder off)"
    rows = [_row(f"{what}: real-time factor, one thread", one, "x", ">= 4", one >= 4.0)]
    if cores > 1:
        gain = statistics.median(b / a for a, b in zip(factors[1], factors[cores]))
        need = 0.7 * cores
        rows.append(_row(f"{what}: speed-up with the chains spread over {cores} threads "
                         f"(cores {os.cpu_count()})", gain, "x", f">= {need:g}", gain >= need,
                         factor=statistics.median(factors[cores])))
    return rows


# -- measures ---------------------------------------------------------------
def _startup(bench) -> dict:
    """Launch of a fresh interpreter to the end of its first processed block.

    The child prints the wall-clock time when its first block is done; the
    interpreter's exit (tearing down scipy and numba, about 0.4 s here) is
    not start-up and is not counted.
    """
    code = ("import sys, json, time; from livefilt.config import parse_config; "
            "from livefilt.stream.engine import Engine; "
            "e = Engine(parse_config(json.loads(sys.argv[1]))); e.run(e.block / e.rate_hz); "
            "print(repr(time.time()))")
    cmd = [sys.executable, "-c", code, json.dumps(bench.to_mapping())]
    took = []
    for _ in range(3):  # the first fills the kernel cache
        t0 = time.time()
        done = subprocess.run(cmd, check=True, capture_output=True, text=True)
        took.append(float(done.stdout.strip().splitlines()[-1]) - t0)
    best = min(took[1:])
    return _row("start-up to first block, warm cache (launch to first processed block, best of 2)", best, "s",
                "< 1", best < 1.0)


def _filter_rows(bench, quick: bool) -> list[dict]:
    fs = bench.source.rate_hz
    n = 2 ** 17 if quick else 2 ** 19
    reps = 3 if quick else 7
    frames = np.random.default_rng(1057).standard_normal((n, 2)).astype(np.float32)
    inputs = np.array([c.input if isinstance(c.input, int) else 0 for c in bench.chains],
                      dtype=np.int64)
    soses = [chain_sos(c.stages, fs) for c in bench.chains]
    columns = [frames[:, i].astype(np.float64) for i in inputs]
    want = np.array([signal.sosfilt(sos, x) for sos, x in zip(soses, columns)])
    bank = FilterBank([SosFilter(sos) for sos in soses], inputs)
    y = np.empty((len(soses), n))
    y_block = np.empty((len(soses), 256))
    label = (f"filter stage at {fs / 1000:g} kHz, chains "
             + " + ".join(f"{c.name} ({sos.shape[0]})" for c, sos in zip(bench.chains, soses))
             + " sections")
    rows = []
    # exactness: every block's output kept
    for f in bank.filters:
        f.reset()
    for i in range(0, n, 256):
        y[:, i:i + 256] = bank.process_frames(frames[i:i + 256], y_block)[:, :min(256, n - i)]
    for block in BLOCKS:
        out = np.empty((len(soses), block))  # preallocated once, as the engine does

        def blocks(block=block, out=out):
            for f in bank.filters:
                f.reset()
            for i in range(0, n, block):
                bank.process_frames(frames[i:i + block], out)

        def whole():
            for sos, x in zip(soses, columns):
                signal.sosfilt(sos, x)

        t_whole, t_block = _alternate(whole, blocks, reps)
        ratio = t_whole / t_block
        target = _RATIO_TARGETS.get(block)
        rows.append(_row(f"{label}: {block}-sample blocks / whole-array sosfilt", ratio, "x",
                         f">= {target}" if target else "-",
                         None if target is None else ratio >= target,
                         samples_per_s=n / t_block))
    err = float(np.max(np.abs(y - want)) / np.max(np.abs(want)))
    rows.append(_row(f"{label}: blocks vs whole-array sosfilt, relative difference", err,
                     "", "<= 1e-12", err <= 1e-12))
    return rows


def _lockin_exactness(bench, quick: bool) -> dict:
    fs = bench.source.rate_hz
    chain = bench.chains[0]
    n = int(fs * (0.5 if quick else 2.0))
    x = _bench_samples(bench, n)[:, chain.input if isinstance(chain.input, int) else 0]
    y = signal.sosfilt(chain_sos(chain.stages, fs), x.astype(np.float64))
    every = max(1, int(round(bench.output.interval_s * fs / 10)))  # 10x the rows: more to compare
    got = []
    for exact in (False, True):
        det = make_detector(chain.detector, bench.reference, fs, every, exact_path=exact)
        got.append(np.concatenate([det.process(y[i:i + 256], i) for i in range(0, n, 256)]))
    fast, ref = got
    scale = np.max(np.abs(ref["amplitude"]))
    err = max(float(np.max(np.abs(fast[k] - ref[k]))) for k in ("in_phase", "quadrature")) / scale
    return _row(f"{chain.detector.type} of chain {chain.name} at {fs / 1000:g} kHz: "
                "compiled vs straightforward, relative difference", err, "", "<= 1e-9",
                err <= 1e-9)


def _pipeline(bench, quick: bool) -> list[dict]:
    """The whole engine on a recording of the simulated bench (float32 WAV,
    pace fast), recorder on: its processing time against whole-array
    ``sosfilt`` on the same sections and as many samples, timed in the same
    repetition.  A recording rather than the live simulator, so that
    making the samples does not compete with the engine for the cores."""
    import soundfile  # only here: the other measures need no audio library

    fs = bench.source.rate_hz
    # many of the engine's long steps (1 << 18 frames) even at 48 kHz, so the
    # first step's one-off work (settling, the noise tables) weighs little
    seconds = 60.0 if quick else 120.0
    busy, wall, limit = [], [], []
    soses = [chain_sos(c.stages, fs) for c in bench.chains]
    columns = np.random.default_rng(1241).standard_normal((len(soses), int(seconds * fs)))
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "bench.wav")
        soundfile.write(path, _bench_samples(bench, int(seconds * fs)), int(fs), subtype="FLOAT")
        doc = bench.to_mapping()
        doc["source"] = {"driver": "file", "path": path, "pace": "fast", "rate_hz": fs,
                         "block": bench.source.block}
        settings = parse_config(doc, bench.origin)
        for _ in range(2 if quick else 3):
            engine = Engine(settings)
            engine.start_recording(os.path.join(tmp, "runs"))
            t0 = time.perf_counter()
            engine.run()
            wall.append(time.perf_counter() - t0)
            if engine.error is not None:
                raise engine.error
            acquired = engine.stats.frames / fs
            busy.append(acquired / engine.stats.busy_s)
            wall[-1] = acquired / wall[-1]
            # the filter limit, timed in the same repetition: whole-array sosfilt
            # on the same sections and as many samples, chain after chain
            t0 = time.perf_counter()
            for sos, x in zip(soses, columns):
                signal.sosfilt(sos, x)
            limit.append(seconds / (time.perf_counter() - t0))
    what = (f"pipeline at {fs / 1000:g} kHz ({len(bench.chains)} chains, "
            f"{bench.source.block}-sample blocks, recording in, recorder on)")
    factor = statistics.median(busy)
    ratio = statistics.median(b / lim for b, lim in zip(busy, limit))
    return [_row(f"{what}: real-time factor, engine processing", factor, "x", "-", None),
            _row(f"{what}: engine processing / whole-array sosfilt of the same sections",
                 ratio, "x", ">= 0.6", ratio >= 0.6, sosfilt_factor=statistics.median(limit)),
            _row(f"{what}: real-time factor, wall (file reading included)",
                 statistics.median(wall), "x", "-", None)]


def _allocations(bench) -> dict:
    engine = Engine(bench, batch=1)
    block = engine.block
    n_blocks = 400
    data = _bench_samples(bench, block * (n_blocks + 100))
    try:
        for i in range(100):  # warm-up: buffers sized, noise windows growing
            engine.ring.write(data[i * block:(i + 1) * block])
            engine.step(0)
        tracemalloc.start()
        start = tracemalloc.get_traced_memory()[0]
        peaks = []
        for i in range(100, 100 + n_blocks):
            engine.ring.write(data[i * block:(i + 1) * block])
            before = tracemalloc.get_traced_memory()[0]
            tracemalloc.reset_peak()
            engine.step(0)
            peaks.append(tracemalloc.get_traced_memory()[1] - before)
        growth = tracemalloc.get_traced_memory()[0] - start
        tracemalloc.stop()
    finally:
        engine.source.stop()
    median = float(statistics.median(peaks))
    bound = 8 * block
    # Below one block of float64 samples (8 B x block) no sample buffer was
    # allocated: what remains are small Python objects (the ring's Block
    # record, numpy views, the detector's row records).
    return _row(f"allocations per {block}-sample block at {engine.rate_hz / 1000:g} kHz, median peak "
                f"(no sample buffer below {bound} B: small objects only; net growth {growth} B "
                f"over {n_blocks} blocks)", median, "B",
                f"< {bound}", median < bound,
                growth_bytes=int(growth), max_peak_bytes=int(max(peaks)))


def _memory(bench, quick: bool) -> list[dict]:
    """Resident memory over a fast simulated run with the recorder on: its
    growth (the median of the last tenth of the samples minus the median of
    the first tenth after the warm-up: what a leak adds) and, for the record,
    the highest rise above that baseline (a recorder queue backing up while its
    thread waits for a core, bounded by the queue's budget).  The warm-up: the
    first 5 % of the run, or the longest noise window and two engine steps if
    later (at 48 kHz a step is 5.5 s of data and the demo's window 7.5 s)."""
    fs = bench.source.rate_hz
    seconds = 60.0 if quick else 3600.0
    engine = Engine(bench)
    windows = [c.detector.window_rows * c.detector.output_every / fs for c in engine.chains]
    warm_s = max(0.05 * seconds, max(windows, default=0.0) + 2 * engine.block * engine.batch / fs)
    samples = []
    with tempfile.TemporaryDirectory() as tmp:
        engine.start_recording(tmp)
        engine.start(seconds)
        while not engine.finished.wait(0.1):
            samples.append((engine.stats.index, _rss_bytes()))
        engine.stop()
    samples.append((engine.stats.index, _rss_bytes()))
    if engine.error is not None:
        raise engine.error
    warm = [rss for index, rss in samples if index >= warm_s * fs] or [samples[-1][1]]
    tenth = max(1, len(warm) // 10)
    base = statistics.median(warm[:tenth])
    growth = (statistics.median(warm[-tenth:]) - base) / 1e6
    peak = (max(warm) - base) / 1e6
    what = (f"resident memory, {seconds:g} s simulated at {fs / 1000:g} kHz as fast as possible, "
            f"recorder on{' (--quick: 60 s, not 1 h)' if quick else ''}, after {warm_s:.0f} s")
    return [_row(f"{what}: growth", growth, "MB", "< 5", growth < 5.0),
            _row(f"{what}: highest rise above the start (transient)", peak, "MB", "-", None)]


# -- private helpers --------------------------------------------------------
def _with_rate(settings, rate: float):
    doc = settings.to_mapping()
    doc["source"]["rate_hz"] = rate
    return parse_config(doc, settings.origin)


def _bench(settings):
    """The settings on the simulated bench at the same rate and block, pace fast."""
    doc = settings.to_mapping()
    src = settings.source
    doc["source"] = {"driver": "simulated", "rate_hz": src.rate_hz, "block": src.block,
                     "pace": "fast"}
    ref = settings.reference
    if ref is not None and ref.frequency_hz is not None and ref.frequency_hz < src.rate_hz / 4:
        doc["source"]["led_hz"] = ref.frequency_hz
    return parse_config(doc, settings.origin)


def _bench_samples(bench, n: int) -> np.ndarray:
    """``n`` frames of the simulated bench (photodiode, LED), float32."""
    return build_source(bench).generate(0, n)


def _alternate(first, second, reps: int) -> tuple[float, float]:
    """Median times of two functions run alternately after one warm-up each."""
    first(), second()
    a, b = [], []
    for _ in range(reps):
        for fn, out in ((first, a), (second, b)):
            t0 = time.perf_counter()
            fn()
            out.append(time.perf_counter() - t0)
    return statistics.median(a), statistics.median(b)


def _rss_bytes() -> int:
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except OSError:  # not Linux: peak resident size instead
        import resource
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        return peak if sys.platform == "darwin" else peak * 1024


def _row(measure: str, value: float, unit: str, target: str, ok, **extra) -> dict:
    row = {"measure": measure, "value": float(value), "unit": unit, "target": target,
           "pass": ok if ok is None else bool(ok)}
    row.update(extra)
    return row


def _table(rows: list[dict]) -> str:
    def fmt(r):
        v = r["value"]
        text = f"{v:.3g}" if (abs(v) < 1e-3 or abs(v) >= 1e4) and v != 0 else f"{v:.3f}"
        return f"{text} {r['unit']}".strip()

    cells = [(r["measure"], fmt(r), r["target"],
              "-" if r["pass"] is None else ("pass" if r["pass"] else "FAIL")) for r in rows]
    head = ("measure", "value", "target", "result")
    widths = [max(len(c[i]) for c in cells + [head]) for i in range(4)]
    line = "  ".join("{:<%d}" % w for w in widths)
    out = [line.format(*head), line.format(*("-" * w for w in widths))]
    out += [line.format(*c) for c in cells]
    return "\n".join(out)


def _plain(value):
    return value.item() if hasattr(value, "item") else str(value)
