"""The command line as a user meets it: real subprocesses, real files."""

import os
import subprocess
import sys

import numpy as np
import scipy.io.wavfile as sw

from livefilt.runs.record import read_run


def livefilt(*args, timeout=120):
    env = dict(os.environ)
    env.pop("DISPLAY", None)
    env.pop("WAYLAND_DISPLAY", None)
    env["QT_QPA_PLATFORM"] = ""
    return subprocess.run([sys.executable, "-m", "livefilt", *args], capture_output=True,
                          text=True, timeout=timeout, env=env)


def test_run_demo_for_a_duration_prints_the_readout():
    r = livefilt("run", "--duration", "1.2", "--fast")
    assert r.returncode == 0, r.stderr
    assert "A " in r.stdout and "SNR" in r.stdout and "d=0.40 m" in r.stdout


def test_replay_a_wav_fast_and_record(tmp_path):
    # a 1370 Hz tone of 0.1 peak in noise; the lock-in reads 0.1/sqrt2 rms (closed form)
    fs = 48000
    t = np.arange(fs * 2) / fs
    x = (0.1 * np.cos(2 * np.pi * 1370 * t) + 0.01 * np.random.default_rng(0).standard_normal(t.size))
    sw.write(tmp_path / "bench.wav", fs, (x * 32767).astype(np.int16))
    r = livefilt("run", "--input", str(tmp_path / "bench.wav"), "--fast", "--out", str(tmp_path / "runs"))
    assert r.returncode == 0, r.stderr
    (folder,) = (tmp_path / "runs").iterdir()
    run = read_run(folder)
    assert run.raw.shape == (fs * 2, 1)
    a = run.chain_rows("A")["amplitude"]
    assert abs(a[-1] / (0.1 / np.sqrt(2)) - 1) < 0.01
    assert run.meta["source_info"]["driver"] == "file"


def test_bad_input_gets_one_line_and_status_2(tmp_path):
    cases = [
        (["run", "--input", str(tmp_path / "missing.wav")], "no such file"),
        (["run", "--config", str(tmp_path / "none.toml")], "file not found"),
        (["run", "--duration", "-3"], "must be more than 0 seconds"),
    ]
    (tmp_path / "junk.wav").write_bytes(b"RIFX1234")
    cases.append((["run", "--input", str(tmp_path / "junk.wav")], "byte 0: not a WAV file"))
    for args, words in cases:
        r = livefilt(*args)
        assert r.returncode == 2, (args, r.stderr)
        assert words in r.stderr and "Traceback" not in r.stderr, r.stderr


def test_live_without_display_falls_back_to_the_readout():
    r = livefilt("live", "--duration", "0.5", "--fast")
    assert r.returncode == 0, r.stderr
    assert "no display" in r.stderr and "SNR" in r.stdout


def test_sources_lists_every_driver_without_a_traceback():
    r = livefilt("sources", "-v")
    assert r.returncode == 0, r.stderr
    for name in ("simulated", "file", "soundcard", "serial"):
        assert any(line.startswith(name + ":") for line in r.stdout.splitlines()), r.stdout
    assert "Traceback" not in r.stdout + r.stderr


def test_importing_livefilt_needs_neither_qt_nor_portaudio():
    code = ("import sys, livefilt, livefilt.stream.engine, livefilt.cli, livefilt.acquire.source;"
            "from livefilt.acquire.source import load_driver; [load_driver(n) for n in ('simulated','file','soundcard','serial')];"
            "bad=[m for m in ('PySide6','sounddevice','serial','pyqtgraph') if m in sys.modules];"
            "print(bad); sys.exit(1 if bad else 0)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stdout + r.stderr


def test_ctrl_c_ends_cleanly_and_closes_the_run(tmp_path):
    import signal
    import time
    env = dict(os.environ)
    env.pop("DISPLAY", None)
    p = subprocess.Popen([sys.executable, "-m", "livefilt", "run", "--out", str(tmp_path)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and not any(tmp_path.glob("run-*/raw.wav")):
        time.sleep(0.1)
    time.sleep(1.5)
    p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 0, err
    assert "Traceback" not in err
    (folder,) = tmp_path.glob("run-*")
    run = read_run(folder)
    assert "stopped_utc" in run.meta["run"]
    assert run.raw.shape[0] == run.meta["run"]["frames"] > 0
