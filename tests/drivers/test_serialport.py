"""The serial driver against a board emulator on a real pseudo-terminal.

No mocks: pyserial opens the pty slave by path, the driver's reader thread
writes into a real Ring, and the emulator (tests/serial_emulator.py) injects
the faults whose counts we then expect back exactly.
"""

import time

import numpy as np
import pytest

from livefilt.errors import SettingError, SourceError
from livefilt.acquire.ring import Ring
from livefilt.acquire.source import load_driver

from livefilt.drivers import wire
from livefilt.drivers.serialport import DEFAULT_BAUD, SerialSource

from .serial_emulator import BOARD, STRAY, BoardEmulator, board_words

BLOCK = BOARD.block


def _until(check, timeout=5.0, what="condition"):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.01)
    raise AssertionError(f"timed out waiting for {what}")


def _drain(ring):
    """Every block in the ring: (start_index, data copy, dropped, gaps)."""
    out = []
    while True:
        b = ring.read(1 << 20, min_frames=1, timeout=0.05)
        if b is None:
            return out
        out.append((b.start_index, b.data.copy(), b.dropped, list(b.gaps)))


def _check_samples(blocks, first_seq=0):
    """Each sample in the ring is the one its running index says (no splice)."""
    for index, data, _, _ in blocks:
        n = first_seq * BLOCK + index + np.arange(data.shape[0])
        np.testing.assert_array_equal(np.round(data[:, 0] * 1024 / BOARD.vref_v), n % 1024)
        half = round(BOARD.rate_hz / BOARD.modulation_hz / 2)
        np.testing.assert_array_equal(data[:, 1], (n // half) % 2 == 0)


def _framed(port, **extra):
    return SerialSource.from_settings({"port": port, **extra}, rate_hz=0, block=64)


def test_registry_names_the_driver():
    assert load_driver("serial") is SerialSource
    assert set(SerialSource.options) >= {"port", "baud", "format", "channels"}
    for key in SerialSource.options:  # every option documented in the module header
        assert f"\n{key} :" in __import__("livefilt.drivers.serialport",
                                          fromlist=["x"]).__doc__


def test_counts_equal_what_was_injected():
    board = BoardEmulator(frames=300, corrupt={40, 90}, drop={60, 61, 62, 150},
                          garbage={100: STRAY[:17], 200: STRAY[100:105]},
                          stall={120: 0.03}).start()
    src = _framed(board.port)
    try:
        src.open()
        assert src.channel_names == ["adc0", "led"] and src.units == "V"
        assert src.rate_hz == 4000.0 and src.reference_hint == {"frequency_hz": 250.0}
        ring = Ring(src.channels, 1 << 14)
        src.start(ring)
        board.release()
        _until(lambda: src.status()["last_seq"] == 299, what="the last frame")
    finally:
        src.stop()
        board.close()
    st = src.status()
    assert (st["crc_errors"], st["seq_gaps"], st["garbage_bytes"]) == (2, 4, 22)
    assert st["lost_frames"] == 6 * BLOCK
    assert st["frames"] == (300 - 6) * BLOCK
    assert st["first_seq"] == 0 and "at byte" in st["last_problem"]
    blocks = _drain(ring)
    _check_samples(blocks)
    assert sum(b[2] for b in blocks) == 6 * BLOCK
    gaps = [g for b in blocks for g in b[3]]
    assert [g[1] for g in gaps] == [BLOCK, 3 * BLOCK, BLOCK, BLOCK]
    last_index, last_data = blocks[-1][0], blocks[-1][1]
    assert last_index + last_data.shape[0] == 300 * BLOCK
    info = src.info()
    assert info["crc_errors"] == 2 and info["board"] == "pty test board"


def test_unplug_waits_then_reconnects_and_marks_the_gap(tmp_path):
    link = str(tmp_path / "board")
    first = BoardEmulator(frames=100, link=link).start()
    src = _framed(link)
    second = None
    try:
        src.open()
        ring = Ring(src.channels, 1 << 14)
        src.start(ring)
        first.release()
        _until(lambda: src.status()["last_seq"] == 99, what="the first board's frames")
        first.close()  # unplugged
        _until(lambda: src.status()["state"] == "waiting for the device", what="the loss")
        time.sleep(0.3)
        # the board kept sampling while away: its counter moved on with time
        second = BoardEmulator(frames=50, link=link).start()
        _until(lambda: src.status()["state"] == "streaming", what="the reconnection")
        away_s = time.monotonic() - first.last_write + BLOCK / BOARD.rate_hz
        second.start_seq = 100 + round(away_s * BOARD.rate_hz / BLOCK)
        second.release()
        _until(lambda: src.status()["last_seq"] == second.start_seq + 49,
               what="the second board's frames")
    finally:
        src.stop()
        first.close()
        if second is not None:
            second.close()
    st = src.status()
    lost = (second.start_seq - 100) * BLOCK
    assert st["reconnects"] == 1 and st["lost_frames"] == lost
    assert (st["crc_errors"], st["seq_gaps"], st["garbage_bytes"]) == (0, 0, 0)
    blocks = _drain(ring)
    _check_samples(blocks)
    gaps = [g for b in blocks for g in b[3]]
    assert len(gaps) == 1 and gaps[0][1] == lost and "sequence counter" in gaps[0][2]
    assert st["frames"] == 150 * BLOCK


def test_text_mode_counts_bad_lines():
    good = [f"{i},{-i}\r\n".encode() for i in range(200)]
    bad_at = {50: b"ready\r\n", 120: b"1,2,3\n", 121: b"7,x\n"}
    lines = [b"nner from before the port was opened\n"]
    for i, line in enumerate(good):
        lines.extend([bad_at[i]] if i in bad_at else [])
        lines.append(line)
    board = BoardEmulator(lines=lines, desc=BOARD).start()
    src = SerialSource.from_settings({"port": board.port, "format": "text", "channels": 2,
                                      "full_scale": 1000}, rate_hz=2000, block=64)
    try:
        src.open()
        ring = Ring(src.channels, 4096)
        src.start(ring)
        board.release()
        _until(lambda: src.status()["frames"] == 200, what="the text lines")
    finally:
        src.stop()
        board.close()
    st = src.status()
    assert st["text_bad_lines"] == 3 and st["skipped_bytes"] == len(lines[0])
    assert "line" in st["last_problem"] and "at byte" in st["last_problem"]
    blocks = _drain(ring)
    values = np.concatenate([b[1] for b in blocks])
    np.testing.assert_allclose(values[:, 0], np.arange(200) / 1000, rtol=1e-6)
    np.testing.assert_allclose(values[:, 1], -np.arange(200) / 1000, rtol=1e-6)
    notes = [g[2] for b in blocks for g in b[3]]
    assert len(notes) == 3 and sum(b[2] for b in blocks) == 3
    assert "line 51 " in notes[0]  # the first whole line is line 1


def test_open_names_the_port_and_what_came():
    board = BoardEmulator(lines=[b"12,13\n"] * 400).start()
    board.release()
    try:
        with pytest.raises(SourceError, match=r"no self-description within 0.5 s .*"
                                              r"looks like text"):
            _framed(board.port, describe_timeout_s=0.5).open()
    finally:
        board.close()
    with pytest.raises(SourceError, match="/nonexistent/tty.*cannot open"):
        _framed("/nonexistent/tty").open()


@pytest.mark.parametrize("options, field", [
    ({}, "port"),
    ({"port": "/dev/x", "format": "csv"}, "format"),
    ({"port": "/dev/x", "baud": 0}, "baud"),
    ({"port": "/dev/x", "parity": "N"}, "parity"),
    ({"port": "/dev/x", "channels": 2}, "channels"),
    ({"port": "/dev/x", "format": "text", "channels": 0}, "channels"),
    ({"port": "/dev/x", "describe_timeout_s": -1}, "describe_timeout_s"),
])
def test_settings_are_checked(options, field):
    with pytest.raises(SettingError) as err:
        SerialSource.from_settings(options, rate_hz=1000, block=64)
    assert err.value.field == field


def test_text_needs_a_rate_and_defaults_suit_the_firmware():
    with pytest.raises(SettingError, match="rate_hz"):
        SerialSource.from_settings({"port": "/dev/x", "format": "text"}, rate_hz=0, block=64)
    src = _framed("loop://")
    assert src.baud == DEFAULT_BAUD == 500_000 and src.format == "framed"


def test_probe_lists_ports():
    ports = SerialSource.probe()
    assert all("name" in p and "description" in p for p in ports)


def test_emulator_words_match_the_wire_layout():
    words = board_words(3)
    assert words.shape == (BLOCK, 1)
    frame = wire.build_samples(3, words)
    parser = wire.FrameParser(BOARD)
    (ev,) = parser.feed(frame)
    np.testing.assert_array_equal(ev.words, words)
