"""The engine: source -> ring -> every chain on the same samples -> outputs.

One engine serves the live window, the headless read-out and replay.  It
owns the driver (through the :mod:`livefilt.acquire.source` contract), the
:class:`~livefilt.acquire.ring.Ring`, the chains, a display :class:`~livefilt.stream.taps.Tap`
and, while recording, a :class:`~livefilt.runs.record.RunWriter`.

Threads: the driver produces into the ring; the engine thread
(:meth:`Engine.start`, or :meth:`Engine.run` in the caller's thread) reads
blocks, runs the chains and hands results to the outputs.  Viewers read the
tap and :attr:`Engine.latest`; they change settings through
:meth:`Engine.change_chain` (validated at once, applied at the next block
boundary) and add markers with :meth:`Engine.add_marker`.

When more than one block is waiting (replay as fast as possible, or after a
hiccup) the engine takes up to ``batch`` blocks at once: the filters carry
their state and the detector rows fall on fixed sample indices, so results
are identical for any split (tested), and the per-call overhead is paid once.
"""

from __future__ import annotations

import logging
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

import numpy as np

from livefilt.stream.chain import Chain
from livefilt.config import ChainSettings, Settings, parse_chain, toml_text
from livefilt.dsp.detect import ReferenceSpec
from livefilt.errors import SettingError, SourceError
from livefilt.threads import Worker, one_blas_thread
from livefilt.runs.record import RunWriter, make_marker, new_run_folder
from livefilt.acquire.guard import InputGuard, resolution_limit
from livefilt.acquire.ring import Ring
from livefilt.dsp.sections import FilterBank
from livefilt.acquire.source import Source, load_driver
from livefilt.stream.taps import Tap

__all__ = ["Engine", "EngineStats", "build_source"]

log = logging.getLogger(__name__)


#: Frames per step for a source not paced by a clock (Engine's ``batch``;
#: fewer above 16 chains, so a step's outputs stay within 32 MB):
#: 1 << 18 (1.4 s at 192 kHz, 2 MB of float32 stereo) against 1 << 16
#: measured here, same run, recorder on: 0.67-0.73 against 0.50-0.54 of
#: whole-array sosfilt at 192 kHz, 0.56-0.57 against 0.47-0.50 at 48 kHz;
#: 16 chains at 192 kHz (8 inputs), four runs alternating: one thread 45
#: against 38 x real time, two threads 63-74 against 48-53.
FAST_STEP = 1 << 18


def build_source(settings: Settings, **overrides) -> Source:
    """Instantiate (not open) the driver named in ``settings.source``."""
    s = settings.source
    cls = load_driver(s.driver)
    options = dict(s.options)
    options.update(overrides)
    try:
        return cls.from_settings(options, s.rate_hz, s.block)
    except SettingError as e:
        raise (e if e.field.startswith("source") else e.within("source")) from None


@dataclass
class EngineStats:
    """Counters for the status line, the read-out and run.toml."""

    frames: int = 0                 # frames processed
    index: int = 0                  # acquisition index reached (dropped frames included)
    dropped: int = 0                # frames lost (ring overruns + device losses)
    overruns: int = 0               # times the ring was full
    device_events: int = 0          # driver flags with no frame count (overflow, underflow)
    busy_s: float = 0.0             # processing time spent
    started: float = field(default_factory=time.monotonic)
    marks: list = field(default_factory=list)

    def load(self, rate_hz: float) -> float:
        """Processing time as a fraction of the acquired time (1.0 = 100 % of real time)."""
        return self.busy_s / (self.frames / rate_hz) if self.frames else 0.0


