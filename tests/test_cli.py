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
    assert "A " in r.stdout and "SNR" in r.stdout and "d=0.400 m" in r.stdout


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
    sw.write(tmp_path / "empty.wav", 48000, np.zeros((0, 2), np.float32))
    cases.append((["run", "--input", str(tmp_path / "empty.wav")], "empty.wav: holds no audio frames"))
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


# -- honest with bad input and in its records ---------------------------------------

def _bench_wav(path, fs=48000, seconds=3.0, scale=1.0, subtype="FLOAT", damage=None):
    """The simulated greenhouse bench written as a WAV file (soundfile)."""
    import soundfile as sf
    from livefilt.drivers.simulated import SimulatedSource
    x = SimulatedSource(fs, pace="fast").generate(0, int(seconds * fs)).astype(np.float32) * scale
    if damage is not None:
        damage(x)
    sf.write(path, x, fs, subtype=subtype)
    return x


def _one_run(out):
    (folder,) = out.iterdir()
    return folder, read_run(folder)


def test_nan_and_inf_are_counted_replaced_and_flagged(tmp_path):
    def damage(x):
        x[960:970, 0] = np.nan  # 10 NaN and 1 Inf at 0.02 s
        x[975, 0] = np.inf
    _bench_wav(tmp_path / "nan.wav", damage=damage)
    _bench_wav(tmp_path / "clean.wav")
    r = livefilt("run", "--input", str(tmp_path / "nan.wav"), "--fast", "--out", str(tmp_path / "o"))
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("non-finite samples (NaN or Inf) in in0 from sample 960: replaced by "
                          "the last finite value held") == 1
    _, run = _one_run(tmp_path / "o")
    assert run.meta["counts"]["nonfinite_samples"] == 11
    rows = run.results
    assert np.all(np.isfinite(rows["amplitude"]))
    flagged = rows["time_s"][rows["nonfinite"] > 0]
    assert flagged.size == 2 and np.all(flagged == 0.05)  # chain A and B, row (0, 0.05 s]
    assert "non-finite 11" in r.stdout
    # the read-out recovers: the last rows match the clean file's within 0.1 %
    livefilt("run", "--input", str(tmp_path / "clean.wav"), "--fast", "--out", str(tmp_path / "c"))
    _, clean = _one_run(tmp_path / "c")
    a, b = run.chain_rows("A")["amplitude"][-1], clean.chain_rows("A")["amplitude"][-1]
    assert abs(a / b - 1) < 1e-3


def test_over_range_input_is_counted_and_flagged(tmp_path):
    _bench_wav(tmp_path / "hot.wav", scale=5.0)
    r = livefilt("run", "--input", str(tmp_path / "hot.wav"), "--fast", "--out", str(tmp_path / "o"))
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("in0 at or beyond full scale") == 1
    _, run = _one_run(tmp_path / "o")
    assert run.meta["counts"]["clipped_samples"] > 0
    assert np.any(run.results["clipped"] > 0)


def test_rate_mismatch_is_said_once_both_ways(tmp_path):
    for file_hz, cfg_hz in ((48000, 96000), (96000, 48000)):
        _bench_wav(tmp_path / "r.wav", fs=file_hz, seconds=0.5)
        cfg = tmp_path / "c.toml"
        from livefilt.config import demo_config, toml_text
        doc = demo_config().to_mapping()
        doc["source"]["rate_hz"] = cfg_hz
        cfg.write_text(toml_text(doc))
        r = livefilt("run", "--config", str(cfg), "--input", str(tmp_path / "r.wav"), "--fast")
        assert r.returncode == 0, r.stderr
        said = f"using {file_hz} Hz, the rate the file source runs at (the config says {cfg_hz} Hz"
        assert r.stderr.count(said) == 1, r.stderr


def test_out_on_a_file_or_a_read_only_folder_is_one_line(tmp_path):
    (tmp_path / "afile").write_text("x")
    r = livefilt("run", "--duration", "0.2", "--fast", "--out", str(tmp_path / "afile"))
    assert r.returncode == 2 and r.stderr.strip().count("\n") == 0
    assert "afile: is a file, not a folder" in r.stderr
    ro = tmp_path / "ro"
    ro.mkdir()
    if os.geteuid() == 0:  # root ignores permission bits: a read-only tmpfs instead
        m = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=1m", "tmpfs", str(ro)],
                           capture_output=True)
        from tests.system import require
        require(m.returncode == 0, "cannot mount a read-only tmpfs here")
    else:
        ro.chmod(0o555)
    try:
        r = livefilt("run", "--duration", "0.2", "--fast", "--out", str(ro))
    finally:
        if os.geteuid() == 0:
            subprocess.run(["umount", str(ro)])
    assert r.returncode == 2, r.stderr
    assert r.stderr.strip().count("\n") == 0 and "Traceback" not in r.stderr
    assert "cannot make a run folder in it (Read-only file system" in r.stderr \
        or "(Permission denied)" in r.stderr


