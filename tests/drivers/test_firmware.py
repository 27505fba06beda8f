"""The reference firmware: built with -Werror, within budget, and run for 10
simulated seconds in simavr straight into the serial driver.

Chain under test: firmware.c (avr-gcc) -> simavr, ADC0 fed a known sine by
simhost.c -> UART bytes -> pseudo-terminal -> SerialSource (pyserial, by path)
-> Ring.  Needs the tools of .ci/setup-firmware.sh; skips without them on a
laptop, fails in CI (tests/system.py).
"""

import os
import pathlib
import re
import shutil
import subprocess
import time
import tty

import numpy as np
import pytest

from livefilt.acquire.ring import Ring
from livefilt.drivers.serialport import SerialSource

from tests.system import require

FIRMWARE = pathlib.Path(__file__).resolve().parents[2] / "drivers" / "firmware"
BUILD = FIRMWARE / "build"
FLASH_BUDGET, RAM_BUDGET = 2048, 512  # bytes; the ATmega328P has 32 KB and 2 KB
SINE_HZ, SINE_V, OFFSET_V = 123.0, 1.0, 2.5
SIM_S = 10.003  # 10 s of frames plus the last frame's time on the wire (0.8 ms)
RATE_HZ, BLOCK, MOD_HZ = 8000.0, 16, 500.0  # what firmware.c is built for
pytestmark = [pytest.mark.system]


def _make(*target):
    require(shutil.which("make") is not None and shutil.which("avr-gcc") is not None,
            "avr-gcc or make missing: run .ci/setup-firmware.sh as root")
    run = subprocess.run(["make", "-C", str(FIRMWARE), *target], capture_output=True,
                         text=True, timeout=120)
    assert run.returncode == 0, run.stdout + run.stderr
    return run.stdout


@pytest.fixture(scope="module")
def firmware():
    return _make(), BUILD / "firmware.elf"


@pytest.fixture(scope="module")
def simhost(firmware):
    require(subprocess.run(["pkg-config", "--exists", "simavr"]).returncode == 0
            if shutil.which("pkg-config") else False,
            "libsimavr-dev missing: run .ci/setup-firmware.sh as root")
    _make("simhost")
    return BUILD / "simhost"


def test_builds_with_werror_within_budget(firmware):
    out, elf = firmware
    assert elf.exists()
    src = (FIRMWARE / "Makefile").read_text()
    assert "-Wall -Wextra -Werror" in src
    size = subprocess.run(["avr-size", str(elf)], capture_output=True, text=True, check=True)
    text, data, bss = (int(v) for v in size.stdout.splitlines()[1].split()[:3])
    flash, ram = text + data, data + bss  # avr-size Berkeley columns (binutils manual)
    assert f"flash {flash} bytes, RAM {ram} bytes" in _make("size")
    assert flash <= FLASH_BUDGET, f"flash {flash} B over the {FLASH_BUDGET} B budget"
    assert ram <= RAM_BUDGET, f"RAM {ram} B over the {RAM_BUDGET} B budget"


def sine_fit_4(t, y, iterations=20):
    """Four-parameter sine fit (amplitude, phase, offset, frequency).

    The least-squares algorithm of IEEE Std 1057 (four-parameter fit; clause
    number from memory: 4.1.3.3 in the 1994 edition): an initial frequency from
    the largest DFT bin (refined by a parabola through the neighbouring bins'
    magnitudes), a three-parameter fit there, then all four refined by
    linearising in the frequency step (Gauss-Newton).  ``t`` evenly spaced.
    Returns (amplitude, frequency_hz, offset, residual rms).
    """
    spectrum = np.abs(np.fft.rfft(y - y.mean()))
    k = int(np.argmax(spectrum[1:-1])) + 1
    lo, mid, hi = spectrum[k - 1:k + 2]
    shift = 0.5 * (lo - hi) / (lo - 2 * mid + hi)
    w = 2 * np.pi * (k + shift) / (len(y) * (t[1] - t[0]))
    for step in range(iterations + 1):
        c, s = np.cos(w * t), np.sin(w * t)
        cols = [c, s, np.ones_like(t)]
        if step:
            cols.append(t * (-a * s + b * c))
        x = np.linalg.lstsq(np.column_stack(cols), y, rcond=None)[0]
        a, b = x[0], x[1]
        if len(x) == 4:
            w += x[3]
            if abs(x[3]) < 1e-12 * w:
                break
    resid = y - (a * np.cos(w * t) + b * np.sin(w * t) + x[2])
    return np.hypot(a, b), w / (2 * np.pi), x[2], np.sqrt(np.mean(resid ** 2))


