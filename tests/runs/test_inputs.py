"""Input files read with soundfile, and damaged WAVs said in one line (files on disk, for real).

Reference readers: scipy.io.wavfile for WAV (its own parser, not libsndfile); for FLAC
(lossless) the samples written.  Sizes in the damaged headers are set byte by byte per
the RIFF/WAVE layout (Microsoft RIFF spec; RF64: EBU Tech 3306).
"""

import logging
import os
import signal
import struct
import subprocess
import sys
import time

import numpy as np
import pytest
import scipy.io.wavfile as sw
import soundfile as sf

from livefilt.errors import RecordingError
from livefilt.runs.record import read_run
from livefilt.runs.wavio import WavReader, WavWriter, read_wav, riff_layout

FS = 8000


def _tone(n=3 * FS, ch=2):
    t = np.arange(n) / FS
    return np.stack([0.5 * np.sin(2 * np.pi * 440 * t * (k + 1)) for k in range(ch)], 1).astype(np.float32)


@pytest.mark.parametrize("fmt,subtype,ext", [
    ("WAV", "PCM_24", "wav"), ("WAVEX", "PCM_24", "wav"), ("WAVEX", "FLOAT", "wav"),
    ("RF64", "FLOAT", "wav"), ("W64", "PCM_16", "w64"), ("AIFF", "PCM_16", "aiff"),
    ("FLAC", "PCM_24", "flac"),
])
def test_formats_users_recorders_write(tmp_path, fmt, subtype, ext):
    x = _tone()
    path = tmp_path / f"a.{ext}"
    sf.write(path, x, FS, format=fmt, subtype=subtype)
    y, rate = read_wav(path)
    assert rate == FS and y.shape == x.shape and y.dtype == np.float32
    step = 2.0 ** -15 if subtype == "PCM_16" else 2.0 ** -23
    np.testing.assert_allclose(y, x, atol=step)  # quantized to the format's step
    if ext == "wav" and fmt == "WAV":
        _, ref = sw.read(path)  # scipy's own reader: 24-bit as int32 << 8
        np.testing.assert_array_equal(y, (ref / 2.0 ** 31).astype(np.float32))


def test_reads_in_chunks_and_across_them(tmp_path):
    x = np.random.default_rng(3).uniform(-1, 1, (WavReader.CHUNK * 2 + 77, 1)).astype(np.float32)
    sw.write(tmp_path / "c.wav", FS, x)
    r = WavReader(tmp_path / "c.wav")
    parts = [r.read(1000) for _ in range(3)] + [r.read(10 ** 9)]
    assert np.array_equal(np.concatenate(parts), x) and r.read(5).shape == (0, 1)
    r.rewind()
    assert np.array_equal(r.read(10), x[:10])
    r.close()


def _wav(tmp_path, name="ok.wav", seconds=3.0):
    x = _tone(int(seconds * FS))
    p = tmp_path / name
    sw.write(p, FS, x)
    b = p.read_bytes()
    return p, b, b.index(b"data"), x


def test_cut_short_says_what_the_header_promised(tmp_path, caplog):
    p, b, i, x = _wav(tmp_path)
    half = (len(b) - i - 8) // 2
    p.write_bytes(b[:i + 8 + half + 3])  # mid-frame cut: 3 stray bytes
    with caplog.at_level(logging.WARNING):
        r = WavReader(p)
    assert r.notes == ["ok.wav: header promises 3.00 s, file holds 1.50 s; using 1.50 s"]
    assert caplog.messages == r.notes
    assert np.array_equal(r.read(r.frames), x[:r.frames]) and r.frames == 1.5 * FS


def test_header_promising_ten_times_more(tmp_path):
    p, b, i, _ = _wav(tmp_path)
    n = struct.unpack("<I", b[i + 4:i + 8])[0]
    p.write_bytes(b[:i + 4] + struct.pack("<I", 10 * n) + b[i + 8:])
    r = WavReader(p)
    assert r.notes == ["ok.wav: header promises 30.00 s, file holds 3.00 s; using 3.00 s"]
    assert r.frames == 3 * FS


def test_riff_size_placeholder(tmp_path):
    p, b, _, x = _wav(tmp_path)
    p.write_bytes(b[:4] + struct.pack("<I", 0xFFFFFFFF) + b[8:])
    r = WavReader(p)
    assert r.notes == ["ok.wav: RIFF size is the placeholder 0xFFFFFFFF; sizes taken from the data chunk"]
    assert np.array_equal(r.read(r.frames), x)


def test_zero_frames_is_an_error(tmp_path):
    p, b, i, _ = _wav(tmp_path)
    p.write_bytes(b[:i + 8])
    with pytest.raises(RecordingError, match=r"ok.wav: holds no audio frames .*nothing to read"):
        WavReader(p)


