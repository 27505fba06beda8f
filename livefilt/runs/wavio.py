"""WAV on disk: a crash-safe writer for recordings, and the reader of every input file.

- :class:`WavWriter` writes IEEE float32 frames (format tag 3) and refreshes
  the header sizes on every :meth:`~WavWriter.flush`, so a run cut short by a
  crash or power loss is still a readable file.  Past 4 GiB it turns the
  reserved ``JUNK`` chunk into a ``ds64`` chunk and the file into RF64
  (EBU Tech 3306), instead of overflowing the 32-bit RIFF sizes.  This one
  stays our own: a library writer (soundfile) keeps its header sizes to
  itself until close, so a killed recorder would leave a file whose header
  says zero frames.
- :class:`WavReader` / :func:`read_wav` read any file soundfile (libsndfile)
  reads: WAV PCM 8/16/24/32-bit and float, WAVE_FORMAT_EXTENSIBLE, RF64, W64,
  FLAC, AIFF; float32 in full-scale units (int16 32767 -> 0.99997), in large
  chunks.  For WAV files a header walk (ours, header bytes only) says in one
  line what is wrong with a damaged file: a file cut short, a header
  promising more data, a RIFF size of 0xFFFFFFFF, and a recording never
  closed, whose whole frames past the header's size are read back
  (memory-mapped) instead of being lost.  A file with no frames is an error.

The stdlib ``wave`` module reads integer PCM only (no float32), hence soundfile.
"""

from __future__ import annotations

import logging
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from livefilt.errors import RecordingError

__all__ = ["WavWriter", "WavReader", "read_wav", "riff_layout"]

log = logging.getLogger(__name__)

_FLOAT = 3
_PCM = 1
_EXTENSIBLE = 0xFFFE
_MAX32 = 0xFFFFFFFF


class WavWriter:
    """Append-only float32 WAV (RF64 past 4 GiB).

    Parameters
    ----------
    path : path-like
    rate_hz : int
    channels : int
    """

    def __init__(self, path, rate_hz: float, channels: int):
        self.path = Path(path)
        self.channels = int(channels)
        self.rate = int(round(rate_hz))
        self.frames = 0
        self._f = open(self.path, "wb")
        block_align = 4 * self.channels
        fmt = struct.pack("<HHIIHH", _FLOAT, self.channels, self.rate,
                          self.rate * block_align, block_align, 32)
        self._f.write(b"RIFF" + struct.pack("<I", 0) + b"WAVE")
        self._f.write(b"JUNK" + struct.pack("<I", 28) + bytes(28))  # room for ds64
        self._f.write(b"fmt " + struct.pack("<I", len(fmt)) + fmt)
        self._f.write(b"fact" + struct.pack("<II", 4, 0))
        self._fact_pos = self._f.tell() - 4
        self._f.write(b"data" + struct.pack("<I", 0))
        self._data_pos = self._f.tell()
        self._rf64 = False
        self.flush()

    @property
    def bytes_written(self) -> int:
        return self._data_pos + self.frames * 4 * self.channels

    def write(self, frames: np.ndarray) -> None:
        """Append frames, shape (n, channels), any float dtype (stored float32)."""
        a = np.asarray(frames, dtype="<f4")
        if a.ndim != 2 or a.shape[1] != self.channels:
            raise ValueError(f"expected (n, {self.channels}) frames, got {a.shape}")
        self._f.write(np.ascontiguousarray(a))  # buffer protocol: no copy for float32 input
        self.frames += a.shape[0]

    def flush(self) -> None:
        """Write the current sizes into the header and push to disk."""
        data = self.frames * 4 * self.channels
        end = self._f.tell()
        riff = end - 8
        if riff > _MAX32 or data > _MAX32:
            self._f.seek(0)
            self._f.write(b"RF64" + struct.pack("<I", _MAX32))
            self._f.seek(12)
            self._f.write(b"ds64" + struct.pack("<IQQQI", 28, riff, data, self.frames, 0))
            self._f.seek(self._data_pos - 4)
            self._f.write(struct.pack("<I", _MAX32))
            self._f.seek(self._fact_pos)
            self._f.write(struct.pack("<I", _MAX32))
            self._rf64 = True
        else:
            self._f.seek(4)
            self._f.write(struct.pack("<I", riff))
            self._f.seek(self._fact_pos)
            self._f.write(struct.pack("<I", self.frames))
            self._f.seek(self._data_pos - 4)
            self._f.write(struct.pack("<I", data))
        self._f.seek(end)
        self._f.flush()

    def close(self) -> None:
        if not self._f.closed:
            self.flush()
            self._f.close()