def test_sine_fit_recovers_a_known_sine():
    t = np.arange(4000) / 8000.0
    y = 0.3 + 0.7 * np.sin(2 * np.pi * 51.3 * t + 0.4)
    amp, f, off, rms = sine_fit_4(t, y)
    assert (amp, f, off) == pytest.approx((0.7, 51.3, 0.3), rel=1e-9)
    assert rms < 1e-9


def test_firmware_streams_ten_simulated_seconds(simhost, firmware):
    master, slave = os.openpty()
    tty.setraw(slave)  # raw before any byte arrives (no echo, no CR/LF rewriting)
    src = SerialSource.from_settings({"port": os.ttyname(slave)}, rate_hz=0, block=64)
    args = [str(simhost), str(firmware[1]), "--seconds", str(SIM_S), "--fd", str(master),
            "--sine-hz", str(SINE_HZ), "--sine-mv", str(SINE_V * 1000),
            "--offset-mv", str(OFFSET_V * 1000)]
    t0 = time.monotonic()
    sim = subprocess.Popen(args, pass_fds=(master,), stdout=subprocess.DEVNULL,
                           stderr=subprocess.PIPE, text=True)
    try:
        src.open()
        os.close(slave)
        slave = None
        ring = Ring(src.channels, 1 << 17)
        src.start(ring)
        _, err = sim.communicate(timeout=60)
        deadline = time.monotonic() + 10
        while src.status()["last_seq"] != 4999 and time.monotonic() < deadline:
            time.sleep(0.02)
        wall = time.monotonic() - t0
    finally:
        if sim.poll() is None:
            sim.kill()
        src.stop()
        os.close(master)
        if slave is not None:
            os.close(slave)
    assert sim.returncode == 0, err
    speed = float(re.search(r"\(([\d.]+)x real time\)", err).group(1))
    print(f"\n{err.strip()}; whole chain {wall:.2f} s wall")
    print("status:", src.status())

    # the self-description, as firmware.c is built
    d = src.description
    assert (d.rate_hz, d.block, d.channels, d.adc_bits, d.vref_v) == (RATE_HZ, BLOCK, 1, 10, 5.0)
    assert (d.modulation_hz, d.led_pin, d.led_bit) == (MOD_HZ, "PB5", 15)
    assert src.channel_names == ["adc0", "led"] and src.reference_hint == {"frequency_hz": MOD_HZ}

    # frame count and an unbroken sequence: 10 s at 500 frames/s is seq 0..4999
    st = src.status()
    assert st["last_seq"] == 4999
    assert (st["crc_errors"], st["seq_gaps"], st["lost_frames"], st["garbage_bytes"]) == (0,) * 4
    assert st["frames"] == (5000 - st["first_seq"]) * BLOCK
    blocks = []
    while (b := ring.read(1 << 17, min_frames=1, timeout=0.05)) is not None:
        assert b.dropped == 0
        blocks.append(b.data.copy())
    data = np.concatenate(blocks)
    assert data.shape[0] == st["frames"]

    # ADC0: the 123 Hz sine, 1 V amplitude around 2.5 V, within the ADC's step
    lsb = 5.0 / 1024
    t = np.arange(data.shape[0]) / RATE_HZ
    amp, f, off, rms = sine_fit_4(t, data[:, 0].astype(np.float64))
    print(f"fit: {amp:.5f} V at {f:.6f} Hz, offset {off:.5f} V, residual {rms * 1e3:.3f} mV")
    # simavr 1.6 converts with 1023 / vref per volt where the ATmega328P datasheet
    # (ADC section) says 1024 / vref: a 0.1 % gain error, under one step here
    assert amp == pytest.approx(SINE_V, abs=lsb)
    assert f == pytest.approx(SINE_HZ, abs=1e-4)  # one clock drives simulator and sampling
    assert off == pytest.approx(OFFSET_V - lsb / 2, abs=lsb)  # truncating ADC: -1/2 LSB
    # ideal quantisation noise lsb/sqrt(12) (IEEE Std 1241, q^2/12); allow 1.5x
    assert rms < 1.5 * lsb / np.sqrt(12)

    # the LED bit: a square wave at the modulation frequency, high half the time
    led = data[:, 1]
    rises = np.flatnonzero(np.diff(led) > 0)
    f_led = (len(rises) - 1) * RATE_HZ / (rises[-1] - rises[0])
    assert f_led == pytest.approx(MOD_HZ, rel=1e-9)
    assert led.mean() == pytest.approx(0.5, abs=1e-3)
    assert speed > 2.0  # faster than real time, else the 10 s run would not fit the suite