def test_a_recording_never_closed_gives_every_whole_frame(tmp_path):
    # Our writer's header trails the file by up to a flush; a dead process never updates it.
    x = _tone(FS * 2)
    w = WavWriter(tmp_path / "raw.wav", FS, 2)
    w.write(x[:FS // 2])
    w.flush()
    w.write(x[FS // 2:])
    w._f.write(b"\x01\x02\x03")  # and a torn last frame
    w._f.flush()
    r = WavReader(tmp_path / "raw.wav")
    assert r.frames == 2 * FS and np.array_equal(r.read(r.frames), x)
    assert r.notes == ["raw.wav: header says 0.50 s but the file holds 2.00 s of whole frames "
                       "(a recording that was never closed); using all 2.00 s"]
    assert sf.info(str(tmp_path / "raw.wav")).frames == FS // 2  # what a standard reader sees


def test_the_cli_says_it_once_and_uses_the_frames(tmp_path):
    p, b, i, _ = _wav(tmp_path, seconds=2.0)
    p.write_bytes(b[:i + 8 + (len(b) - i - 8) // 2])
    r = subprocess.run([sys.executable, "-m", "livefilt", "run", "--input", str(p), "--fast"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("header promises 2.00 s, file holds 1.00 s; using 1.00 s") == 1
    assert len(r.stdout.splitlines()) == 20  # one line per 0.05 s output interval of 1.00 s


def test_killed_run_is_recovered_and_replayed(tmp_path):
    """SIGKILL a recording run: run.toml's frame count matches the header at the last
    flush, and reading the folder back recovers every whole frame past it."""
    out = tmp_path / "runs"
    proc = subprocess.Popen([sys.executable, "-m", "livefilt", "run", "--out", str(out),
                             "--duration", "60"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    folder = None
    while time.monotonic() < deadline:
        found = list(out.glob("run-*/run.toml")) if out.exists() else []
        if found:
            import tomllib
            meta = tomllib.loads(found[0].read_text())
            if meta["run"]["frames"] >= 48000 * 2:
                folder = found[0].parent
                break
        time.sleep(0.2)
    time.sleep(0.5)  # part of a second past the last flush
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(10)
    assert folder is not None, proc.stderr.read()
    import tomllib
    meta = tomllib.loads((folder / "run.toml").read_text())
    header_frames = sf.info(str(folder / "raw.wav")).frames
    assert meta["run"]["frames"] == header_frames > 0
    assert meta["counts"]["frames_processed"] > 0 and "nonfinite_samples" in meta["counts"]
    run = read_run(folder)
    lay = riff_layout(folder / "raw.wav")
    whole = (lay.file_size - lay.data_start) // lay.frame_bytes
    assert run.raw.shape[0] == whole > header_frames
    r = subprocess.run([sys.executable, "-m", "livefilt", "run", "--input", str(folder), "--fast"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "a recording that was never closed" in r.stderr, r.stderr
    assert len(r.stdout.splitlines()) == (whole - 1) // 2400 + 1  # a line per row: every frame used


@pytest.mark.parametrize("kind", ["riff", "fmt", "data", "truncated"])
def test_mangled_headers_give_one_line(tmp_path, kind):
    p, b, i, _ = _wav(tmp_path)
    if kind == "riff":
        bad = b"RIFX" + b[4:]
    elif kind == "fmt":
        bad = b[:20] + struct.pack("<H", 0x55) + b[22:]  # MPEG layer-3 tag: not PCM/float
    elif kind == "data":
        bad = b[:i] + b"dat?" + b[i + 4:]
    else:
        bad = b[:30]
    p.write_bytes(bad)
    with pytest.raises(RecordingError) as info:
        WavReader(p)
    msg = str(info.value)
    assert msg.startswith(f"{p}: ") and "\n" not in msg


# -- fuzzing the reader: mutated WAV headers ------------------------------------------
from hypothesis import given, strategies as st  # noqa: E402

from tests.fuzzing import examples  # noqa: E402


def _small_wavs():
    import io
    out = []
    for subtype, fmt in (("FLOAT", "WAV"), ("PCM_16", "WAV"), ("PCM_24", "WAVEX"), ("FLOAT", "RF64")):
        b = io.BytesIO()
        sf.write(b, _tone(400), FS, subtype=subtype, format=fmt)
        out.append(b.getvalue())
    import tempfile
    with tempfile.TemporaryDirectory() as d:  # our own writer's layout, JUNK and fact chunks
        w = WavWriter(f"{d}/raw.wav", FS, 2)
        w.write(_tone(400))
        w.close()
        out.append(open(f"{d}/raw.wav", "rb").read())
    return out


SMALL = _small_wavs()


@examples(300)
@given(which=st.integers(0, len(SMALL) - 1),
       edits=st.lists(st.tuples(st.integers(0, 120), st.integers(0, 255)), min_size=1, max_size=8),
       cut=st.one_of(st.none(), st.integers(0, 4000)))
def test_fuzz_mutated_headers_give_one_line_or_a_warning(tmp_path_factory, which, edits, cut):
    data = bytearray(SMALL[which])
    for pos, value in edits:
        if pos < len(data):
            data[pos] = value
    if cut is not None:
        data = data[:cut]
    p = tmp_path_factory.mktemp("wav") / "m.wav"
    p.write_bytes(bytes(data))
    try:
        r = WavReader(p)
    except RecordingError as e:
        assert "\n" not in str(e) and str(e).startswith(str(p))
        return
    try:
        assert all("\n" not in n for n in r.notes)
        x = r.read(r.frames + 10)
        assert x.dtype == np.float32 and x.shape[1] == r.channels and x.shape[0] <= r.frames
    finally:
        r.close()
