"""Replay a recording: any file soundfile reads (WAV int8..32 and float, RF64,
W64, FLAC, AIFF; any rate and channel count) or a livefilt run folder (its
raw.wav, with the channel names, units and reference of the original run; its
distance markers are carried into the new run, and :meth:`FileSource.info`
names the run replayed: ``replay_of``, ``replay_of_started_utc``).
What is wrong with a damaged file is said once, in one line (see
:mod:`livefilt.runs.wavio`); a file with no frames is an error.

Options (``[source]`` table, or ``livefilt run --input PATH [--fast]``)
-----------------------------------------------------------------------
path : str
    A .wav file or a run folder.
pace : "realtime" | "fast", default "realtime"
    Paced by the wall clock like a live device, or as fast as the engine reads.
loop : bool, default false
    Start again at the end (a gap is marked at each restart).
"""

from __future__ import annotations

import hashlib
import threading
import tomllib
from pathlib import Path

from livefilt import fields
from livefilt.errors import RecordingError, SettingError, SourceError
from livefilt.threads import Worker
from livefilt.acquire.source import Pacer, Source
from livefilt.runs.wavio import WavReader

__all__ = ["FileSource"]

_PIECE = 16384


class FileSource(Source):
    """Replays a WAV file or a run folder into the ring."""

    driver = "file"
    options = {
        "path": "a .wav file or a livefilt run folder",
        "pace": '"realtime" (default) or "fast"',
        "loop": "start again at the end (default false)",
    }

    def __init__(self, path: str, pace: str = "realtime", loop: bool = False, block: int = 256):
        self.path = Path(path)
        self.realtime = pace == "realtime"
        self.loop = loop
        self._block = block
        self._reader: WavReader | None = None
        self._thread = None
        self._stop = threading.Event()
        self.units = "FS"

    @classmethod
    def from_settings(cls, options, rate_hz, block):
        cls.check_unknown(options, cls.options)
        path = options.get("path")
        if not isinstance(path, str) or not path:
            raise SettingError("source.path", path, "must name a .wav file or a run folder")
        try:
            pace = fields.choice(options.get("pace", "realtime"), "pace", ("realtime", "fast"))
            loop = fields.boolean(options.get("loop", False), "loop")
        except SettingError as e:
            raise e.within("source") from None
        src = cls(path, pace, loop, block)
        src.resolved = {"path": path, "pace": pace, "loop": loop}
        return src

    @classmethod
    def probe(cls):
        from livefilt.acquire.source import DeviceInfo
        return [DeviceInfo(name="any .wav file or run folder",
                           note="livefilt run --input PATH [--fast]")]

    def open(self) -> None:
        p = self.path
        wav = p
        meta = {}
        if p.is_dir():
            wav = p / "raw.wav"
            if (p / "run.toml").is_file():
                try:
                    meta = tomllib.loads((p / "run.toml").read_text(encoding="utf-8"))
                except tomllib.TOMLDecodeError as e:
                    raise SourceError(f"{p / 'run.toml'}: not valid TOML: {e}") from None
        elif not p.exists():
            raise SourceError(f"{p}: no such file or folder")
        try:
            self._reader = WavReader(wav)
        except RecordingError as e:
            raise SourceError(str(e)) from None
        r = self._reader
        self.rate_hz, self.channels = r.rate_hz, r.channels
        info = meta.get("source_info", {})
        names = info.get("channel_names")
        self.channel_names = list(names) if names and len(names) == r.channels \
            else [f"in{i}" for i in range(r.channels)]
        self.units = info.get("units", "FS")
        ref = info.get("reference")
        if isinstance(ref, dict) and "frequency_hz" in ref:
            self.reference_hint = {"frequency_hz": ref["frequency_hz"],
                                   "phase_deg": ref.get("phase_deg", 0.0)}
        self.device = f"{p} ({r.sample_format}, {r.channels} ch, {r.rate_hz:g} Hz, {r.frames / r.rate_hz:.1f} s)"
        self.frames_total = r.frames
        self.resolution_bits = r.bits
        self._wav = Path(wav).resolve()
        self.notes = list(r.notes)
        self.length_s = None if self.loop else r.frames / r.rate_hz
        # a replayed run carries its markers and says where it came from
        self.markers = [{k: m[k] for k in ("time_s", "distance_m", "note") if k in m}
                        for m in meta.get("markers", []) if isinstance(m, dict) and "time_s" in m]
        self._replay_of = None
        if meta:
            run = meta.get("run", {})
            self._replay_of = {"replay_of": str(p.resolve()),
                               "replay_of_started_utc": run.get("started_utc", ""),
                               "replay_of_markers": len(self.markers)}

    def start(self, ring) -> None:
        self._stop.clear()
        self._thread = Worker(lambda: self._run(ring), "livefilt-file", on_error=lambda w: ring.close())
        self._thread.start()

    def _run(self, ring) -> None:
        r = self._reader
        piece = self._block if self.realtime else _PIECE
        pacer, sent = Pacer(self.rate_hz, self.realtime, self._stop), 0
        while pacer.wait(ring, sent, piece):
            frames = r.read(piece)
            if frames.shape[0] == 0:
                if self.loop and r.frames:
                    r.rewind()
                    ring.mark_gap(0, note="file restarted (loop)")
                    continue
                break
            ring.write(frames)
            sent += frames.shape[0]
        ring.close()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=2)
            self._thread = None
        if self._reader is not None:
            self._reader.close()
            self._reader = None

    def status(self):
        r = self._reader
        return {"position_s": (r.position / r.rate_hz) if r else 0.0}

    def info(self):
        """Also the input itself: absolute path, size and SHA-256 (so a result can
        be traced to the exact bytes it came from), and what was wrong with it."""
        d = super().info()
        d["path"] = str(self.path.resolve())
        if getattr(self, "_replay_of", None):
            d.update(self._replay_of)
        wav = getattr(self, "_wav", None)
        if wav is not None:
            d["input"] = {"path": str(wav), "bytes": wav.stat().st_size, "sha256": _sha256(wav)}
            if self.notes:
                d["input"]["notes"] = list(self.notes)
        return d


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
