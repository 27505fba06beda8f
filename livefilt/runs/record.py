"""Run folders: what a recorded run leaves on disk, and reading it back.

A run folder holds

- ``run.toml``: the whole config as used, software version, driver and device,
  rate, start time (UTC), stop time, dropped-sample and error counts, and the
  distance markers.  Rewritten (atomically) at start, on every marker and at
  stop, so a crash loses no marker.
- ``raw.wav``: float32, every input channel, exactly the samples acquired
  (see :mod:`livefilt.runs.wavio`; header refreshed about once a second).
- ``results.csv``: one row per chain per output interval with the columns
  :data:`RESULT_COLUMNS`; amplitudes in the input's units (volts where the
  driver is calibrated, else FS), RMS.  Every value column's name ends in
  its unit (:func:`result_header`): ``_s``, ``_deg``, ``_db``, ``_hz``,
  ``_pct``, ``_V`` or ``_FS``; ``FS`` is the fraction of the digitizer's full
  scale (1 FS = the positive limit of its codes; a full-scale sine then
  reads 0.7071 FS RMS, which is 0 dBFS per AES17), written out in run.toml's
  ``[units]`` table.  ``read_run`` gives the columns under their plain
  names (``amplitude``, ``noise``...).

:class:`RunWriter` only writes what it is given, from its own thread; :func:`read_run` returns a
:class:`Run` with the config, raw samples, results and markers.
"""

from __future__ import annotations

import csv
import io
import os
import shutil
import threading
import time
import tomllib
from collections import deque
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from livefilt import __version__
from livefilt.dsp.detect import LOCK_REASONS
from livefilt.errors import RecordingError
from livefilt.config import toml_text
from livefilt.runs.wavio import WavWriter, read_wav

__all__ = ["RunWriter", "Run", "read_run", "RESULT_COLUMNS", "FLAG_COLUMNS", "new_run_folder",
           "make_marker"]

RESULT_COLUMNS = ("time_s", "chain", "amplitude", "phase_deg", "in_phase", "quadrature",
                  "noise", "snr_db", "ref_hz", "locked", "sample_index",
                  "noise_u_pct", "snr_u_db", "vector_amplitude", "amplitude_corrected",
                  "biased", "offset_hz", "offset_u_hz", "lock_reason")
#: Columns in the input's units: their header names get the unit as suffix.
AMPLITUDE_COLUMNS = ("amplitude", "in_phase", "quadrature", "noise", "vector_amplitude",
                     "amplitude_corrected")
#: What the units in the header mean (run.toml's [units] table).
UNIT_TEXT = {
    "FS": "fraction of the digitizer's full scale: 1 FS is the positive limit of its codes; "
          "amplitudes are RMS, so a full-scale sine reads 0.7071 FS (0 dBFS per AES17)",
    "V": "volts at the digitizer's input (calibrated driver); amplitudes are RMS",
}


def result_header(units: str) -> list[str]:
    """results.csv's header: amplitude columns carry the input's unit (``_V``
    or ``_FS``); flags read ``locked``/``biased`` 1 or 0, ``lock_reason``
    text (empty while locked)."""
    u = "".join(ch for ch in str(units or "FS") if ch.isalnum()) or "FS"
    return [f"{c}_{u}" if c in AMPLITUDE_COLUMNS else c for c in RESULT_COLUMNS]
#: Input flags per row: samples of the chain's input in the row's output
#: interval that were non-finite (replaced) or at/beyond full scale.
FLAG_COLUMNS = ("nonfinite", "clipped")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


def new_run_folder(parent, label: str = "") -> Path:
    """A fresh folder ``parent/run-YYYYmmdd-HHMMSS[-label]`` (suffixed if taken)."""
    parent = Path(parent)
    if parent.exists() and not parent.is_dir():
        raise RecordingError(f"{parent}: is a file, not a folder; --out takes a folder "
                             "(a new run folder is made inside it)")
    try:
        parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise RecordingError(f"{parent}: cannot create the output folder ({e.strerror})") from None
    stem = "run-" + _utc_now().strftime("%Y%m%d-%H%M%S") + (f"-{label}" if label else "")
    path, k = parent / stem, 1
    while path.exists():
        k += 1
        path = parent / f"{stem}-{k}"
    try:
        path.mkdir()
    except OSError as e:
        raise RecordingError(f"{parent}: cannot make a run folder in it ({e.strerror}); "
                             "choose a folder you can write with --out") from None
    return path