def test_fast_results_are_in_time_order_with_chains_interleaved(tmp_path):
    r = livefilt("run", "--fast", "--duration", "10", "--out", str(tmp_path))
    assert r.returncode == 0, r.stderr
    folder, run = _one_run(tmp_path)
    t = run.results["time_s"]
    assert np.all(np.diff(t) >= 0) and t.size == 2 * 200
    assert list(run.results["chain"][:4]) == ["A", "B", "A", "B"]
    assert r.stderr.strip().splitlines()[-1].endswith(str(folder))  # names the run folder


def test_run_toml_can_be_trusted_later(tmp_path):
    import hashlib
    import tomllib
    from livefilt import __version__
    from livefilt.config import demo_config, toml_text
    doc = demo_config().to_mapping()
    doc["chains"][1]["stages"].append({"type": "rc", "r_ohm": "4k7", "c_farad": "22n"})
    cfg = tmp_path / "c.toml"
    cfg.write_text(toml_text(doc))
    _bench_wav(tmp_path / "in.wav", seconds=0.5)
    r = livefilt("run", "--config", str(cfg), "--input", str(tmp_path / "in.wav"), "--fast",
                 "--out", str(tmp_path / "o"))
    assert r.returncode == 0, r.stderr
    folder, run = _one_run(tmp_path / "o")
    text = (folder / "run.toml").read_text()
    meta = tomllib.loads(text)
    assert meta["run"]["version"] == __version__
    hp = meta["config"]["chains"][0]["stages"][0]
    assert hp == {"type": "highpass", "design": "butterworth", "order": 2, "cutoff_hz": 300.0,
                  "gain_db": 0.0}
    assert meta["config"]["chains"][1]["stages"][-1]["c_farad"] == 2.2e-08
    assert meta["config"]["source"]["loop"] is False  # the driver's defaults too
    assert "2.2e-08" in text and "2.2000000000000002e-08" not in text
    for k in ("crc_errors", "sequence_gaps", "nonfinite_samples", "clipped_samples",
              "dropped_frames"):
        assert meta["counts"][k] == 0
    inp = meta["source_info"]["input"]
    data = (tmp_path / "in.wav").read_bytes()
    assert inp["path"] == str((tmp_path / "in.wav").resolve())
    assert inp["bytes"] == len(data) and inp["sha256"] == hashlib.sha256(data).hexdigest()
    # the simulated bench's distance is a state, not a count
    r = livefilt("run", "--fast", "--duration", "0.3", "--out", str(tmp_path / "s"))
    _, sim = _one_run(tmp_path / "s")
    assert "source_distance_m" not in sim.meta["counts"]
    assert sim.meta["source_status"]["distance_m"] > 0


def test_a_log_has_one_line_per_interval_with_every_field_at_one_index():
    r = livefilt("run", "--fast", "--duration", "2")
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert len(lines) == 40  # 2 s / 0.05 s
    import re
    for k, line in enumerate(lines):
        assert line.startswith(f"t={k * 0.05:9.3f} s  |  d=")
        for field in ("A amp ", "B amp ", "phase ", "noise ", "SNR ", "lock ", "A − B ",
                      "dropped 0", "non-finite 0", "clipped 0"):
            assert field in line, (field, line)
    # fixed significant digits: every amplitude has four (42.00 µFS, 8.524 µFS, 123.4 µFS)
    amps = re.findall(r"amp (\S+) \S*FS", "\n".join(lines[10:]))
    assert amps and all(len(a.replace(".", "").replace("-", "").lstrip("0")) == 4 for a in amps)


def test_the_terminal_table_on_a_pseudo_terminal():
    import pty
    master, slave = pty.openpty()
    p = subprocess.Popen([sys.executable, "-m", "livefilt", "run", "--duration", "1", "--fast"],
                         stdout=slave, stderr=subprocess.DEVNULL)
    os.close(slave)
    out = b""
    while True:
        try:
            chunk = os.read(master, 65536)
        except OSError:
            break
        if not chunk:
            break
        out += chunk
    p.wait(60)
    os.close(master)
    text = out.decode()
    assert "\x1b[2K" in text  # redrawn in place
    last = text.split("elapsed")[-1]
    for field in ("dropped 0", "non-finite 0", "clipped 0", "amplitude (rms)", "reference",
                  "A − B +"):
        assert field in last, last


def test_live_without_a_display_says_how_to_stop():
    r = livefilt("live", "--duration", "0.5", "--fast")
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("Ctrl-C") == 1 and len(r.stdout.splitlines()) == 10
