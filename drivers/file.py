"""Replay a recording: WAV files (int16, int24, int32, float32/64; any rate and
channel count; RF64) or a livefilt run folder (its raw.wav, with the channel
names, units and reference of the original run; its distance markers are
carried into the new run, and :meth:`FileSource.info` names the run replayed:
``replay_of``, ``replay_of_started_utc``).

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

import threading
import tomllib
from pathlib import Path

from livefilt.errors import RecordingError, SettingError, SourceError
from livefilt.threads import Worker
from livefilt.acquire.source import Pacer, Source
from livefilt.runs.wavio import WavReader

__all__ = ["FileSource"]

_PIECE = 4096


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
        pace = options.get("pace", "realtime")
        if pace not in ("realtime", "fast"):
            raise SettingError("source.pace", pace, 'must be "realtime" or "fast"')
        loop = options.get("loop", False)
        if not isinstance(loop, bool):
            raise SettingError("source.loop", loop, "must be true or false")
        return cls(path, pace, loop, block)

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
        d = super().info()
        d["path"] = str(self.path)
        if getattr(self, "_replay_of", None):
            d.update(self._replay_of)
        return d