class RunWriter:
    """Writes one run folder from its own thread.

    The caller (the engine thread) only copies blocks and rows into a bounded
    queue; the recorder thread formats and writes them, so a slow disk never
    stalls processing.  When the queue is full a live source's data is
    dropped and counted (``dropped_frames``, ``dropped_rows``, in run.toml's
    counts and the read-outs); a source that can wait (a file, a fast
    simulation) waits instead (``wait_when_full``), so nothing is lost.

    Any write error (disk full, file too large, device gone) stops the
    recording: :attr:`failed` holds one line ("recording stopped after 7.0 s:
    no space left on device: ..."), the files are closed (raw.wav and
    results.csv readable up to the last flush), the rest is discarded and the
    caller keeps running.

    Parameters
    ----------
    folder : path-like
        An existing empty folder, or one to create.
    config_toml : str
        The config as used (TOML text, as :meth:`Settings.to_toml` makes it).
    source_info : dict
        The source's :meth:`~livefilt.acquire.source.Source.info`.
    rate_hz : float
    channels : int
    wait_when_full : bool
        Wait for room instead of dropping (sources that are not real time).
    queue_s : float
        Raw data the queue holds before it is full, seconds (at least 1 MB).
    """

    FLUSH_EVERY_S = 1.0

    def __init__(self, folder, config_toml: str, source_info: dict, rate_hz: float, channels: int,
                 wait_when_full: bool = False, queue_s: float = 4.0):
        from livefilt.threads import Worker
        self.folder = Path(folder)
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            self._wav = WavWriter(self.folder / "raw.wav", rate_hz, channels)
            self._csv_file = open(self.folder / "results.csv", "w", newline="", encoding="utf-8")
        except OSError as e:
            raise RecordingError(f"{self.folder}: cannot write the run ({e.strerror})") from None
        self._csv = csv.writer(self._csv_file)
        self.units = str(source_info.get("units") or "FS")
        self._csv.writerow(result_header(self.units) + list(FLAG_COLUMNS))
        self.rate_hz = rate_hz
        self.config = tomllib.loads(config_toml)
        self.source_info = dict(source_info)
        self.started = _utc_now()
        self.stopped: datetime | None = None
        self.markers: list[dict] = []
        self.counts: dict[str, Any] = {}
        self.source_state: dict[str, Any] = {}
        #: Called at each flush for (counts, source state), so run.toml stays current.
        self.refresh = None
        self.rows = 0
        self.failed: str | None = None
        self.dropped_frames = 0
        self.dropped_rows = 0
        self.wait_when_full = bool(wait_when_full)
        self._budget = max(1 << 20, int(queue_s * rate_hz * channels * 4))
        self._queued = 0
        self._items: deque = deque()
        self._cv = threading.Condition()
        self._closing = False
        self._since_flush = 0
        self._flushed_at = time.monotonic()
        self._bytes = self._wav.bytes_written
        self._write_meta()
        self._thread = Worker(self._drain, "livefilt-recorder", on_error=self._failed_in_thread)
        self._thread.start()

    # -- the caller's side (engine thread): copies only --------------------
    def write_block(self, frames: np.ndarray) -> None:
        """Queue raw frames (n, channels); copied, so the caller may reuse its buffer."""
        if self.failed:
            return
        a = np.array(frames, dtype="<f4")
        if not self._put(("block", a), a.nbytes):
            self.dropped_frames += a.shape[0]

    def write_rows(self, chain: str, rows: np.ndarray, flags=None) -> None:
        """Queue detector rows (structured array with READING_DTYPE fields) and
        their input flags (``(nonfinite, clipped)`` counts per row, or None)."""
        if self.failed or not len(rows):
            return
        r = rows.copy()
        if not self._put(("rows", chain, r, flags), r.nbytes):
            self.dropped_rows += len(r)

    def write_rowsets(self, chains, rows_all, flags_all) -> None:
        """Queue one step's rows of every chain as one item (one lock, one
        wake-up per step instead of one per row); written in time order with
        the chains interleaved, as :meth:`write_rows` row by row would.
        ``flags_all``: per chain ``(nonfinite, clipped)`` or None."""
        if self.failed:
            return
        copies = [r.copy() for r in rows_all]
        size = sum(r.nbytes for r in copies)
        if not size:
            return
        if not self._put(("rowsets", list(chains), copies, list(flags_all)), size):
            self.dropped_rows += sum(len(r) for r in copies)

    def add_marker(self, time_s: float, distance_m: float | None, note: str = "") -> dict:
        """Record a distance marker at acquisition time ``time_s``; run.toml is
        rewritten by the recorder thread at once (a marker is never dropped)."""
        m = make_marker(time_s, distance_m, note)
        self.markers.append(m)
        self._put(("meta",), 0, force=True)
        return m

    def _put(self, item, nbytes: int, force: bool = False) -> bool:
        with self._cv:
            if self._closing:
                return False
            # an item larger than the whole budget waits for an empty queue,
            # not for room that can never come
            while (self._queued and self._queued + nbytes > self._budget and not force
                   and self.failed is None):
                if not self.wait_when_full:
                    return False
                self._cv.wait(0.5)
            self._items.append(item)
            self._queued += nbytes
            self._cv.notify_all()
            return True

    def flush(self) -> None:
        """Ask the recorder thread to push what it has to disk now."""
        self._put(("flush",), 0, force=True)

    def close(self, counts: dict | None = None, timeout: float = 30.0,
              source_state: dict | None = None) -> None:
        """Finish writing what is queued, close the files and write the final
        run.toml with ``counts``.  Returns within ``timeout`` seconds whatever
        the disk does (a recorder still stuck then is left as a daemon)."""
        if counts:
            self.counts.update(counts)
        if source_state:
            self.source_state.update(source_state)
        with self._cv:
            if not self._closing:
                self._items.append(("close",))
                self._closing = True
                self._cv.notify_all()
        self._thread.join(timeout)
        if self._thread.is_alive() and self.failed is None:
            self.failed = (f"recording did not finish writing within {timeout:g} s "
                           f"(the disk stopped answering): {self.folder}")

    @property
    def bytes_written(self) -> int:
        return self._bytes

    @property
    def frames(self) -> int:
        return self._wav.frames

    @property
    def backlog_s(self) -> float:
        """Raw data waiting in the queue, seconds."""
        return self._queued / (4.0 * self._wav.channels * self.rate_hz)

    def free_bytes(self) -> int:
        return shutil.disk_usage(self.folder).free

    # -- the recorder thread ------------------------------------------------
    def _drain(self) -> None:
        while True:
            with self._cv:
                while not self._items:
                    self._cv.wait()
                item = self._items.popleft()
                size = (item[1].nbytes if item[0] == "block" else item[2].nbytes if item[0] == "rows"
                        else sum(r.nbytes for r in item[2]) if item[0] == "rowsets" else 0)
                self._queued -= size
                self._cv.notify_all()
            kind = item[0]
            if kind == "close":
                self._finish()
                return
            if self.failed and kind != "meta":
                continue  # discard: the recording has stopped (markers still go to run.toml)
            try:
                if kind == "block":
                    self._write_block(item[1])
                elif kind == "rows":
                    self._write_rows(item[1], item[2], item[3])
                elif kind == "rowsets":
                    self._write_rowsets(item[1], item[2], item[3])
                elif kind == "meta":
                    self._write_meta()
                elif kind == "flush":
                    self._flush()
            except OSError as e:
                if not self.failed:
                    self._stop_on(e, {"block": "raw.wav", "rows": "results.csv",
                                        "rowsets": "results.csv"}.get(kind, "run.toml"))

    def _write_block(self, frames: np.ndarray) -> None:
        self._wav.write(frames)
        self._since_flush += frames.shape[0]
        self._bytes = self._wav.bytes_written + self._csv_file.tell()
        # every second of data and of the clock: a replay running at 300 x
        # real time rewrites run.toml once a second, not 300 times
        if (self._since_flush >= self.rate_hz * self.FLUSH_EVERY_S
                and time.monotonic() - self._flushed_at >= self.FLUSH_EVERY_S):
            self._flush()

    def _write_rows(self, chain: str, rows: np.ndarray, flags) -> None:
        self._write_rowsets([chain], [rows], [flags])

    def _write_rowsets(self, chains, rows_all, flags_all) -> None:
        """CSV lines for several chains' rows, interleaved row by row (row 0 of
        every chain, then row 1, ...).  The columns are taken out of the
        structured arrays once (``tolist``) and formatted a column at a time
        (:func:`_g`, a list comprehension per column): several times faster
        per row than a call per field."""
        lens = [len(r) for r in rows_all]
        if not sum(lens):
            return
        rows = np.concatenate(rows_all)
        which = np.repeat(np.arange(len(rows_all)), lens)
        pos = np.concatenate([np.arange(k) for k in lens])
        order = np.lexsort((which, pos))
        rows, which = rows[order], which[order].tolist()
        nf = np.concatenate([np.asarray(f[0] if f is not None else np.zeros(k), np.int64)
                             for f, k in zip(flags_all, lens)])[order].tolist()
        cl = np.concatenate([np.asarray(f[1] if f is not None else np.zeros(k), np.int64)
                             for f, k in zip(flags_all, lens)])[order].tolist()
        col = {name: rows[name].tolist() for name in rows.dtype.names}
        fs, reasons, g = self.rate_hz, LOCK_REASONS, _g
        self._csv.writerows(zip(
            [f"{i / fs:.6f}" for i in col["index"]], [chains[w] for w in which],
            g(col["amplitude"]), g(col["phase_deg"]), g(col["in_phase"]), g(col["quadrature"]),
            g(col["noise"]), g(col["snr_db"]), g(col["ref_hz"]), [int(bool(v)) for v in col["locked"]],
            [int(v) for v in col["index"]], g([100.0 * v for v in col["noise_u"]]),
            g(col["snr_u_db"]), g(col["vector_amplitude"]), g(col["amplitude_corrected"]),
            [int(bool(v)) for v in col["biased"]], g(col["offset_hz"]), g(col["offset_u_hz"]),
            [reasons.get(int(v), "") for v in col["lock_reason"]], nf, cl))
        self.rows += len(rows)

    def _flush(self) -> None:
        """Samples and rows to disk, then run.toml with the frame count the WAV
        header now holds (and the current counts), so a killed run's record
        matches its file."""
        self._wav.flush()
        self._csv_file.flush()
        self._since_flush = 0
        self._flushed_at = time.monotonic()
        if self.refresh is not None:
            counts, state = self.refresh()
            self.counts.update(counts)
            self.source_state.update(state)
        self._write_meta()

    def _stop_on(self, e: BaseException, name: str = "") -> None:
        """A write failed: one line, files closed and readable, the rest discarded."""
        from livefilt.threads import one_line
        where = "" if getattr(e, "filename", None) or not name else f": {self.folder / name}"
        self._stopped_because(one_line(e) + where)

    def _failed_in_thread(self, worker) -> None:
        """Anything else ended the recorder thread: the same, and no more queueing."""
        self._stopped_because(worker.error_line, closing=True)

    def _stopped_because(self, why: str, closing: bool = False) -> None:
        if self.failed is None:
            self.failed = f"recording stopped after {self._wav.frames / self.rate_hz:.1f} s: {why}"
        self.counts["recording_error"] = self.failed
        self._close_files()
        try:
            self._write_meta()
        except OSError:
            pass  # the previous run.toml stays (it is replaced atomically)
        with self._cv:
            self._closing = self._closing or closing
            self._cv.notify_all()

    def _close_files(self) -> None:
        for close in (self._wav.close, self._csv_file.close):
            try:
                close()
            except (OSError, ValueError):
                pass
        _trim_wav(self._wav.path, self._wav.bytes_written)

    def _finish(self) -> None:
        self.counts.update(recorder_dropped_frames=self.dropped_frames,
                           recorder_dropped_rows=self.dropped_rows)
        self.stopped = _utc_now()
        if self.failed:
            try:
                self._write_meta()
            except OSError:
                pass
            return
        try:
            self._wav.close()
            self._csv_file.close()
            self._write_meta()
        except OSError as e:
            self._stop_on(e, "run.toml")

    def _write_meta(self) -> None:
        run = {"software": "livefilt", "version": __version__,
               "started_utc": self.started.isoformat(timespec="seconds"),
               "rate_hz": self.rate_hz, "frames": self._wav.frames}
        if self.stopped:
            run["stopped_utc"] = self.stopped.isoformat(timespec="seconds")
            run["duration_s"] = round(self._wav.frames / self.rate_hz, 6)
        doc = {"run": run, "units": {self.units: UNIT_TEXT.get(self.units, self.units)},
               "source_info": _plain(self.source_info),
               "source_status": _plain(self.source_state),
               "counts": _plain(self.counts), "config": self.config,
               "markers": list(self.markers)}
        text = toml_text(doc, header="livefilt run folder: raw.wav holds every acquired sample, "
                                 "results.csv the detector rows.")
        tmp = self.folder / "run.toml.tmp"
        try:
            tmp.write_text(text, encoding="utf-8")
            os.replace(tmp, self.folder / "run.toml")
        except OSError:
            try:
                tmp.unlink()
            except OSError:
                pass
            raise