class Engine:
    """Runs the chains of ``settings`` on a source.

    Parameters
    ----------
    settings : Settings
    source : Source, optional
        An unopened source; built from ``settings.source`` when omitted.
    batch : int, optional
        Most blocks processed in one go when several are waiting.  Default:
        32 for a source paced by a clock; for one that is not (a recording
        or the simulator at pace "fast") enough blocks for :data:`FAST_STEP`
        frames, and each step waits for them all: the work per step that
        does not depend on its length (detector read-outs, the recorder's
        rows) then costs little per sample.
    tap_seconds : float
        History held for display (0 for none: headless).
    workers : int
        Threads the chains are spread over (1: all on the engine thread).
        The chains are split into that many consecutive groups, each with
        its own filter bank; the compiled kernels release the GIL, so the
        groups' filters and lock-ins run on several cores at once (the
        read-outs in Python take turns).  The numbers do not change.
    """

    def __init__(self, settings: Settings, source: Source | None = None, *,
                 batch: int | None = None, tap_seconds: float = 0.0, workers: int = 1):
        one_blas_thread()  # the lock-ins' small products; BLAS's threads would spin on the cores
        self.source = source if source is not None else build_source(settings)
        self.source.open()
        src = self.source
        self.rate_hz = float(src.rate_hz)
        if abs(self.rate_hz - settings.source.rate_hz) > 1e-9:
            log.warning("using %g Hz, the rate the %s source runs at (the config says %g Hz, "
                        "but a %s sets its own rate); settings re-checked at %g Hz",
                        self.rate_hz, src.driver, settings.source.rate_hz,
                        "recording" if src.driver == "file" else "device", self.rate_hz)
        self.settings = settings.at_rate(self.rate_hz, channels=src.channels)
        self.reference = self.settings.reference
        self._reference_changed = False
        self._settled = False
        if self.reference is None and src.reference_hint:
            hint = {k: v for k, v in src.reference_hint.items() if k in ("frequency_hz", "phase_deg")}
            self.reference = ReferenceSpec.from_mapping(hint, self.rate_hz, src.channels)
        self.block = self.settings.source.block
        # a source not paced by a clock is read in long steps (see batch)
        self._fast = not getattr(src, "realtime", True)
        if batch is None:
            # very many chains: shorter steps, so a step's outputs (8 bytes
            # per sample and chain) stay within 32 MB
            chains = max(1, len(self.settings.chains))
            frames = min(FAST_STEP, max(FAST_STEP // 4, 16 * FAST_STEP // chains))
            batch = -(-frames // self.block) if self._fast else 32
        self.batch = max(1, int(batch))
        self.output_every = max(1, int(round(self.settings.output.interval_s * self.rate_hz)))
        self.chains = [self._make_chain(c, i) for i, c in enumerate(self.settings.chains)]
        low, high = src.clip_levels()
        unwatched = [j for j in range(src.channels) if j not in {c.channel for c in self.chains}]
        low[unwatched], high[unwatched] = -np.inf, np.inf  # clipping counts on detector inputs
        self.guard = InputGuard(low, high, self.output_every, src.channel_names)
        self._bits_unchecked = bool(src.resolution_bits)  # warn once if the bits limit a result
        self.ring = Ring(src.channels, max(int(self.rate_hz * 2), self.block * self.batch * 4))
        n_max = self.block * self.batch
        # every group's chains filtered in one compiled call per block
        # (FilterBank); one group unless the chains are spread over workers
        inputs = [c.channel for c in self.chains]
        self._y = np.full((len(self.chains), n_max), 0.0)  # pages touched now, as the ring's
        self.workers = max(1, min(int(workers), len(self.chains)))
        cuts = np.linspace(0, len(self.chains), self.workers + 1).round().astype(int)
        self._groups = [(a, b, FilterBank([c.filter for c in self.chains[a:b]], inputs[a:b]),
                         self._y[a:b]) for a, b in zip(cuts[:-1], cuts[1:])]
        self._pool = (ThreadPoolExecutor(self.workers - 1, thread_name_prefix="livefilt-chains")
                      if self.workers > 1 else None)
        self._streams = np.full((src.channels + len(self.chains), n_max), 0.0, dtype=np.float32)
        self.tap = None
        if tap_seconds > 0:
            self.tap = Tap(self.rate_hz, list(src.channel_names) + [c.name for c in self.chains],
                           [c.name for c in self.chains], tap_seconds)
        self.stats = EngineStats()
        self.latest: dict[str, np.void] = {}
        self.resolution_note = ""
        self.recorder: RunWriter | None = None
        self.recording_error: str | None = None  # the last recording's failure, one line
        self.listeners: list = []  # callables (engine, start_index, raw, outputs, rows)
        self._pending: list[tuple[int, ChainSettings]] = []
        self._pending_lock = threading.Lock()
        self._rec_lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._started = False
        self._stop_at: int | None = None
        self.error: BaseException | None = None
        self.finished = threading.Event()
        # markers known in advance (the source's truth or replayed markers, --marks)
        self._schedule: list[dict] = []
        self.schedule_markers(getattr(self.source, "markers", None) or [])

    # -- construction helpers -------------------------------------------
    def _channel_index(self, chain: ChainSettings, i: int) -> int:
        names = list(self.source.channel_names)
        inp = chain.input
        if isinstance(inp, str):
            if inp not in names:
                raise SettingError(f"chains[{i}].input", inp,
                                   "no such channel; this source has: " + ", ".join(names))
            return names.index(inp)
        if not 0 <= inp < self.source.channels:
            raise SettingError(f"chains[{i}].input", inp,
                               f"this source has channels 0 to {self.source.channels - 1} ({', '.join(names)})")
        return inp

    def _make_chain(self, c: ChainSettings, i: int) -> Chain:
        return Chain(c, self.rate_hz, self.reference, self.output_every, self._channel_index(c, i))

    # -- control (any thread) -------------------------------------------
    def change_chain(self, index: int, table_or_settings) -> ChainSettings:
        """Validate new settings for chain ``index`` now; apply them at the next block.

        Accepts a ChainSettings or a chain table (dict); raises SettingError
        with the same message the config loader gives.
        """
        if isinstance(table_or_settings, ChainSettings):
            new = parse_chain(table_or_settings.to_mapping(), self.rate_hz, index, self.source.channels)
        else:
            new = parse_chain(table_or_settings, self.rate_hz, index, self.source.channels)
        self._channel_index(new, index)
        with self._pending_lock:
            self._pending.append((index, new))
        return new

    def change_reference(self, table) -> "ReferenceSpec":
        """Validate a new ``[reference]`` table now; apply it to every chain at
        the next block (each lock-in restarts its output filter from zero).

        Raises SettingError with field paths under ``reference``.
        """
        try:
            new = ReferenceSpec.from_mapping(table, self.rate_hz, self.source.channels)
        except SettingError as e:
            raise e.within("reference") from None
        with self._pending_lock:
            self._pending.append((None, new))
        return new

    def current_settings(self) -> Settings:
        """The settings now in force (after applied changes), for saving."""
        s = self.settings
        for i, c in enumerate(self.chains):
            s = s.with_chain(i, c.settings)
        if self._reference_changed:
            s = replace(s, reference=self.reference)
        return s

    def schedule_markers(self, marks, replace: bool = False) -> None:
        """Add markers at given times of the run's data (``time_s``,
        ``distance_m`` or none while moving, ``note``); each is added when the
        engine has processed its time.  ``replace`` drops the schedule so far
        (a replayed run's own markers).  Call before :meth:`start`."""
        keep = [{k: v for k, v in m.items() if k in ("time_s", "distance_m", "note")} for m in marks]
        base = [] if replace else self._schedule
        self._schedule = sorted(base + keep, key=lambda m: m["time_s"])

    def pending_markers(self) -> list[dict]:
        """Scheduled markers whose time has not been reached (yet)."""
        return list(self._schedule)

    def add_marker(self, distance_m: float | None, note: str = "", time_s: float | None = None) -> dict:
        """Mark the current acquisition time (or ``time_s``) with the target
        distance (None: the target is moving) and a note."""
        t = self.stats.index / self.rate_hz if time_s is None else float(time_s)
        with self._rec_lock:
            if self.recorder is not None:
                m = self.recorder.add_marker(t, distance_m, note)
            else:
                m = make_marker(t, distance_m, note)
        self.stats.marks.append(m)
        return m

    def start_recording(self, parent="runs", folder=None) -> RunWriter:
        """Begin writing a run folder (a new one under ``parent`` unless ``folder``)."""
        with self._rec_lock:
            if self.recorder is not None:
                return self.recorder
            path = folder if folder is not None else new_run_folder(parent)
            info = self.source.info()
            info["reference"] = self.reference.to_mapping() if self.reference else None
            info["start_index"] = self.stats.index
            doc = self.current_settings().to_mapping()
            doc["source"] = {**doc["source"], **{k: v for k, v in self.source.resolved.items()
                                                 if k not in doc["source"]}}
            # room for two whole steps waiting: the engine queues the next
            # while the recorder writes the last, and waits only when the
            # disk is slower than the processing (with less room than one
            # step, a source not paced by a clock waited for every write)
            step_s = self.batch * self.block / self.rate_hz
            self.recorder = RunWriter(path, toml_text(doc), info,
                                      self.rate_hz, self.source.channels,
                                      wait_when_full=not self.source.realtime,
                                      queue_s=max(4.0, 2.5 * step_s))
            self.recorder.refresh = lambda: (self.counts(), self.source_state())
            return self.recorder

    def stop_recording(self) -> RunWriter | None:
        with self._rec_lock:
            rec, self.recorder = self.recorder, None
        if rec is not None:
            rec.close(self.counts(), source_state=self.source_state())
            if rec.failed:
                self.recording_error = rec.failed
        return rec

    #: Counts run.toml always holds (zero included), whatever the source.
    SOURCE_COUNTS = {"crc_errors": "crc_errors", "sequence_gaps": "seq_gaps"}

    def counts(self) -> dict:
        """Every count for run.toml and the read-out, zero included; the source's
        other whole-number counters follow as ``source_<name>``."""
        st = self.stats
        status = self.source.status()
        d = {"frames_processed": st.frames, "dropped_frames": st.dropped,
             "ring_overruns": st.overruns, "device_events": st.device_events,
             **self.guard.counts()}
        rec = self.recorder
        if rec is not None:
            d.update(recorder_dropped_frames=rec.dropped_frames, recorder_dropped_rows=rec.dropped_rows)
        d.update({k: int(status.get(v) or 0) for k, v in self.SOURCE_COUNTS.items()})
        used = set(self.SOURCE_COUNTS.values())
        d.update({f"source_{k}": v for k, v in status.items()
                  if k not in used and isinstance(v, int) and not isinstance(v, bool)})
        return d

    def source_state(self) -> dict:
        """The source's status values that are not counts (state, distance, position)."""
        return {k: v for k, v in self.source.status().items()
                if isinstance(v, (float, str, bool)) and v != ""}

    # -- running ---------------------------------------------------------
    def start(self, duration_s: float | None = None) -> None:
        """Start the source and the engine thread; return at once."""
        self._begin(duration_s)
        self._thread = Worker(self._loop, "livefilt-engine")
        self._thread.start()

    def run(self, duration_s: float | None = None) -> None:
        """Start the source and process in the calling thread until stopped,
        the duration is reached, or the source ends."""
        self._begin(duration_s)
        self._loop()

    def _begin(self, duration_s):
        if self._started:
            raise RuntimeError("an engine runs once")
        self._started = True
        if duration_s is not None:
            self._stop_at = int(round(duration_s * self.rate_hz))
        self.stats = EngineStats()
        self.source.start(self.ring)

    def stop(self, timeout: float = 5.0) -> None:
        """Stop processing, stop the source, close a recording.  Idempotent."""
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join(timeout)
        self._shutdown()

    def wait(self, timeout: float | None = None) -> bool:
        return self.finished.wait(timeout)

    def _shutdown(self) -> None:
        try:
            self.source.stop()
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=False)
            self.stop_recording()

    @property
    def recording_failed(self) -> str | None:
        """One line when the current or last recording stopped on a write error."""
        rec = self.recorder
        return (rec.failed if rec is not None else None) or self.recording_error

    def _loop(self) -> None:
        try:
            while not self._stop.is_set():
                if not self.step():
                    if self.ring.closed or (self._stop_at is not None and self.stats.index >= self._stop_at):
                        break
            died = getattr(getattr(self.source, "_thread", None), "error_line", None)
            if died and self.error is None:  # the source's worker failed and closed the ring
                raise SourceError(f"{self.source.driver}: the source stopped: {died}")
        except BaseException as e:  # reported by the caller; the recording is closed below
            self.error = e
            log.debug("engine stopped on error", exc_info=True)
        finally:
            try:
                self._shutdown()
            except BaseException as e:  # the thread policy: keep it, never hang the waiter
                self.error = self.error or e
                log.debug("engine shutdown failed", exc_info=True)
            finally:
                self.finished.set()

    def _check_resolution(self, rows_all) -> None:
        """Say once when an integer input's resolution limits a chain's reading
        (:func:`~livefilt.acquire.guard.resolution_limit`), at its first settled row."""
        for c, rows in zip(self.chains, rows_all):
            settled = rows[np.isfinite(rows["noise"])] if len(rows) else rows
            if not len(settled):
                continue
            r = settled[-1]
            why = resolution_limit(self.source.resolution_bits, self.source.full_scale,
                                   self.source.units, float(r["amplitude"]))
            self._bits_unchecked = False
            if why:
                log.warning("chain %s: %s", c.name, why)
                self.resolution_note = f"chain {c.name}: {why}"
                return

    def _write_rows(self, rec, rows_all) -> None:
        """Rows in time order, chains interleaved (every chain's rows fall on the
        same sample indices), with their input flags: one queue item per step."""
        flags = [self.guard.row_flags(c.channel, rows["index"])
                 for c, rows in zip(self.chains, rows_all)]
        rec.write_rowsets([c.name for c in self.chains], rows_all, flags)

    def _run_group(self, group, data, start: int, n: int) -> list:
        """Filter and detect chains ``a:b`` on one block; their rows."""
        a, b, bank, y = group
        bank.process_frames(data, y)  # data: the ring's float32 (n, channels) block
        rows_all = []
        for k in range(a, b):
            c = self.chains[k]
            ref = data[:, c.ref_channel] if c.ref_channel is not None else None
            rows_all.append(c.detect(self._y[k, :n], start, ref))
        return rows_all

    def step(self, timeout: float = 0.2) -> bool:
        """Process what is waiting (up to ``batch`` blocks); False if nothing came."""
        want = self.block * self.batch
        if self._stop_at is not None:
            left = self._stop_at - self.stats.index
            if left <= 0:
                return False
            want = min(want, left)
        blk = self.ring.read(want, min_frames=want if self._fast else min(self.block, want),
                             timeout=timeout)
        if blk is None:
            return False
        t0 = time.perf_counter()
        if self._pending:
            with self._pending_lock:
                pending, self._pending = self._pending, []
            for i, new in pending:
                if i is None:  # a new reference for every chain
                    self.reference, self._reference_changed = new, True
                    for c in self.chains:
                        c.set_reference(new)
                    continue
                self.chains[i].retune(new)
                self.chains[i].channel = self._channel_index(new, i)
                for a, b, bank, _ in self._groups:  # the bank keeps its chains' columns
                    if a <= i < b:
                        bank.channels[i - a] = self.chains[i].channel
        st = self.stats
        if blk.dropped or blk.gaps:
            st.dropped += blk.dropped
            st.overruns = self.ring.overruns
            st.device_events = self.ring.device_events
            for c in self.chains:
                c.note_gap(blk.dropped)
            for kind, lost, note in blk.gaps:
                log.warning("%s: %d frames lost at sample %d (%s)", kind, lost, blk.start_index, note)
        n, raw, start = blk.frames, blk.data, blk.start_index
        if self._stop_at is not None and start + n > self._stop_at:
            n = max(0, self._stop_at - start)
            raw = raw[:n]
        data = self.guard.check(raw, start)  # NaN/Inf held out of every filter; clipping counted
        nch = data.shape[1]
        if not self._settled and n:
            # Start as an instrument that has been on for a while: each chain's
            # filters in their steady state for the first sample, so a large DC
            # level (sunlight) does not ring through the band-pass at start.
            for c in self.chains:
                c.filter.settle(float(data[0, c.channel]))
            self._settled = True
        if self._pool is None:
            rows_all = self._run_group(self._groups[0], data, start, n)
        else:  # the other groups on the pool, the first one here
            later = [self._pool.submit(self._run_group, g, data, start, n) for g in self._groups[1:]]
            rows_all = self._run_group(self._groups[0], data, start, n)
            for f in later:
                rows_all += f.result()
        for c, rows in zip(self.chains, rows_all):
            if len(rows):
                self.latest[c.name] = rows[-1]
        st.frames += n
        st.index = start + n
        if self._bits_unchecked:
            self._check_resolution(rows_all)
        if self.tap is not None:
            s = self._streams[:, :n]
            s[:nch] = data.T
            s[nch:] = self._y[:, :n]
            self.tap.write(start, s)
            for c, rows in zip(self.chains, rows_all):
                self.tap.add_rows(c.name, rows)
        rec = self.recorder
        if rec is not None:
            with self._rec_lock:
                if self.recorder is not None:
                    rec.write_block(raw)  # as acquired
                    self._write_rows(rec, rows_all)
        while self._schedule and self._schedule[0]["time_s"] * self.rate_hz <= st.index:
            m = self._schedule.pop(0)
            self.add_marker(m.get("distance_m"), m.get("note", ""), m["time_s"])
        for fn in self.listeners:
            fn(self, start, data, self._y[:, :n], rows_all)
        st.busy_s += time.perf_counter() - t0
        return True
