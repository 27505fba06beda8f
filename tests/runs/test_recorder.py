"""The recorder on its own thread, tried as a user meets it: real subprocesses,
real files, a real SIGKILL and a real file-size limit (RLIMIT_FSIZE)."""

from __future__ import annotations

import csv
import os
import re
import resource
import signal
import subprocess
import sys
import time
import tomllib

import numpy as np
import scipy.io.wavfile as sw
import soundfile

from livefilt.runs.record import RunWriter, read_run

CMD = [sys.executable, "-m", "livefilt"]


def _env():
    env = dict(os.environ)
    env.pop("DISPLAY", None)
    env.pop("WAYLAND_DISPLAY", None)
    return env


def _check_readable(folder):
    """raw.wav opens in scipy.io.wavfile and soundfile; results.csv and run.toml parse."""
    fs, data = sw.read(folder / "raw.wav")
    sf_data, sf_fs = soundfile.read(folder / "raw.wav", dtype="float32")
    assert fs == sf_fs == 48000 and data.shape == sf_data.shape
    assert np.array_equal(data, sf_data)
    with open(folder / "results.csv", newline="") as f:
        rows = list(csv.reader(f))
    assert rows[0][:2] == ["time_s", "chain"]
    meta = tomllib.loads((folder / "run.toml").read_text())
    return data.shape[0] / fs, rows, meta


def test_sigkill_mid_run_leaves_readable_files(tmp_path):
    p = subprocess.Popen(CMD + ["run", "--duration", "60", "--out", str(tmp_path)], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True, env=_env())
    t_seen, seen_at = 0.0, time.monotonic()
    deadline = time.monotonic() + 60
    try:
        for line in p.stdout:
            m = re.match(r"t=\s*([\d.]+) s", line)
            if m:
                t_seen, seen_at = float(m.group(1)), time.monotonic()
                if t_seen >= 3.0:
                    break
            assert time.monotonic() < deadline
        time.sleep(0.6)  # kill between two header refreshes
    finally:
        killed_at = time.monotonic()
        p.send_signal(signal.SIGKILL)
        p.wait(10)
    # data time acquired at the kill: the read-out's last time plus the wall time since (paced source)
    t_kill = t_seen + (killed_at - seen_at)
    (folder,) = tmp_path.iterdir()
    wav_s, rows, meta = _check_readable(folder)
    assert wav_s >= t_kill - 1.0 - 0.1  # at most 1 s missing (header refreshed every second; 0.1 s pacing slack)
    assert meta["run"]["rate_hz"] == 48000 and "config" in meta
    run = read_run(folder)
    assert len(run.chain_rows("A")["amplitude"]) >= (t_seen - 1.0) / 0.05 - 1


def _limit_file_size():
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # writes then fail with EFBIG instead of a kill
    resource.setrlimit(resource.RLIMIT_FSIZE, (3_000_000, 3_000_000))


def test_file_size_limit_stops_the_recording_with_one_line_and_ends_on_time(tmp_path):
    t0 = time.monotonic()
    p = subprocess.run(CMD + ["run", "--fast", "--duration", "30", "--out", str(tmp_path)],
                       capture_output=True, text=True, timeout=120, preexec_fn=_limit_file_size,
                       stdin=subprocess.DEVNULL, env=_env())
    assert time.monotonic() - t0 < 120
    assert p.returncode == 1, p.stderr
    assert "Traceback" not in p.stderr
    lines = [ln for ln in p.stderr.splitlines() if "recording stopped" in ln]
    assert len(lines) == 1 and "file too large" in lines[0], p.stderr
    # the run went on to the end: the log's last row is the one at 29.95 s (a row per 0.05 s)
    assert re.search(r"t=\s*29\.950 s", p.stdout.splitlines()[-1])
    (folder,) = tmp_path.iterdir()
    wav_s, rows, meta = _check_readable(folder)
    assert 5.0 < wav_s < 8.0  # 3 MB of 2-channel float32 at 48 kHz: about 7.8 s
    assert "recording stopped" in meta["counts"]["recording_error"]


def test_recorder_accounts_for_every_frame_when_its_queue_overflows(tmp_path):
    """Blocks pushed faster than the disk takes them: written + dropped = pushed
    (overflow is counted, never silent)."""
    rec = RunWriter(tmp_path / "r", "", {"driver": "test"}, 48000.0, 2, wait_when_full=False, queue_s=0.1)
    block = np.ones((48000, 2), np.float32)
    pushed = 0
    for _ in range(60):
        rec.write_block(block)
        pushed += block.shape[0]
    rec.close({})
    assert rec.failed is None
    assert rec.frames + rec.dropped_frames == pushed
    meta = tomllib.loads((tmp_path / "r" / "run.toml").read_text())
    assert meta["counts"]["recorder_dropped_frames"] == rec.dropped_frames
    assert soundfile.info(tmp_path / "r" / "raw.wav").frames == rec.frames


def test_recorder_that_may_wait_loses_nothing(tmp_path):
    rec = RunWriter(tmp_path / "r", "", {"driver": "test"}, 48000.0, 2, wait_when_full=True, queue_s=0.1)
    block = np.arange(96000, dtype=np.float32).reshape(48000, 2)
    for _ in range(40):
        rec.write_block(block)
    rec.close({})
    assert rec.dropped_frames == 0 and rec.frames == 40 * 48000
    data, _ = soundfile.read(tmp_path / "r" / "raw.wav", dtype="float32")
    assert np.array_equal(data[-48000:], block)


def test_a_block_larger_than_the_whole_queue_is_written_not_waited_on(tmp_path):
    """A step longer than the queue's byte budget (2.4 MB against 1 MB) waits
    for an empty queue instead of for room that can never come (it hung)."""
    import threading

    rec = RunWriter(tmp_path / "r", "", {"driver": "test"}, 48000.0, 2, wait_when_full=True, queue_s=0.1)
    block = np.ones((300000, 2), np.float32)
    done = threading.Event()

    def push():
        for _ in range(3):
            rec.write_block(block)
        done.set()

    threading.Thread(target=push, daemon=True).start()
    assert done.wait(20), "write_block waited forever on a block larger than the queue"
    rec.close({})
    assert rec.dropped_frames == 0 and rec.frames == 3 * 300000