def _trim_wav(path: Path, size: int) -> None:
    """Cut a partly written last block (a write that failed half way) off raw.wav
    so the file ends where its header's data chunk ends; fix the RIFF size."""
    try:
        if path.stat().st_size <= size or size > 0xFFFFFFFF:
            return
        with open(path, "r+b") as f:
            f.truncate(size)
            f.seek(4)
            f.write((size - 8).to_bytes(4, "little"))
    except OSError:
        pass  # the stale tail is still read as data by tolerant readers


def make_marker(time_s: float, distance_m: float | None, note: str = "") -> dict:
    """A distance marker as stored in run.toml: acquisition time, wall-clock UTC,
    and the distance and note when given."""
    m = {"time_s": round(float(time_s), 6), "utc": _utc_now().isoformat(timespec="seconds")}
    if distance_m is not None:
        m["distance_m"] = float(distance_m)
    if note:
        m["note"] = note
    return m


def _g(values) -> list[str]:
    """A column of floats as text, 9 significant digits ("nan", "inf" as Python writes them)."""
    return [format(v, ".9g") for v in values]


def _plain(d: Any) -> Any:
    if isinstance(d, dict):
        return {str(k): _plain(v) for k, v in d.items() if v is not None}
    if isinstance(d, (list, tuple)):
        return [_plain(v) for v in d]
    if hasattr(d, "item"):
        return d.item()
    return d


