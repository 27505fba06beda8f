"""Single-producer single-consumer sample ring between a driver and the engine.

The producer (a driver's thread or audio callback) calls :meth:`Ring.write`
and, for events it learns of (a device overflow, a gap in a serial stream),
:meth:`Ring.mark_gap`.  The consumer (the engine thread) calls :meth:`Ring.read`.

Rules
-----
- ``write`` never blocks and never overwrites unread samples: frames that do
  not fit are dropped, counted in :attr:`Ring.overrun_frames` /
  :attr:`Ring.overruns`, and the next block read carries ``dropped`` > 0.
- Every frame has a running sample index (:attr:`Block.start_index`) that
  counts acquired time, dropped frames included, so a reference oscillator
  stays in phase across a loss.
- A block returned by ``read`` is always contiguous in time: a read stops
  short at a gap, and the next block reports the gap.

Only two integers are shared (write and read positions), each written by one
side only; under CPython's GIL a plain attribute store is atomic, which is
what makes this lock-free hand-over safe.  The consumer waits on an Event;
a producer that must not overrun (a file or simulation as fast as it is
read) waits on another, set at each read (:meth:`Ring.wait_for_room`).
"""

from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Ring", "Block", "GAP_OVERRUN", "GAP_DEVICE"]

#: Frames were dropped because the ring was full (the consumer fell behind).
GAP_OVERRUN = "overrun"
#: The driver reported lost or missing samples (device overflow, serial gap).
GAP_DEVICE = "device"


@dataclass
class Block:
    """A contiguous run of frames handed to the consumer.

    Attributes
    ----------
    data : ndarray, shape (n, channels), float32
        A view into the consumer's buffer, valid until the next ``read``.
    start_index : int
        Sample index of ``data[0]`` (acquired time, dropped frames included).
    dropped : int
        Frames lost immediately before this block (0 when none).
    gaps : list of (kind, frames, note)
        The events behind ``dropped`` (and zero-length events such as a
        driver's status flag), in order.
    """

    data: np.ndarray
    start_index: int
    dropped: int = 0
    gaps: list = field(default_factory=list)

    @property
    def frames(self) -> int:
        return self.data.shape[0]


class Ring:
    """Lock-free SPSC ring of float32 frames.

    Parameters
    ----------
    channels : int
        Channels per frame.
    capacity : int
        Frames the ring holds; a power of two is not required.
    """

    def __init__(self, channels: int, capacity: int):
        if channels < 1 or capacity < 2:
            raise ValueError("a ring needs at least one channel and two frames")
        self.channels = int(channels)
        self.capacity = int(capacity)
        # np.full writes every page now (np.zeros maps them on first touch): the
        # first pass of a stream over the ring takes no page faults, which on
        # two cores also stalled the engine's threads (common real-time audio practice)
        self._buf = np.full((self.capacity, self.channels), 0.0, dtype=np.float32)
        self._out = np.zeros((self.capacity, self.channels), dtype=np.float32)
        self._w = 0  # frames written in total (producer only)
        self._r = 0  # frames read in total (consumer only)
        self._lost_total = 0  # frames dropped in total (producer only)
        # (write position, frames lost, kind, note); appended by the producer
        self._events: deque = deque()
        self._ready = threading.Event()
        self._room = threading.Event()  # set by each read: room for the producer
        self._closed = False
        #: Number of times the producer found the ring full.
        self.overruns = 0
        #: Frames dropped because the ring was full.
        self.overrun_frames = 0
        #: Frames the driver reported lost (device overflow, serial gap).
        self.device_lost_frames = 0
        #: Zero-length device events (status flags with no known frame count).
        self.device_events = 0
        self._index_offset = 0  # consumer: lost frames already passed

    # -- producer side -------------------------------------------------
    def write(self, frames: np.ndarray) -> int:
        """Copy ``frames`` (shape (n, channels) or (n,) for one channel) in.

        Returns the number of frames stored; the rest are dropped and counted.
        Never blocks, never allocates for blocks that fit.
        """
        n = frames.shape[0]
        free = self.capacity - (self._w - self._r)
        take = n if n <= free else free
        if take:
            start = self._w % self.capacity
            first = min(take, self.capacity - start)
            if frames.ndim == 1:
                self._buf[start:start + first, 0] = frames[:first]
                self._buf[:take - first, 0] = frames[first:take]
            else:
                self._buf[start:start + first] = frames[:first]
                self._buf[:take - first] = frames[first:take]
            self._w += take
        if take < n:
            lost = n - take
            self.overruns += 1
            self.overrun_frames += lost
            self._events.append((self._w, lost, GAP_OVERRUN, "engine fell behind"))
        self._ready.set()
        return take

    def mark_gap(self, frames: int = 0, kind: str = GAP_DEVICE, note: str = "") -> None:
        """Record that ``frames`` frames were lost at the current write position.

        ``frames`` may be 0 for an event whose size is unknown (a status flag);
        it is still attached to the next block read.
        """
        if frames:
            self.device_lost_frames += int(frames)
        else:
            self.device_events += 1
        self._events.append((self._w, int(frames), kind, note))
        self._ready.set()

    def close(self) -> None:
        """Producer: no more data will come (end of file, device gone for good)."""
        self._closed = True
        self._ready.set()

    def wait_for_room(self, frames: int, timeout: float) -> bool:
        """Producer side: wait up to ``timeout`` s until ``frames`` fit; True if they do.

        Woken by the consumer's next read, so a producer that never
        overruns (pace "fast") does not poll.
        """
        if self.free >= frames:
            return True
        self._room.clear()
        if self.free >= frames:  # a read between the test and the clear
            return True
        self._room.wait(timeout)
        return self.free >= frames

    @property
    def free(self) -> int:
        """Frames that can be written now without a loss (producer side)."""
        return self.capacity - (self._w - self._r)

    # -- consumer side -------------------------------------------------
    @property
    def available(self) -> int:
        """Frames written and not yet read."""
        return self._w - self._r

    @property
    def closed(self) -> bool:
        """True once the producer closed the ring and every frame was read."""
        return self._closed and self._w == self._r and not self._events

    def read(self, max_frames: int, min_frames: int | None = None,
             timeout: float | None = 0.5) -> Block | None:
        """Return the next contiguous block of up to ``max_frames`` frames.

        Waits up to ``timeout`` seconds until at least ``min_frames`` (default
        ``max_frames``) are there, or a gap, or the producer closed the ring.
        Returns None when nothing arrived in time, or when the ring is closed
        and drained.
        """
        want = max_frames if min_frames is None else min_frames
        max_frames = min(max_frames, self.capacity)
        while self.available < want and not self._events and not self._closed:
            self._ready.clear()
            if self.available >= want or self._events or self._closed:
                break
            if not self._ready.wait(timeout):
                return None
        dropped, gaps = 0, []
        # events at the current read position belong before this block
        while self._events and self._events[0][0] <= self._r:
            pos, lost, kind, note = self._events.popleft()
            dropped += lost
            gaps.append((kind, lost, note))
        self._index_offset += dropped
        n = min(self.available, max_frames)
        if self._events:  # stop short at the next gap
            n = min(n, self._events[0][0] - self._r)
        if n == 0 and not gaps:
            return None
        start = self._r % self.capacity
        first = min(n, self.capacity - start)
        out = self._out[:n]
        out[:first] = self._buf[start:start + first]
        out[first:n] = self._buf[:n - first]
        index = self._r + self._index_offset
        self._r += n
        self._room.set()
        return Block(out, index, dropped, gaps)
