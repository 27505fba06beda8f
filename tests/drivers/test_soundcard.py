"""Sound-card driver, played and recorded through a real sound server.

The sound tests need PulseAudio with the null sink of ``tests/sound/pulse.pa``
(``bash .ci/setup-sound.sh`` installs and starts it, with an ALSA name
``livefilt_loop`` for it).  They skip on a machine without it and fail in CI
(``tests/system.py``).  No mocks: tones go out through PortAudio, through the
server's float32 loopback, and back through the driver into a real Ring.
"""

import math
import shutil
import subprocess
import sys
import time
import tomllib

import numpy as np
import pytest

from livefilt.dsp.detect import DetectorSpec, ReferenceSpec, make_detector
from livefilt.drivers import soundcard
from livefilt.drivers.soundcard import SoundCardSource
from livefilt.errors import SettingError, SourceError
from livefilt.acquire.ring import Block, Ring
from livefilt.acquire.source import load_driver
from livefilt.config import toml_text as dumps

from tests.system import require

FS = 48000
BLOCK = 256
LOOP = "livefilt_loop"  # the ALSA name of the null sink (tests/sound/asound-livefilt.conf)


# -- helpers: published fits, written here so the check is independent -------
def sine_fit_3(x, f, fs):
    """IEEE Std 1057 three-parameter sine fit at a known frequency.

    Least squares on cos, sin and DC; returns (amplitude, phase_deg, dc) of
    ``amplitude cos(2 pi f n / fs + phase) + dc``.
    """
    n = np.arange(x.size)
    w = 2 * np.pi * f / fs
    m = np.column_stack([np.cos(w * n), np.sin(w * n), np.ones(x.size)])
    (a, b, c), *_ = np.linalg.lstsq(m, x, rcond=None)
    return math.hypot(a, b), math.degrees(math.atan2(-b, a)), c


def sine_fit_4(x, f0, fs, iterations=8):
    """IEEE Std 1057 four-parameter sine fit (frequency fitted, Gauss-Newton).

    Starts at ``f0`` (an FFT peak) and linearises in the frequency step each
    iteration; returns the fitted frequency in Hz.
    """
    t = (np.arange(x.size) - x.size / 2) / fs
    w = 2 * np.pi * f0
    for _ in range(iterations):
        c, s = np.cos(w * t), np.sin(w * t)
        (a, b, _), *_ = np.linalg.lstsq(np.column_stack([c, s, np.ones(x.size)]), x, rcond=None)
        m = np.column_stack([c, s, np.ones(x.size), t * (-a * s + b * c)])
        (_, _, _, dw), *_ = np.linalg.lstsq(m, x, rcond=None)
        w += dw
    return w / (2 * np.pi)


def fft_peak_hz(x, fs):
    spec = np.abs(np.fft.rfft(x * np.hanning(x.size)))
    return np.argmax(spec) * fs / x.size


def record(src, seconds, capacity=None):
    """Start ``src`` into a fresh Ring, wait, stop; return (ring, blocks)."""
    ring = Ring(src.channels, capacity or int(FS * (seconds + 1)))
    src.start(ring)
    time.sleep(seconds)
    src.stop()
    blocks = []
    while (b := ring.read(ring.capacity, min_frames=1, timeout=0.05)) is not None:
        blocks.append(Block(b.data.copy(), b.start_index, b.dropped, list(b.gaps)))
    return ring, blocks


def drive_source(drive, **options):
    options = {"device": LOOP, "drive": drive, **options}
    return SoundCardSource.from_settings(options, FS, BLOCK)


def flags(src):
    """Device flags the driver counted (underflows and overflows, both ways)."""
    return {k: v for k, v in src.status().items() if k.endswith("flows") and v}


