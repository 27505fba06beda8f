"""Display taps: what the engine hands to a viewer, without ever waiting for it.

The engine writes every processed block into a :class:`Tap` (a ring of the
last ``seconds`` of raw input and of each chain's filtered output, float32,
plus the last detector rows of each chain).  A viewer keeps its own cursor
and calls :meth:`Tap.read_since`; if it fell further behind than the ring
holds, it skips ahead (a display may skip frames, never the engine samples).
One writer (the engine thread), any number of readers; the writer never
blocks.
"""

from __future__ import annotations

import threading
from collections import deque

import numpy as np

__all__ = ["Tap"]


class Tap:
    """Ring of display streams plus recent detector rows.

    Parameters
    ----------
    rate_hz : float
    names : list of str
        Stream names: raw channels first, then one per chain.
    seconds : float
        How much history the ring holds.
    rows_kept : int
        Detector rows kept per chain.
    """

    def __init__(self, rate_hz: float, names: list[str], chain_names: list[str],
                 seconds: float = 60.0, rows_kept: int = 20000):
        self.rate_hz = rate_hz
        self.names = list(names)
        self.capacity = int(rate_hz * seconds)
        self._buf = np.zeros((len(names), self.capacity), dtype=np.float32)
        self._end = 0  # sample index one past the newest written frame
        self._start = 0  # sample index of the oldest frame still held
        self._lock = threading.Lock()  # guards _end/_start updates vs. readers' copies
        self.rows = {c: deque(maxlen=rows_kept) for c in chain_names}
        self.gaps: deque = deque(maxlen=1000)  # (sample index, frames lost)

    @property
    def end_index(self) -> int:
        return self._end

    def write(self, start_index: int, streams: np.ndarray) -> None:
        """Append ``streams`` (n_streams, n) that start at ``start_index``."""
        n = streams.shape[1]
        if n == 0:
            return
        if start_index != self._end:
            self.gaps.append((self._end, start_index - self._end))
        if n > self.capacity:
            streams, start_index, n = streams[:, -self.capacity:], start_index + n - self.capacity, self.capacity
        pos = start_index % self.capacity
        first = min(n, self.capacity - pos)
        with self._lock:
            self._buf[:, pos:pos + first] = streams[:, :first]
            self._buf[:, :n - first] = streams[:, first:]
            self._end = start_index + n
            self._start = max(self._start, self._end - self.capacity)
            if start_index > self._start and start_index - self._start > self.capacity:
                self._start = start_index

    def add_rows(self, chain: str, rows: np.ndarray) -> None:
        if len(rows):
            self.rows[chain].extend(rows)

    def read_since(self, cursor: int, max_frames: int | None = None) -> tuple[int, np.ndarray]:
        """Frames from ``cursor`` (or the oldest held, if later) to the newest.

        Returns (start index of the data, float32 array (n_streams, n)).
        """
        with self._lock:
            end = self._end
            start = max(cursor, self._start, end - self.capacity)
            if max_frames is not None:
                start = max(start, end - max_frames)
            n = max(0, end - start)
            pos = start % self.capacity
            first = min(n, self.capacity - pos)
            out = np.empty((len(self.names), n), dtype=np.float32)
            out[:, :first] = self._buf[:, pos:pos + first]
            out[:, first:] = self._buf[:, :n - first]
        return start, out

    def last(self, seconds: float) -> tuple[int, np.ndarray]:
        """The most recent ``seconds`` of every stream."""
        return self.read_since(0, int(seconds * self.rate_hz))
