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
  driver is calibrated, else full scale), RMS.

:class:`RunWriter` only writes what it is given; :func:`read_run` returns a
:class:`Run` with the config, raw samples, results and markers.
"""

from __future__ import annotations

import csv
import io
import math
import os
import shutil
import tomllib
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from livefilt import __version__
from livefilt.errors import RecordingError
from livefilt.config import toml_text
from livefilt.runs.wavio import WavWriter, read_wav

__all__ = ["RunWriter", "Run", "read_run", "RESULT_COLUMNS", "FLAG_COLUMNS", "new_run_folder",
           "make_marker"]

RESULT_COLUMNS = ("time_s", "chain", "amplitude", "phase_deg", "in_phase", "quadrature",
                  "noise", "snr_db", "ref_hz", "locked", "sample_index")
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
    """Writes one run folder.

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
    """

    FLUSH_EVERY_S = 1.0

    def __init__(self, folder, config_toml: str, source_info: dict, rate_hz: float, channels: int):
        self.folder = Path(folder)
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            self._wav = WavWriter(self.folder / "raw.wav", rate_hz, channels)
            self._csv_file = open(self.folder / "results.csv", "w", newline="", encoding="utf-8")
        except OSError as e:
            raise RecordingError(f"{self.folder}: cannot write the run ({e.strerror})") from None
        self._csv = csv.writer(self._csv_file)
        self._csv.writerow(RESULT_COLUMNS + FLAG_COLUMNS)
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
        self._since_flush = 0
        self._write_meta()

    # -- writing -------------------------------------------------------
    def write_block(self, frames: np.ndarray) -> None:
        """Append raw frames (n, channels)."""
        self._wav.write(frames)
        self._since_flush += frames.shape[0]
        if self._since_flush >= self.rate_hz * self.FLUSH_EVERY_S:
            self.flush()

    def write_rows(self, chain: str, rows: np.ndarray, flags=None) -> None:
        """Append detector rows (structured array with READING_DTYPE fields) and
        their input flags (``(nonfinite, clipped)`` counts per row, or None)."""
        w, fs = self._csv.writerow, self.rate_hz
        nonfinite, clipped = flags if flags is not None else ((0,) * len(rows),) * 2
        for r, nf, cl in zip(rows, nonfinite, clipped):
            w((f"{r['index'] / fs:.6f}", chain, _g(r["amplitude"]), _g(r["phase_deg"]),
               _g(r["in_phase"]), _g(r["quadrature"]), _g(r["noise"]), _g(r["snr_db"]),
               _g(r["ref_hz"]), int(bool(r["locked"])), int(r["index"]), int(nf), int(cl)))
        self.rows += len(rows)

    def add_marker(self, time_s: float, distance_m: float | None, note: str = "") -> dict:
        """Record a distance marker at acquisition time ``time_s``; saved at once."""
        m = make_marker(time_s, distance_m, note)
        self.markers.append(m)
        self._write_meta()
        return m

    def flush(self) -> None:
        """Push samples and rows to disk, then run.toml with the frame count the
        WAV header now holds (and the current counts), so a killed run's record
        matches its file."""
        self._wav.flush()
        self._csv_file.flush()
        self._since_flush = 0
        if self.refresh is not None:
            counts, state = self.refresh()
            self.counts.update(counts)
            self.source_state.update(state)
        self._write_meta()

    def close(self, counts: dict | None = None, source_state: dict | None = None) -> None:
        """Close the files and write the final run.toml with ``counts``."""
        if counts:
            self.counts.update(counts)
        if source_state:
            self.source_state.update(source_state)
        self.stopped = _utc_now()
        self._wav.close()
        self._csv_file.close()
        self._write_meta()

    @property
    def bytes_written(self) -> int:
        return self._wav.bytes_written + self._csv_file.tell() if not self._csv_file.closed \
            else self._wav.bytes_written

    @property
    def frames(self) -> int:
        return self._wav.frames

    def free_bytes(self) -> int:
        return shutil.disk_usage(self.folder).free

    def _write_meta(self) -> None:
        run = {"software": "livefilt", "version": __version__,
               "started_utc": self.started.isoformat(timespec="seconds"),
               "rate_hz": self.rate_hz, "frames": self._wav.frames}
        if self.stopped:
            run["stopped_utc"] = self.stopped.isoformat(timespec="seconds")
            run["duration_s"] = round(self._wav.frames / self.rate_hz, 6)
        doc = {"run": run, "source_info": _plain(self.source_info),
               "source_status": _plain(self.source_state),
               "counts": _plain(self.counts), "config": self.config,
               "markers": self.markers}
        text = toml_text(doc, header="livefilt run folder: raw.wav holds every acquired sample, "
                                 "results.csv the detector rows.")
        tmp = self.folder / "run.toml.tmp"
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, self.folder / "run.toml")


def make_marker(time_s: float, distance_m: float | None, note: str = "") -> dict:
    """A distance marker as stored in run.toml: acquisition time, wall-clock UTC,
    and the distance and note when given."""
    m = {"time_s": round(float(time_s), 6), "utc": _utc_now().isoformat(timespec="seconds")}
    if distance_m is not None:
        m["distance_m"] = float(distance_m)
    if note:
        m["note"] = note
    return m


def _g(x) -> str:
    x = float(x)
    return "nan" if math.isnan(x) else f"{x:.9g}"


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
        if name == "chain":
            out[name] = np.array(col, dtype=str)
        else:
            out[name] = np.array([float(v) for v in col], dtype=float)
    return out
