"""WAV reading and writing without size limits or lost tails.

- :class:`WavWriter` writes IEEE float32 frames (format tag 3) and refreshes
  the header sizes on every :meth:`~WavWriter.flush`, so a run cut short by a
  crash or power loss is still a readable file.  Past 4 GiB it turns the
  reserved ``JUNK`` chunk into a ``ds64`` chunk and the file into RF64
  (EBU Tech 3306), instead of overflowing the 32-bit RIFF sizes.
- :func:`read_wav` / :class:`WavReader` read PCM 8/16/24/32-bit, float 32/64,
  WAVE_FORMAT_EXTENSIBLE and RF64, returning float32 in full-scale units
  (int16 32767 -> 0.99997).  A data chunk whose size field is smaller than
  the file (a writer that died) is read to the end of the file.

The stdlib ``wave`` module reads and writes integer PCM only, hence this module.
"""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np

from livefilt.errors import RecordingError

__all__ = ["WavWriter", "WavReader", "read_wav"]

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


class WavReader:
    """Frame-by-frame reader; see :func:`read_wav` for the formats."""

    def __init__(self, path):
        self.path = Path(path)
        try:
            self._f = open(self.path, "rb")
        except FileNotFoundError:
            raise RecordingError(f"{path}: file not found") from None
        except OSError as e:
            raise RecordingError(f"{path}: cannot be opened ({e.strerror})") from None
        self._parse()

    def _fail(self, offset: int, what: str):
        self._f.close()
        raise RecordingError(f"{self.path}: byte {offset}: {what}")

    def _parse(self) -> None:
        f = self._f
        head = f.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RF64") or head[8:12] != b"WAVE":
            self._fail(0, "not a WAV file (expected 'RIFF....WAVE' or 'RF64....WAVE')")
        size = self.path.stat().st_size
        ds64_data = None
        fmt = None
        while True:
            pos = f.tell()
            h = f.read(8)
            if len(h) < 8:
                self._fail(pos, "no 'data' chunk found")
            cid, clen = h[:4], struct.unpack("<I", h[4:])[0]
            if cid == b"ds64":
                body = f.read(clen)
                ds64_data = struct.unpack("<Q", body[8:16])[0]
                f.seek(pos + 8 + clen + (clen & 1))
            elif cid == b"fmt ":
                body = f.read(clen)
                if len(body) < 16:
                    self._fail(pos, "'fmt ' chunk shorter than 16 bytes")
                tag, ch, rate, _, align, bits = struct.unpack("<HHIIHH", body[:16])
                if tag == _EXTENSIBLE and len(body) >= 26:
                    tag = struct.unpack("<H", body[24:26])[0]
                fmt = (tag, ch, rate, align, bits)
                f.seek(pos + 8 + clen + (clen & 1))
            elif cid == b"data":
                if fmt is None:
                    self._fail(pos, "'data' comes before 'fmt '")
                start = pos + 8
                if clen == _MAX32 and ds64_data is not None:
                    clen = ds64_data
                avail = size - start
                if clen == 0 or clen > avail:
                    clen = avail  # a writer that stopped before updating the header
                self._data_start, self._data_len = start, clen
                break
            else:
                f.seek(pos + 8 + clen + (clen & 1))
        tag, ch, rate, align, bits = fmt
        kinds = {(_PCM, 8): "u1", (_PCM, 16): "<i2", (_PCM, 24): "i3", (_PCM, 32): "<i4",
                 (_FLOAT, 32): "<f4", (_FLOAT, 64): "<f8"}
        if (tag, bits) not in kinds:
            self._fail(20, f"unsupported sample format (tag {tag}, {bits} bits); "
                           "allowed: PCM 8/16/24/32-bit, float 32/64-bit")
        if ch < 1:
            self._fail(22, "channel count is 0")
        self.kind = kinds[(tag, bits)]
        self.channels, self.rate_hz, self.bits = ch, float(rate), bits
        self.frame_bytes = ch * bits // 8
        self.frames = self._data_len // self.frame_bytes
        self.sample_format = ("float" if tag == _FLOAT else "int") + str(bits)
        f.seek(self._data_start)
        self.position = 0

    def read(self, n: int) -> np.ndarray:
        """Up to ``n`` frames as float32 (m, channels); m = 0 at the end."""
        n = max(0, min(n, self.frames - self.position))
        raw = self._f.read(n * self.frame_bytes)
        m = len(raw) // self.frame_bytes
        raw = raw[: m * self.frame_bytes]
        self.position += m
        k = self.kind
        if k == "i3":
            b = np.frombuffer(raw, dtype=np.uint8).reshape(-1, 3)
            v = (b[:, 0].astype(np.int32) | (b[:, 1].astype(np.int32) << 8)
                 | (b[:, 2].astype(np.int32) << 16))
            v = np.where(v >= 1 << 23, v - (1 << 24), v)
            x = v.astype(np.float32) / np.float32(1 << 23)
        elif k == "u1":
            x = (np.frombuffer(raw, dtype=np.uint8).astype(np.float32) - 128) / 128
        elif k == "<i2":
            x = np.frombuffer(raw, dtype=k).astype(np.float32) / 32768
        elif k == "<i4":
            x = (np.frombuffer(raw, dtype=k).astype(np.float64) / 2 ** 31).astype(np.float32)
        else:
            x = np.frombuffer(raw, dtype=k).astype(np.float32)
        return x.reshape(m, self.channels)

    def rewind(self) -> None:
        """Go back to the first frame."""
        self._f.seek(self._data_start)
        self.position = 0

    def close(self) -> None:
        self._f.close()


def read_wav(path) -> tuple[np.ndarray, float]:
    """Whole file as (float32 array (n, channels), rate_hz)."""
    r = WavReader(path)
    try:
        return r.read(r.frames), r.rate_hz
    finally:
        r.close()