@dataclass
class Run:
    """A run folder read back."""

    folder: Path
    meta: dict
    raw: np.ndarray
    rate_hz: float
    results: dict[str, np.ndarray]  # column -> array (chain column as str array)

    @property
    def markers(self) -> list[dict]:
        return self.meta.get("markers", [])

    @property
    def config(self) -> dict:
        return self.meta.get("config", {})

    def chain_rows(self, chain: str) -> dict[str, np.ndarray]:
        sel = self.results["chain"] == chain
        return {k: v[sel] for k, v in self.results.items()}


def read_run(folder, raw: bool = True) -> Run:
    """Read a run folder; raises RecordingError naming the file and the problem."""
    folder = Path(folder)
    meta_path = folder / "run.toml"
    if not meta_path.is_file():
        raise RecordingError(f"{folder}: not a run folder (no run.toml)")
    try:
        meta = tomllib.loads(meta_path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as e:
        raise RecordingError(f"{meta_path}: not valid TOML: {e}") from None
    rate = float(meta.get("run", {}).get("rate_hz", 0) or 0)
    data = np.zeros((0, 1), np.float32)
    if raw:
        data, rate = read_wav(folder / "raw.wav")
    results = _read_results(folder / "results.csv")
    return Run(folder, meta, data, rate, results)


def _read_results(path: Path) -> dict[str, np.ndarray]:
    if not path.is_file():
        return {c: np.zeros(0) for c in RESULT_COLUMNS + FLAG_COLUMNS}
    text = path.read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(text)))
    if not rows:
        return {c: np.zeros(0) for c in RESULT_COLUMNS + FLAG_COLUMNS}
    header, body = rows[0], [r for r in rows[1:] if len(r) == len(rows[0])]
    out = {}
    for j, name in enumerate(header):
        col = [r[j] for r in body]
        base = name.rsplit("_", 1)[0] if name.rsplit("_", 1)[0] in AMPLITUDE_COLUMNS else name
        name = base
        if name in ("chain", "lock_reason"):
            out[name] = np.array(col, dtype=str)
        else:
            out[name] = np.array([float(v) for v in col], dtype=float)
    return out