def clean_take(make, seconds=None, tries=3):
    """Open (and record) until the driver reports a take free of trouble.

    A stall of a shared machine shows up as counted underflows, a delay it
    could not measure, or a stream that stalled (SourceError); such a take is
    reported, not wrong, so it is taken again.  A take reported clean must pass
    every check.
    """
    seen = []
    for _ in range(tries):
        src = make()
        try:
            src.open()
            trouble = flags(src)
            if src.drive is not None and src.loopback_delay_frames is None:
                trouble["delay"] = src.info()["drive"]["loopback_delay"]
            if not trouble and seconds is not None:
                ring, blocks = record(src, seconds)
                trouble = flags(src)
        except SourceError as exc:
            trouble = {"error": str(exc)}
        src.stop()
        if not trouble:
            return (src, ring, blocks) if seconds is not None else (src, None, None)
        seen.append(trouble)
    pytest.fail(f"every take had trouble the driver reported: {seen}")


# -- no sound server needed ------------------------------------------------------
def test_import_needs_no_portaudio():
    code = ("import sys, livefilt, livefilt.acquire.source, livefilt.drivers.soundcard;"
            "from livefilt.acquire.source import load_driver; load_driver('soundcard');"
            "print('sounddevice' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_registered_and_every_option_documented():
    assert load_driver("soundcard") is SoundCardSource
    doc = soundcard.__doc__
    for key in SoundCardSource.options:
        assert f"\n{key} :" in doc, key
    for key in soundcard._DRIVE_KEYS:
        assert f"``{key}``" in doc, key
    assert "laser diode" in doc  # the safety note


@pytest.mark.parametrize("options, message", [
    ({"chanels": [0]}, r'^chanels = \[0\]: unknown key; a \[source\] table with driver = "soundcard" takes: '
                      r"driver, rate_hz, block, channels, device"),
    ({"channels": [0, 0]}, r"^channels = \[0, 0\]: must not repeat a channel$"),
    ({"channels": "left"}, r"^channels = 'left': must be a list of input channel numbers, 0-based"),
    ({"channels": [-1]}, r"^channels = \[-1\]: must be a list of input channel numbers"),
    ({"reference_channel": 0}, r"^reference_channel = 0: must differ from the detector channels"),
    ({"latency": "medium"}, r"^latency = 'medium': \"low\", \"high\" or seconds"),
    ({"volts_full_scale": -2.0}, r"^volts_full_scale = -2.0: must be volts above 0"),
    ({"device": True}, r"^device = True: must be a part of a device name or its index"),
    ({"drive": 1000}, r"^drive = 1000: must be a table"),
    ({"drive": {"frequency_hz": 30000, "amplitude": 0.5}},
     r"^drive.frequency_hz = 30000: must be at least 0.1 Hz and below Nyquist, 24000 Hz$"),
    ({"drive": {"frequency_hz": 1000}}, r"^drive.amplitude = None: required"),
    ({"drive": {"frequency_hz": 1000, "amplitude": 1.5}},
     r"^drive.amplitude = 1.5: must be above 0 and at most 1"),
    ({"drive": {"frequency_hz": 1000, "amplitude": 0.5, "waveform": "sine", "duty": 0.3}},
     r'^drive.duty = 0.3: only for waveform = "square"$'),
    ({"drive": {"frequency_hz": 1000, "amplitude": 0.5, "duty": 1.0}},
     r"^drive.duty = 1.0: must be above 0 and below 1$"),
    ({"drive": {"frequency_hz": 1000, "amplitude": 0.5, "waveform": "triangle"}},
     r'^drive.waveform = \'triangle\': must be "square" or "sine"$'),
    ({"drive": {"frequency_hz": 1000, "amplitude": 0.5, "shape": "square"}},
     r"^drive.shape = 'square': unknown key; a drive table takes: output_channel, waveform"),
    ({"drive": {"frequency_hz": 1000, "amplitude": 0.5, "output_channel": 1.5}},
     r"^drive.output_channel = 1.5: must be a channel number, 0-based"),
])
def test_bad_options_one_line_errors(options, message):
    with pytest.raises(SettingError, match=message) as err:
        SoundCardSource.from_settings(options, FS, BLOCK)
    assert "\n" not in str(err.value)


def test_drive_table_holds_whole_periods():
    # closed form: f = fs p / q with the table holding p periods in q samples
    spec = soundcard.DriveSpec(0, "square", 1370.0, 0.25, 0.5, None, True)
    table, f = spec.table(FS)
    assert f == 1370.0 and table.size == 4800  # 1370/48000 = 137/4800
    # mean of a +-A square of duty D is A (2 D - 1) (closed form; edge samples
    # sit at the mid level, so the duty holds exactly)
    assert np.mean(table.astype(np.float64)) == pytest.approx(0.5 * (2 * 0.25 - 1), abs=1e-12)
    table, f = soundcard.DriveSpec(0, "sine", 1000.0, 0.5, 0.5, None, True).table(FS)
    assert table.size == 48 and table[0] == np.float32(0.5)  # cos-phased


# -- with the sound server ------------------------------------------------------
@pytest.fixture(scope="module")
def sound():
    """The loopback device, after checking the server and re-reading PortAudio's list."""
    ok = shutil.which("pactl") is not None and subprocess.run(
        ["pactl", "info"], capture_output=True).returncode == 0
    require(ok, "no PulseAudio server (run: bash .ci/setup-sound.sh)")
    try:
        import sounddevice as sd
    except (ImportError, OSError) as exc:
        require(False, f"sounddevice cannot load PortAudio: {exc}")
    # PortAudio lists devices once, at import: re-read them now the server runs
    sd._terminate()
    sd._initialize()
    names = [d["name"] for d in SoundCardSource.probe()]
    require(LOOP in names, f"the null sink's ALSA device {LOOP!r} is not listed: {names}")
    return LOOP


def test_probe_lists_the_null_sink(sound):
    devices = {d["name"]: d for d in SoundCardSource.probe()}
    loop = devices[sound]
    assert loop["input_channels"] >= 2 and loop["output_channels"] >= 2
    assert loop["default_rate_hz"] > 0 and isinstance(loop["index"], int)


def test_device_errors_name_every_candidate(sound):
    inputs = SoundCardSource.probe()
    fits = [d for d in inputs if "ul" in d["name"].lower()]
    assert len(fits) >= 2  # "pulse" and "default"
    with pytest.raises(SettingError, match=rf"^device = 'ul': fits {len(fits)} input devices") as e:
        SoundCardSource.from_settings({"device": "ul"}, FS, BLOCK).open()
    for d in fits:
        assert f"{d['index']}: {d['name']}" in str(e.value)
    with pytest.raises(SettingError, match=r"^device = 'no-such-card': no input device name "
                                           rf"contains it; input devices: .*{sound}"):
        SoundCardSource.from_settings({"device": "no-such-card"}, FS, BLOCK).open()
    with pytest.raises(SettingError, match=r"^device = 999: no input device has this index"):
        SoundCardSource.from_settings({"device": 999}, FS, BLOCK).open()
    with pytest.raises(SettingError, match=rf"^channels = \[0, 99\]: device '{sound}' has \d+ input"):
        SoundCardSource.from_settings({"device": sound, "channels": [0, 99]}, FS, BLOCK).open()
    # a rate PortAudio refuses: its error, converted in one place, one line
    with pytest.raises(SourceError, match=rf"^cannot open '{sound}' at 400000 Hz: .*sample rate"):
        src = SoundCardSource.from_settings({"device": sound}, 400000, BLOCK)
        try:
            src.open()
        finally:
            src.stop()


def test_sine_drive_recovered_by_lockin(sound):
    src, ring, blocks = clean_take(
        lambda: drive_source({"waveform": "sine", "frequency_hz": 1370.0, "amplitude": 0.5}), 1.2)
    delay = src.loopback_delay_frames
    hint = src.reference_hint
    assert delay is not None and delay > 0
    assert hint["frequency_hz"] == 1370.0
    print(f"loopback delay {delay} frames ({1e3 * delay / FS:.2f} ms), hint {hint}")
    assert [b.dropped for b in blocks] == [0] * len(blocks) and ring.device_events == 0
    assert blocks[0].start_index == 0
    x = np.concatenate([b.data[:, 0] for b in blocks]).astype(np.float64)
    assert x.size > FS

    # the float32 loopback is bit-exact and the ring starts D frames after the
    # drive table restarts: ring sample n is table sample n (closed form)
    table, _ = soundcard.DriveSpec(0, "sine", 1370.0, 0.5, 0.5, None, True).table(FS)
    assert np.array_equal(x, table[np.arange(x.size) % table.size])

    # the project's lock-in, referenced with the hint: RMS amplitude A / sqrt(2)
    # (livefilt.dsp.detect's stated convention) within 1 %, phase 0 (loop adds none)
    spec = DetectorSpec("lockin", time_constant_s=0.01, slope_db_oct=24)
    lockin = make_detector(spec, ReferenceSpec(hint["frequency_hz"], hint["phase_deg"]), FS, 480)
    rows = lockin.process(x, 0)
    settled = rows[rows["index"] > lockin.settling_s(0.9999) * FS]
    assert settled.size > 20
    amp = settled["amplitude"]
    print(f"lock-in amplitude {amp.mean():.9f} (expect {0.5 / math.sqrt(2):.9f}), "
          f"phase {settled['phase_deg'].mean():.2e} deg")
    assert np.all(np.abs(amp / (0.5 / math.sqrt(2)) - 1) < 0.01)
    assert np.all(np.abs(settled["phase_deg"]) < 0.1)

    # IEEE Std 1057 three-parameter fit: peak amplitude 0.5 within 1 %, phase = hint
    a, phase, dc = sine_fit_3(x, hint["frequency_hz"], FS)
    assert abs(a / 0.5 - 1) < 0.01 and abs(phase - hint["phase_deg"]) < 0.1 and abs(dc) < 1e-3
    # frequency: IEEE Std 1057 four-parameter fit from the FFT peak
    f_fit = sine_fit_4(x, fft_peak_hz(x, FS), FS)
    print(f"3-parameter amplitude error {a / 0.5 - 1:.2e}; 4-parameter frequency {f_fit!r} Hz")
    assert abs(f_fit - 1370.0) < 1e-6


def test_square_drive_in_volts_with_reference_channel(sound):
    # drive on output 1, detector on input 1, input 0 as a (silent) reference channel
    src, ring, blocks = clean_take(lambda: drive_source(
        {"output_channel": 1, "frequency_hz": 1000.0, "duty": 0.25, "amplitude": 0.4},
        channels=[1], reference_channel=0, volts_full_scale=2.0), 0.6)
    assert src.units == "V" and src.channel_names == ["in1", "reference"]
    data = np.concatenate([b.data for b in blocks]).astype(np.float64)
    x = data[:, 0]
    assert not data[:, 1].any()
    # +-0.4 FS levels at 2 V per full scale (scaled in float32), 0 on an edge sample
    level = float(np.float32(0.4) * np.float32(2.0))
    assert set(np.unique(x)) <= {-level, 0.0, level}
    # mean of a +-A square of duty D: A (2 D - 1) (closed form), over whole periods
    whole = x[:x.size - x.size % 48]
    assert np.mean(whole) == pytest.approx(level * (2 * 0.25 - 1), abs=1e-6)
    # Fourier series of a +-A square of duty D (common practice): fundamental
    # (4 A / pi) sin(pi D), cos-phased when the high part is centred on phase 0
    a, phase, _ = sine_fit_3(x, 1000.0, FS)
    expect = 4 * 0.8 / math.pi * math.sin(math.pi * 0.25)
    assert abs(a / expect - 1) < 0.01
    assert abs(phase - src.reference_hint["phase_deg"]) < 0.1

    info = src.info()
    assert tomllib.loads(dumps({"source": info}))["source"] == info  # fits run.toml
    assert info["units"] == "V" and info["volts_full_scale"] == 2.0
    assert info["drive"]["loopback_delay_frames"] == src.loopback_delay_frames
    assert info["drive"]["frequency_hz"] == 1000.0 and info["drive"]["duty"] == 0.25
    assert info["input_overflows"] == 0 and info["output_underflows"] == 0


def test_loopback_delay_stable_between_opens(sound):
    # On a quiet machine every open measures the same delay to the frame.  On
    # a loaded one the server's start-up can hold one stream's output back by
    # whole blocks (seen: 7679 vs 6400 frames, 5 blocks of 256), with no flag;
    # so of three opens, two must agree within a few frames.
    delays = []
    for _ in range(3):
        src, _, _ = clean_take(
            lambda: drive_source({"waveform": "sine", "frequency_hz": 997.0, "amplitude": 0.3}))
        delays.append(src.loopback_delay_frames)
        assert src.info()["drive"]["loopback_delay_s"] == pytest.approx(delays[-1] / FS)
        if len(delays) == 2 and abs(delays[0] - delays[1]) <= 4:
            break
    print(f"loopback delays of successive opens: {delays} frames")
    assert any(abs(a - b) <= 4 for i, a in enumerate(delays) for b in delays[i + 1:])


def test_starved_consumer_marks_overrun_gaps(sound):
    # input only; the ring holds two blocks and nobody reads for 0.4 s
    src = SoundCardSource.from_settings({"device": sound}, FS, BLOCK)
    src.open()
    assert src.reference_hint is None
    ring = Ring(1, 2 * BLOCK)
    src.start(ring)
    time.sleep(0.4)
    status = src.status()
    src.stop()
    assert status["state"] == "running" and status["ring_overruns"] > 0
    assert ring.overrun_frames > 0
    blocks = []
    while (b := ring.read(BLOCK, min_frames=1, timeout=0.05)) is not None:
        blocks.append(b.start_index + b.frames)
        if b.dropped:
            break
    # the kept frames come first (indices 0..511), then the gap, counted in the index
    assert b is not None and b.gaps[0][0] == "overrun" and b.dropped == ring.overrun_frames
    assert blocks[-2] == 2 * BLOCK and b.start_index == 2 * BLOCK + b.dropped


def test_output_underflow_counted_and_marked(sound):
    # hold the interpreter lock for 1.5 s: the audio callback cannot run, a
    # real output underflow follows; measure_delay off (no phase in the hint)
    src = drive_source({"waveform": "sine", "frequency_hz": 1000.0, "amplitude": 0.2,
                        "measure_delay": False})
    src.open()
    assert src.reference_hint == {"frequency_hz": 1000.0}
    ring = Ring(1, FS * 4)
    src.start(ring)
    time.sleep(0.2)
    switch = sys.getswitchinterval()
    sys.setswitchinterval(3.0)
    try:
        t0 = time.monotonic()
        while time.monotonic() - t0 < 1.5:
            pass
    finally:
        sys.setswitchinterval(switch)
    time.sleep(0.3)
    status, info = src.status(), src.info()
    src.stop()
    notes = []
    while (b := ring.read(ring.capacity, min_frames=1, timeout=0.05)) is not None:
        notes += [g[2] for g in b.gaps]
    print(f"status after the stall: {status}")
    stalls = status["output_underflows"] + status["input_overflows"]
    assert stalls > 0 and info["output_underflows"] == status["output_underflows"]
    assert notes.count("output underflow") == status["output_underflows"]
    assert notes.count("input overflow") == status["input_overflows"]
    assert info["drive"]["loopback_delay"].startswith("measurement off")

