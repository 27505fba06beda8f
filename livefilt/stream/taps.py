"""Display taps: what the engine hands to a viewer, without ever waiting for it.

The engine writes every processed block into a :class:`Tap` (a ring of the
last ``seconds`` of raw input and of each chain's filtered output, float32,
plus a ring of each chain's last detector rows).  A viewer keeps its own
cursor and calls :meth:`Tap.read_since` and :meth:`Tap.rows_since`; if it
fell further behind than a ring holds, it skips ahead (a display may skip
frames, never the engine samples).  One writer (the engine thread), any
number of readers; the writer never blocks.

Detector rows are lock-free: per chain, a preallocated structured ring and two
running counts.  The writer raises ``claimed`` before it overwrites slots and
``committed`` after; a reader copies up to ``committed``, then reads
``claimed`` again and drops any copied row whose slot may have been rewritten
meanwhile (never a torn row: at worst fewer, newer rows).
"""

from __future__ import annotations

import threading
from collections import deque

import numpy as np

from livefilt.dsp.detect import READING_DTYPE

__all__ = ["Tap", "RowRing"]


class RowRing:
    """Lock-free ring of the last ``capacity`` detector rows of one chain.

    Rows arrive in increasing sample ``index``; one writer, any readers.
    """

    def __init__(self, capacity: int, dtype=READING_DTYPE):
        self.capacity = int(capacity)
        self._rows = np.zeros(self.capacity, dtype)
        self._ix = np.zeros(self.capacity, np.int64)  # contiguous copy of rows["index"], for search
        self.claimed = 0    # rows whose slots the writer has started to write
        self.committed = 0  # rows completely written (readers copy up to here)

    def add(self, rows: np.ndarray) -> None:
        """Append ``rows`` (writer thread only)."""
        n = len(rows)
        if n == 0:
            return
        cap = self.capacity
        if n > cap:
            rows, n = rows[-cap:], cap
        c = self.committed
        self.claimed = c + n  # before any slot changes
        pos = c % cap
        first = min(n, cap - pos)
        self._rows[pos:pos + first] = rows[:first]
        self._rows[:n - first] = rows[first:]
        self._ix[pos:pos + first] = rows["index"][:first]
        self._ix[:n - first] = rows["index"][first:]
        self.committed = c + n  # after every slot is written

    def since(self, index: int) -> np.ndarray:
        """Copy of the held rows at sample index >= ``index``, oldest first."""
        cap = self.capacity
        end = self.committed
        lo = max(0, end - cap)
        pos, n = lo % cap, end - lo
        # the held rows, oldest first, are slots pos.. (then 0.. after wrapping): find the first >= index
        head = self._ix[pos:pos + n]
        k = int(np.searchsorted(head, index))
        if k == len(head) and n > len(head):
            k += int(np.searchsorted(self._ix[:n - len(head)], index))
        first = lo + k
        out = self._take(first, end)
        safe = self.claimed - cap  # rows before this may have been rewritten while copying
        if first < safe:
            out = out[min(len(out), safe - first):]
        return out[out["index"] >= index] if len(out) and out["index"][0] < index else out

    def _take(self, first: int, end: int) -> np.ndarray:
        n = end - first
        cap = self.capacity
        pos = first % cap
        a = min(n, cap - pos)
        out = np.empty(n, self._rows.dtype)
        out[:a] = self._rows[pos:pos + a]
        out[a:] = self._rows[:n - a]
        return out


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
        Detector rows kept per chain (:meth:`rows_since`).
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
        self._rows = {c: RowRing(rows_kept) for c in chain_names}
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
        """Append detector rows of ``chain`` (engine thread)."""
        self._rows[chain].add(rows)

    def rows_since(self, chain: str, index: int = 0) -> np.ndarray:
        """Copy of ``chain``'s held detector rows at sample index >= ``index``, in order.

        A reader that fell more than ``rows_kept`` rows behind gets the newest
        rows held; never a row half-written.
        """
        return self._rows[chain].since(index)

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
