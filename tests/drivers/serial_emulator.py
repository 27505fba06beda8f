"""A board on the far end of a pseudo-terminal, for the serial driver's tests.

:class:`BoardEmulator` owns a pty pair; the driver opens the slave side by its
path (or by a symlink the emulator re-points, so a "new" board can appear at
the same path).  A thread writes frames of the wire protocol (or text lines)
paced at the board's rate, and does on purpose what a bad cable does:
corrupt a frame, drop frames, insert stray bytes, stall mid-frame.

Sample word of frame ``seq``, sample ``k`` (see :func:`board_words`): the
running sample number modulo 1024 in the ADC bits, and the LED state in bit
15, so a test can tell exactly which samples reached the ring.
"""

from __future__ import annotations

import os
import select
import threading
import time
import tty

import numpy as np

from livefilt.drivers import wire

__all__ = ["BoardEmulator", "board_words", "BOARD", "STRAY"]

#: The emulated board: 4 kHz, one 10-bit channel, frames of 8 samples, LED at 250 Hz.
BOARD = wire.Description(rate_hz=4000.0, channels=1, block=8, adc_bits=10, vref_v=5.0,
                         modulation_hz=250.0, led_channel=0, led_bit=15, led_pin="PB5",
                         name="pty test board")
#: Stray bytes for injection; none is 0xE7, the first sync byte, so they can
#: never start a false frame and the garbage count stays exact.
STRAY = bytes(b for b in range(256) if b != wire.SYNC[0])


def board_words(seq: int, desc: wire.Description = BOARD) -> np.ndarray:
    """The words of sample frame ``seq``, shape (block, channels)."""
    n = seq * desc.block + np.arange(desc.block)
    half = round(desc.rate_hz / desc.modulation_hz / 2)
    led = ((n // half) % 2 == 0).astype(np.uint16) << desc.led_bit
    words = (n % 1024).astype(np.uint16) | led
    return np.repeat(words[:, None], desc.channels, axis=1)


class BoardEmulator:
    """A paced board behind a pty.

    Parameters
    ----------
    frames : int
        Sample frames to send after :meth:`release` (framed), or ignored for text.
    start_seq : int
        Sequence number of the first sample frame.
    link : str, optional
        Path of a symlink pointed (atomically) at this board's pty.
    lines : list of bytes, optional
        Text mode: these lines (each ending in LF) are sent instead of frames,
        paced at ``desc.rate_hz`` lines per second.
    corrupt, drop : set of int
        By position after :meth:`release` (0, 1, ...): frames whose payload gets one byte flipped after the CRC was computed /
        which are not sent at all.
    garbage : dict int -> bytes
        Bytes written right after the frame at that position.
    stall : dict int -> float
        The frame at that position is written in two halves with this pause (s) between.
    describe_every : int
        A self-description goes out before every this many sample frames.
    clock_ppm : float
        The board's clock runs this many ppm fast: it sends at
        ``rate_hz * (1 + clock_ppm / 1e6)`` while describing ``rate_hz``.
    """

    def __init__(self, frames: int = 0, start_seq: int = 0, link: str | None = None,
                 lines: list[bytes] | None = None, desc: wire.Description = BOARD,
                 corrupt=(), drop=(), garbage=None, stall=None, describe_every: int = 100,
                 clock_ppm: float = 0.0):
        self.desc = desc
        self.clock_ppm = float(clock_ppm)
        self.frames = frames
        self.start_seq = start_seq
        self.lines = lines
        self.corrupt, self.drop = set(corrupt), set(drop)
        self.garbage, self.stall = dict(garbage or {}), dict(stall or {})
        self.describe_every = describe_every
        self.master, self._slave = os.openpty()
        tty.setraw(self._slave)  # no echo, no CR/LF rewriting before the driver opens it
        os.set_blocking(self.master, False)
        self.path = os.ttyname(self._slave)
        self.link = link
        if link:
            tmp = f"{link}.new"
            os.symlink(self.path, tmp)
            os.replace(tmp, link)
        #: monotonic time the last sample frame (or line) was written
        self.last_write = 0.0
        self.sent = 0
        self._go = threading.Event()
        self._halt = threading.Event()
        self._thread = threading.Thread(target=self._run, name="board emulator", daemon=True)

    @property
    def port(self) -> str:
        """The path the driver should open."""
        return self.link or self.path

    def start(self) -> "BoardEmulator":
        """Power on: until :meth:`release`, only self-descriptions are sent."""
        self._thread.start()
        return self

    def release(self) -> None:
        """Start sending samples."""
        self._go.set()

    def join(self, timeout: float = 10.0) -> None:
        self._thread.join(timeout)

    def close(self) -> None:
        """Unplug: stop the thread and close both ends of the pty."""
        self._halt.set()
        self._go.set()
        if self._thread.is_alive():
            self._thread.join(5.0)
        for fd in (self.master, self._slave):
            try:
                os.close(fd)
            except OSError:
                pass

    # -- thread -------------------------------------------------------
    def _run(self) -> None:
        try:
            while not self._go.wait(0.05):
                if self.lines is None:
                    self._write(wire.build_description(self.desc, self.start_seq))
            if self.lines is not None:
                self._send_lines()
            else:
                self._send_frames()
        except OSError:
            pass  # the test closed the pty under us

    def _send_frames(self) -> None:
        period = self.desc.block / (self.desc.rate_hz * (1 + self.clock_ppm * 1e-6))
        t0 = time.monotonic()
        for i in range(self.frames):
            if self._halt.is_set():
                return
            seq = (self.start_seq + i) % wire.SEQ_MODULO
            self._pace(t0 + i * period)
            if i % self.describe_every == 0:
                self._write(wire.build_description(self.desc, seq))
            if i not in self.drop:
                frame = bytearray(wire.build_samples(seq, board_words(seq, self.desc)))
                if i in self.corrupt:
                    frame[wire.HEADER_BYTES + 1] ^= 0x40  # a payload byte, after the CRC
                if i in self.stall:
                    half = len(frame) // 2
                    self._write(bytes(frame[:half]))
                    time.sleep(self.stall[i])
                    frame = frame[half:]
                self._write(bytes(frame))
            if i in self.garbage:
                self._write(self.garbage[i])
            self.last_write = time.monotonic()
            self.sent += 1

    def _send_lines(self) -> None:
        period = 1.0 / self.desc.rate_hz
        t0 = time.monotonic()
        for i, line in enumerate(self.lines):
            if self._halt.is_set():
                return
            self._pace(t0 + i * period)
            self._write(line)
            self.last_write = time.monotonic()
            self.sent += 1

    def _pace(self, when: float) -> None:
        delay = when - time.monotonic()
        if delay > 0:
            time.sleep(delay)

    def _write(self, data: bytes) -> None:
        view = memoryview(data)
        while view and not self._halt.is_set():
            _, ready, _ = select.select([], [self.master], [], 0.5)
            if not ready:
                continue
            n = os.write(self.master, view)
            view = view[n:]
