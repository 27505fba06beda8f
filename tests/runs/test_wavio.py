"""WAV I/O against scipy.io.wavfile (reference reader/writer) and the RF64 layout (EBU Tech 3306)."""

import struct

import numpy as np
import pytest
import scipy.io.wavfile as sw

from livefilt.errors import RecordingError
from livefilt.runs.wavio import WavReader, WavWriter, read_wav


def test_float32_written_is_read_by_scipy_bit_exact(tmp_path):
    x = np.random.default_rng(1).standard_normal((5000, 3)).astype(np.float32)
    w = WavWriter(tmp_path / "a.wav", 44100, 3)
    w.write(x[:1234])
    w.write(x[1234:])
    w.close()
    rate, y = sw.read(tmp_path / "a.wav")
    assert rate == 44100 and y.dtype == np.float32 and np.array_equal(y, x)


@pytest.mark.parametrize("dtype, scale", [(np.int16, 32768), (np.int32, 2 ** 31), (np.float32, 1), (np.uint8, None)])
def test_reads_what_scipy_writes(tmp_path, dtype, scale):
    rng = np.random.default_rng(2)
    if dtype is np.uint8:
        x = rng.integers(0, 256, (300, 2)).astype(np.uint8)
        expect = (x.astype(np.float32) - 128) / 128
    elif scale == 1:
        x = rng.uniform(-1, 1, (300, 2)).astype(np.float32)
        expect = x
    else:
        info = np.iinfo(dtype)
        x = rng.integers(info.min, info.max, (300, 2)).astype(dtype)
        expect = (x / scale).astype(np.float32)
    sw.write(tmp_path / "b.wav", 8000, x)
    y, rate = read_wav(tmp_path / "b.wav")
    assert rate == 8000
    np.testing.assert_allclose(y, expect, rtol=1e-7, atol=1e-9)


def test_int24_pcm(tmp_path):
    vals = np.array([0, 1, -1, 2 ** 23 - 1, -2 ** 23, 12345], dtype=np.int32)
    raw = b"".join(int(v & 0xFFFFFF).to_bytes(3, "little") for v in vals)
    fmt = struct.pack("<HHIIHH", 1, 1, 48000, 48000 * 3, 3, 24)
    body = b"WAVE" + b"fmt " + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", len(raw)) + raw
    (tmp_path / "c.wav").write_bytes(b"RIFF" + struct.pack("<I", len(body)) + body)
    y, _ = read_wav(tmp_path / "c.wav")
    np.testing.assert_array_equal(y[:, 0], (vals / 2 ** 23).astype(np.float32))


def test_unfinished_header_is_read_to_the_end_of_the_file(tmp_path):
    # A writer that died before its header refresh: sizes in the header are stale.
    w = WavWriter(tmp_path / "d.wav", 1000, 1)
    w.write(np.ones((10, 1), np.float32))
    w.flush()
    w.write(np.full((5, 1), 2, np.float32))
    w._f.flush()  # bytes on disk, header still says 10 frames... then the process dies
    y, _ = read_wav(tmp_path / "d.wav")
    assert y.shape[0] >= 10


def test_rf64_header_past_4_gib_layout(tmp_path):
    # EBU Tech 3306: 'RF64', riff size 0xFFFFFFFF, ds64 chunk in place of JUNK.
    w = WavWriter(tmp_path / "e.wav", 1000, 1)
    w.write(np.ones((4, 1), np.float32))
    w.frames = 2 ** 31  # pretend 8 GiB of data were written
    w.flush()
    w._f.close()
    head = (tmp_path / "e.wav").read_bytes()[:48]
    assert head[:4] == b"RF64" and struct.unpack("<I", head[4:8])[0] == 0xFFFFFFFF
    assert head[12:16] == b"ds64"
    assert struct.unpack("<Q", head[28:36])[0] == 2 ** 31 * 4


def test_bad_files_name_the_byte_offset(tmp_path):
    (tmp_path / "x.wav").write_bytes(b"hello world, not a wav")
    with pytest.raises(RecordingError, match="byte 0: not a WAV file"):
        WavReader(tmp_path / "x.wav")
    with pytest.raises(RecordingError, match="file not found"):
        WavReader(tmp_path / "missing.wav")
