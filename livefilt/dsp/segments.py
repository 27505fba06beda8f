"""The lock-in's output low-pass, evaluated only where rows are due.

The output low-pass is ``n`` equal first-order sections (transposed direct
form II, as :func:`scipy.signal.lfilter` runs them).  As a linear system of
the sections' states ``z`` (length n) it is ``z' = A z + B u``,
``y = C z + D u``, so over a segment of ``L`` samples

    z(L) = A^L z(0) + sum_k A^(L-1-k) B u(k)                 (1)

(the superposition sum of a linear time-invariant system; any text on
state-space models).  The row interval is cut into segments of ``seglen``
samples (the interval itself, or a divisor of it when that is long); the
weight columns ``A^(seglen-1-o) B`` are computed once, and a block's complete
segments take (1) as one matrix product (mixed samples, segments x seglen,
times the weights: the processor's vector units and every core BLAS has),
then ``z = P z0 + that``, ``P = A^seglen``, segment after segment; at a row
sample the row is ``C z + D u``.  A segment cut by a block edge is gathered
in ``useg`` and taken when complete.  Every sample counts, exactly (rounding
aside: rows agree with the sample-by-sample sections within 1e-13, and with
another split of the stream into blocks as closely), and the recursion's
latency per sample is gone.

After lost samples (:meth:`RowLowpass.hold`) the state reached so far is
(1) over the samples gathered since the last boundary, and the next segment
starts from it at the next block: the state is kept across a gap, as the
sample-by-sample sections keep it.
"""

from __future__ import annotations

import numpy as np

from livefilt.dsp import kernels

__all__ = ["RowLowpass", "MAX_SEGMENT"]

#: Longest segment, samples (the weights take sections x seglen floats).
MAX_SEGMENT = 16384


class RowLowpass:
    """``sections`` equal first-order sections ``(b0 + b1 z^-1) / (1 + a1 z^-1)``
    on ``channels`` mixed inputs, read every ``every`` samples (at sample
    indices that are multiples of ``every``)."""

    def __init__(self, b0: float, b1: float, a1: float, sections: int, channels: int,
                 every: int):
        self.every = int(every)
        self.seglen = _segment_length(self.every)
        n = int(sections)
        self.A, B, self.C, self.D = _state_space(float(b0), float(b1), float(a1), n)
        self.gt = _weights(self.A, B, self.seglen)  # (seglen, n)
        self.P = np.linalg.matrix_power(self.A, self.seglen)
        self.z = np.zeros((n, channels))  # state before sample self._at
        kern = kernels.compiled()
        self._steps = None if kern is None else kern.segment_steps
        self._mats = np.empty((2, n, n))
        self._mats[0] = self.P
        self._cd = np.append(self.C, self.D)
        self._tmp = np.empty(n)
        self._room = np.empty((channels, 0))
        self._none = np.empty((channels, 0))
        self.useg = np.zeros((channels, self.seglen))
        self.reset()

    def reset(self) -> None:
        """All sections at rest at 0."""
        self.z.fill(0.0)
        self._resume = True
        self._at = 0  # sample index at which self.z holds
        self._next = 0  # sample index after the last one taken in

    def hold(self) -> None:
        """Samples were lost after the last block: keep the state reached so
        far, (1) over the samples gathered since ``_at``; the next block
        starts a segment from it."""
        self.z = self._state_reached()
        self._resume = True

    def process(self, u: np.ndarray, start: int) -> tuple[np.ndarray, int]:
        """Take the mixed block ``u`` (channels, n) starting at sample index
        ``start``; return the rows (channels, m) at the multiples of
        ``every`` in the block, and m."""
        n = u.shape[1]
        if start != self._next and not self._resume:
            self.hold()  # samples skipped without a word: the state is kept
        if self._resume:
            self._begin(start)
        S = self.seglen
        rows = []
        k = 0
        off = start % S
        if off:  # finish the segment the last block left open
            h = min(n, S - off)
            self.useg[:, off:off + h] = u[:, :h]
            k = h
            if off + h == S:
                self._boundary(self.useg @ self.gt, start + h)
        full = (n - k) // S
        if full:
            # (channels, full, n_sections): one matrix product per channel, on
            # a view of the block (its rows are the segments, no copy)
            contrib = np.empty((u.shape[0], full, self.gt.shape[1]))
            for ch in range(u.shape[0]):
                np.matmul(u[ch, k:k + full * S].reshape(full, S), self.gt, out=contrib[ch])
            if self._steps is not None:
                self._mats[1] = self._Pcur
                out = self._rows_room(full + 1)
                got = self._steps(self._mats, self.z, contrib, u, k, start + k, S, self.every,
                                  self._cd, out, self._tmp)
                rows.append(out[:, :got].copy())
                self._Pcur = self.P
                self._at = start + k + full * S
            else:
                for j in range(full):
                    b = start + k + (j + 1) * S
                    if self._row_due(b - S):
                        rows.append(self._row(u[:, k + j * S], b - S)[:, None])
                    self._boundary(contrib[:, j, :], b)
            k += full * S
        if k < n:
            if self._row_due(start + k):
                rows.append(self._row(u[:, k], start + k)[:, None])
            self.useg[:, :n - k] = u[:, k:]
        self._next = start + n
        out = np.concatenate(rows, axis=1) if len(rows) > 1 else (rows[0] if rows else self._none)
        return out, out.shape[1]

    # -- internals ------------------------------------------------------------
    def _begin(self, start: int) -> None:
        # the state in z holds before sample ``start``; the first boundary
        # advances it by the samples left to there
        off = start % self.seglen
        self._Pcur = np.linalg.matrix_power(self.A, self.seglen - off)
        self.useg[:, :off] = 0.0
        self._at = start
        self._next = start
        self._resume = False

    def _rows_room(self, m: int) -> np.ndarray:
        if self._room.shape[1] < m:
            self._room = np.empty((self._room.shape[0], max(m, 2 * self._room.shape[1])))
        return self._room

    def _row_due(self, index: int) -> bool:
        return index % self.every == 0

    def _boundary(self, contrib: np.ndarray, at: int) -> None:
        # z before sample ``at`` (a segment boundary): Pcur z + the segment's
        # weighted samples; contrib (channels, n_sections)
        self.z = self._Pcur @ self.z + contrib.T
        self._Pcur = self.P
        self._at = at

    def _row(self, u_at: np.ndarray, index: int) -> np.ndarray:
        # the output at the row sample ``index``: C z + D u (z holds there)
        return self.C @ self.z + self.D * u_at

    def _state_reached(self) -> np.ndarray:
        # (1) from z at _at over the gathered samples _at .. _next - 1
        S = self.seglen
        o, m = self._at % S, self._next - self._at
        if m <= 0:
            return self.z.copy()
        power = np.linalg.matrix_power(self.A, m)
        w = self.gt[S - m:]  # A^(m-1-k) B for k = 0 .. m-1
        return power @ self.z + (self.useg[:, o:o + m] @ w).T