@dataclass
class RiffLayout:
    """What a WAV header says, next to what the file holds (see :func:`riff_layout`)."""

    rf64: bool
    riff_size: int            # the RIFF size field as written
    tag: int                  # format tag (the sub-format's for EXTENSIBLE)
    bits: int
    frame_bytes: int
    data_start: int           # byte offset of the first sample
    declared: int | None      # data bytes the header promises (None: placeholder)
    file_size: int
    data_is_last: bool        # nothing but padding after the declared data


def riff_layout(path) -> RiffLayout | str:
    """Walk a RIFF/RF64 WAV header (header bytes only): the layout, or a one-line
    problem naming its byte offset.  Never raises on bad bytes."""
    p = Path(path)
    try:
        size = p.stat().st_size
        with open(p, "rb") as f:
            head = f.read(12)
            if len(head) < 12 or head[:4] not in (b"RIFF", b"RF64") or head[8:12] != b"WAVE":
                return "byte 0: not a WAV file (expected 'RIFF....WAVE' or 'RF64....WAVE')"
            riff = struct.unpack("<I", head[4:8])[0]
            ds64 = fmt = None
            pos = 12
            while True:
                f.seek(pos)
                h = f.read(8)
                if len(h) < 8:
                    return f"byte {pos}: no 'data' chunk found"
                cid, clen = h[:4], struct.unpack("<I", h[4:])[0]
                if cid == b"ds64":
                    body = f.read(min(clen, 64))
                    if len(body) >= 16:
                        ds64 = struct.unpack("<Q", body[8:16])[0]
                elif cid == b"fmt ":
                    body = f.read(min(clen, 64))
                    if len(body) < 16:
                        return f"byte {pos}: 'fmt ' chunk shorter than 16 bytes"
                    tag, ch, _, _, align, bits = struct.unpack("<HHIIHH", body[:16])
                    if tag == _EXTENSIBLE and len(body) >= 26:
                        tag = struct.unpack("<H", body[24:26])[0]
                    fmt = (tag, bits, align if align else ch * ((bits + 7) // 8))
                elif cid == b"data":
                    if fmt is None:
                        return f"byte {pos}: 'data' comes before 'fmt '"
                    start = pos + 8
                    declared: int | None = clen
                    if clen == _MAX32:
                        declared = ds64 if head[:4] == b"RF64" else None
                    end = start + (declared or 0)
                    last = True
                    if declared is not None and end + (end & 1) + 8 <= size:
                        f.seek(end + (end & 1))
                        nxt = f.read(4)
                        last = not (len(nxt) == 4 and all(32 <= c < 127 for c in nxt))
                    return RiffLayout(head[:4] == b"RF64", riff, fmt[0], fmt[1], max(1, fmt[2]),
                                      start, declared, size, last)
                pos += 8 + clen + (clen & 1)
                if pos > size:
                    return f"byte {pos - 8 - clen - (clen & 1)}: chunk {cid!r} runs past the end"
    except OSError as e:
        return f"cannot be read ({e.strerror})"


_BITS = {"PCM_U8": 8, "PCM_S8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}
#: numpy layout and scale of the sample formats whose tail can be recovered.
_RAW = {(_FLOAT, 32): ("<f4", 1.0), (_FLOAT, 64): ("<f8", 1.0),
        (_PCM, 16): ("<i2", 1 / 32768), (_PCM, 32): ("<i4", 1 / 2 ** 31)}


class WavReader:
    """An input file read with soundfile, in chunks of :attr:`CHUNK` frames.

    Attributes: ``rate_hz``, ``channels``, ``frames``, ``bits`` (integer
    formats; None for float), ``sample_format`` (``"int16"``, ``"float32"``
    ...), ``notes`` (one line per thing wrong with the file, also logged as
    warnings), ``position``.
    """

    CHUNK = 1 << 16

    def __init__(self, path):
        import soundfile as sf

        self.path = Path(path)
        if not self.path.exists():
            raise RecordingError(f"{path}: file not found")
        if self.path.is_dir():
            raise RecordingError(f"{path}: is a folder, not an audio file")
        layout = riff_layout(self.path)
        try:
            self._sf = sf.SoundFile(str(self.path))
        except Exception as e:  # libsndfile's errors are RuntimeError / LibsndfileError
            wav = self.path.suffix.lower() in (".wav", ".wave", ".rf64", "")
            why = layout if isinstance(layout, str) and wav else _sf_reason(e)
            raise RecordingError(f"{path}: {why}") from None
        sfile = self._sf
        self.rate_hz, self.channels = float(sfile.samplerate), sfile.channels
        self.bits = _BITS.get(sfile.subtype)
        self.sample_format = (f"int{self.bits}" if self.bits else
                              {"FLOAT": "float32", "DOUBLE": "float64"}.get(sfile.subtype,
                                                                        sfile.subtype.lower()))
        self.notes: list[str] = []
        self.frames = sfile.frames
        self._map = None
        if isinstance(layout, RiffLayout):
            self._check(layout)
        if self.frames == 0:
            self.close()
            raise RecordingError(f"{path}: holds no audio frames (0 of {self.channels} channel(s) "
                                 f"at {self.rate_hz:g} Hz); nothing to read")
        for n in self.notes:
            log.warning("%s", n)
        self._buf = np.zeros((0, self.channels), np.float32)
        self._at = 0
        self.position = 0

    def _check(self, lay: RiffLayout) -> None:
        name, fs = self.path.name, self.rate_hz
        whole = max(0, lay.file_size - lay.data_start) // lay.frame_bytes
        if lay.declared is None:
            self.notes.append(f"{name}: data size is the placeholder 0xFFFFFFFF; using the "
                              f"{whole / fs:.2f} s of whole frames the file holds")
        elif not lay.rf64 and lay.riff_size == _MAX32:
            self.notes.append(f"{name}: RIFF size is the placeholder 0xFFFFFFFF; sizes taken "
                              "from the data chunk")
        declared = lay.declared // lay.frame_bytes if lay.declared is not None else whole
        if declared > whole:
            self.notes.append(f"{name}: header promises {declared / fs:.2f} s, file holds "
                              f"{whole / fs:.2f} s; using {whole / fs:.2f} s")
        elif declared < whole and lay.data_is_last:
            raw = _RAW.get((lay.tag, lay.bits))
            if raw is None:
                self.notes.append(f"{name}: {(whole - declared) / fs:.2f} s of frames past the "
                                  f"header's {declared / fs:.2f} s cannot be recovered for "
                                  f"{self.sample_format}; using {declared / fs:.2f} s")
                return
            self._map = (np.memmap(self.path, dtype=raw[0], mode="r", offset=lay.data_start,
                                   shape=(whole * self.channels,)).reshape(whole, self.channels),
                         raw[1])
            self.frames = whole
            self.notes.append(f"{name}: header says {declared / fs:.2f} s but the file holds "
                              f"{whole / fs:.2f} s of whole frames (a recording that was never "
                              f"closed); using all {whole / fs:.2f} s")
        if self._map is None and self._sf.frames != self.frames:
            self.frames = self._sf.frames

    def read(self, n: int) -> np.ndarray:
        """Up to ``n`` frames as float32 (m, channels); m = 0 at the end."""
        n = max(0, min(n, self.frames - self.position))
        if self._map is not None:
            data, scale = self._map
            x = np.asarray(data[self.position:self.position + n], dtype=np.float32)
            if scale != 1.0:
                x = x * np.float32(scale)
            self.position += x.shape[0]
            return x
        parts, got = [], 0
        while got < n:
            if self._at >= self._buf.shape[0]:
                self._buf = self._sf.read(self.CHUNK, dtype="float32", always_2d=True)
                self._at = 0
                if self._buf.shape[0] == 0:
                    break
            take = min(n - got, self._buf.shape[0] - self._at)
            parts.append(self._buf[self._at:self._at + take])
            self._at += take
            got += take
        self.position += got
        if len(parts) == 1:
            return parts[0]
        return np.concatenate(parts) if parts else np.zeros((0, self.channels), np.float32)

    def rewind(self) -> None:
        """Go back to the first frame."""
        self._sf.seek(0)
        self._buf = np.zeros((0, self.channels), np.float32)
        self._at = 0
        self.position = 0

    def close(self) -> None:
        self._sf.close()
        self._map = None


def _sf_reason(exc: Exception) -> str:
    text = str(exc).split(":", 1)[-1].strip() if "Error opening" in str(exc) else str(exc)
    return f"cannot be read as audio ({text.rstrip('.')})"


def read_wav(path) -> tuple[np.ndarray, float]:
    """Whole file as (float32 array (n, channels), rate_hz)."""
    r = WavReader(path)
    try:
        return r.read(r.frames), r.rate_hz
    finally:
        r.close()