def _segment_length(every: int) -> int:
    """``every`` itself up to :data:`MAX_SEGMENT`, else its largest divisor
    up to that (1 at worst: a prime row interval above it)."""
    if every <= MAX_SEGMENT:
        return every
    for d in range(MAX_SEGMENT, 0, -1):
        if every % d == 0:
            return d
    return 1


def _state_space(b0: float, b1: float, a1: float, n: int):
    """``A, B, C, D`` of ``n`` cascaded sections ``w = z + b0 v``,
    ``z' = b1 v - a1 w`` (lfilter's transposed direct form II), by running
    one sample from each unit state and from a unit input."""
    def step(z, u):
        z = z.copy()
        v = u
        for i in range(n):
            w = z[i] + b0 * v
            z[i] = b1 * v - a1 * w
            v = w
        return z, v

    A = np.empty((n, n))
    C = np.empty(n)
    for j in range(n):
        e = np.zeros(n)
        e[j] = 1.0
        A[:, j], C[j] = step(e, 0.0)
    B, D = step(np.zeros(n), 1.0)
    return A, B, C, D


def _weights(A: np.ndarray, B: np.ndarray, seglen: int) -> np.ndarray:
    """Rows ``A^(seglen-1-o) B`` for o = 0 .. seglen-1, (seglen, n): the
    powers by doubling (``A^L`` times the first L columns gives the next L)."""
    n = A.shape[0]
    g = np.empty((n, seglen))
    g[:, 0] = B  # g[:, j] = A^j B, reversed at the end
    have, power = 1, A.copy()
    while have < seglen:
        take = min(have, seglen - have)
        g[:, have:have + take] = power @ g[:, :take]
        have += take
        power = power @ power
    return np.ascontiguousarray(g[:, ::-1].T)
