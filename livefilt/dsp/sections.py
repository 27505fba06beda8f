"""Stateful cascade of second-order sections, run block by block.

:class:`SosFilter` keeps the filter state between blocks in exactly scipy's
``zi`` layout, so filtering a stream in blocks gives the same samples as
:func:`scipy.signal.sosfilt` on the whole array.

The arrays ``.sos`` and ``.zi`` are allocated once and updated in place (a
compiled kernel may hold them); they are replaced only when :meth:`retune`
changes the number of sections.  One thread at a time: the engine calls
:meth:`process` and, between blocks, :meth:`retune`.

:meth:`SosFilter.process` runs one compiled call per block
(:func:`livefilt.dsp.kernels.sos_block`, the same loop and order of terms as
scipy's ``sosfilt``, so the samples agree to the last bit or so); when the
compiled kernels are unavailable (:func:`livefilt.dsp.kernels.compiled` returns
None, e.g. with ``LIVEFILT_NO_JIT=1``) it calls :func:`scipy.signal.sosfilt`.
The choice is made when the filter is built.

:class:`FilterBank` runs several filters (the engine's chains, each on its
own input column) on one block of frames in a single compiled call
(:func:`livefilt.dsp.kernels.sos_bank`): the filters' ``.sos`` and ``.zi``
become views into the bank's packed arrays, so their state stays theirs.
"""

from __future__ import annotations

import logging

import numpy as np
import scipy  # its submodules load on first use: scipy.signal alone takes ~1 s, kept off the start-up path

from livefilt.dsp import kernels

__all__ = ["steady_state", "SosFilter", "FilterBank"]

log = logging.getLogger(__name__)



def steady_state(sos: np.ndarray) -> np.ndarray:
    """State ``zi`` (n, 2) of the cascade at rest under a unit constant input.

    Transposed direct form II of one section, ``y = b0 x + z1``,
    ``z1' = b1 x - a1 y + z2``, ``z2' = b2 x - a2 y``, at rest (``z' = z``)
    with input ``x`` gives ``y = G x`` (``G = (b0 + b1 + b2) / (1 + a1 + a2)``,
    the DC gain), ``z2 = (b2 - a2 G) x`` and ``z1 = (G - b0) x``; each
    section's input is the previous sections' DC gains times the level.  The
    same state as :func:`scipy.signal.sosfilt_zi` (which solves the linear
    system numerically) without importing scipy.signal at start-up.  A
    section with a pole at DC has no rest state: its state is left at 0.
    """
    sos = np.asarray(sos, dtype=np.float64)
    zi = np.zeros((sos.shape[0], 2))
    x = 1.0
    for i, (b0, b1, b2, a0, a1, a2) in enumerate(sos):
        b0, b1, b2, a1, a2 = b0 / a0, b1 / a0, b2 / a0, a1 / a0, a2 / a0
        den = 1.0 + a1 + a2
        if den == 0.0:
            x = 0.0
            continue
        g = (b0 + b1 + b2) / den
        zi[i] = ((g - b0) * x, (b2 - a2 * g) * x)
        x *= g
    return zi


class SosFilter:
    """Cascade of second-order sections with state kept between blocks.

    Parameters
    ----------
    sos : array_like, shape (n_sections, 6)
        Sections in scipy layout ``[b0, b1, b2, 1, a1, a2]``.

    Attributes
    ----------
    sos : ndarray, shape (n_sections, 6), float64, C-contiguous
    zi : ndarray, shape (n_sections, 2), float64, C-contiguous
        State in the layout of :func:`scipy.signal.sosfilt`'s ``zi``
        (transposed direct form II), updated in place.
    """

    def __init__(self, sos: np.ndarray):
        self.sos = _as_sos(sos)
        self.zi = np.zeros((self.sos.shape[0], 2))
        # last input sample seen, for retune: a slot of an array, so that a
        # FilterBank's kernel can keep it without a Python call per block
        self._last_box, self._last_at = np.zeros(1), 0
        self._bank: FilterBank | None = None
        k = kernels.compiled()
        self._kernel = k.sos_block if k is not None else None

    @property
    def _last(self) -> float:
        return float(self._last_box[self._last_at])

    @_last.setter
    def _last(self, value: float) -> None:
        self._last_box[self._last_at] = value

    @property
    def sections(self) -> int:
        """Number of second-order sections."""
        return self.sos.shape[0]

    def process(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Filter one block, continuing from the current state.

        Parameters
        ----------
        x : ndarray, 1-D
            Input samples (converted to float64); may be empty.
        out : ndarray, 1-D float64, optional
            Preallocated output of at least ``len(x)`` samples; the filtered
            block is written to ``out[:len(x)]`` and that view is returned.

        Returns
        -------
        y : ndarray, float64, same length as ``x``
        """
        x = np.asarray(x, dtype=np.float64)
        if x.ndim != 1:
            raise ValueError(f"process takes a 1-D block, got shape {x.shape}")
        n = x.shape[0]
        if out is not None and (out.ndim != 1 or out.shape[0] < n or out.dtype != np.float64):
            raise ValueError("out must be a 1-D float64 array at least as long as the block")
        if n == 0:
            return out[:0] if out is not None else np.empty(0)
        if self._kernel is not None:
            y = out[:n] if out is not None else np.empty(n)
            if y.flags.c_contiguous:
                self._kernel(self.sos, self.zi, x, y)
            else:  # a strided ``out``: the kernel writes contiguous samples
                tmp = np.empty(n)
                self._kernel(self.sos, self.zi, x, tmp)
                y[...] = tmp
            self._last = float(x[-1])
            return y
        y, zf = scipy.signal.sosfilt(self.sos, x, zi=self.zi)
        self.zi[...] = zf
        self._last = float(x[-1])
        if out is None:
            return y
        out[:n] = y
        return out[:n]

    def reset(self) -> None:
        """Zero the state (as if the input had always been 0)."""
        self.zi.fill(0.0)
        self._last = 0.0

    def settle(self, level: float) -> None:
        """Set the state to the steady state for a constant input ``level``.

        The state of :func:`scipy.signal.sosfilt_zi` (checked against it in
        the tests), in closed form (:func:`steady_state`), so a constant input
        ``level`` then gives a constant output ``level`` times the DC gain.
        """
        self.zi[...] = steady_state(self.sos) * float(level)
        self._last = float(level)

    def retune(self, new_sos: np.ndarray) -> None:
        """Change the coefficients at a block boundary without a large transient.

        The new state is the new filter's steady state for a constant input
        equal to the last sample seen, so the output continues from about
        where the input is, and the transient is no larger than the new
        filter's own step response.  The arrays are kept when the number of
        sections does not change, and reallocated when it does.
        """
        new = _as_sos(new_sos)
        if new.shape == self.sos.shape:
            self.sos[...] = new
        else:
            log.debug("retune: %d -> %d sections, state arrays reallocated",
                      self.sections, new.shape[0])
            self.sos = new
            self.zi = np.zeros((new.shape[0], 2))
            if self._bank is not None:
                self._bank._pack()
        self.settle(self._last)

    def step_response(self, n: int) -> np.ndarray:
        """The first ``n`` samples of the unit-step response from zero state.

        The running state is not touched.
        """
        return scipy.signal.sosfilt(self.sos, np.ones(int(n)))


class FilterBank:
    """Several :class:`SosFilter` run on one block of frames in one call.

    Parameters
    ----------
    filters : sequence of SosFilter
        Their ``.sos`` and ``.zi`` are replaced by views into the bank's
        packed arrays (values kept); a retune to another number of sections
        packs the bank again.
    channels : sequence of int
        The column of the frames each filter reads.  Kept in the bank
        (:attr:`channels`, writable: a chain moved to another input sets its
        entry), so a block's call passes only the frames and the output.
    """

    def __init__(self, filters, channels):
        self.filters = list(filters)
        if any(f._bank is not None for f in self.filters):
            raise ValueError("a filter belongs to one FilterBank at most")
        channels = np.asarray(channels, dtype=np.int64).ravel()
        if channels.shape[0] != len(self.filters) or (channels < 0).any():
            raise ValueError(f"channels must give one column index >= 0 per filter "
                             f"({len(self.filters)}), got {channels.tolist()}")
        k = kernels.compiled()
        self._kernel = k.sos_bank if k is not None else None
        self._frames = k.sos_bank_frames if k is not None else None
        self._pack(channels)

    def process(self, data: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Filter ``data[:, channels[i]]`` with filter ``i`` into ``out[i, :n]``.

        Parameters
        ----------
        data : ndarray, shape (n, columns), float32 or float64, C-contiguous
        out : ndarray, shape (filters, >= n), float64, C-contiguous
            Preallocated once by the caller (the engine passes the same buffer
            every block, so no view is made per block).

        Returns
        -------
        ndarray, ``out`` itself: its first ``n`` columns hold the block.
        """
        kernel = self._kernel
        if kernel is not None:
            kernel(self.packed, data, out)
        elif data.shape[0]:
            for i, f in enumerate(self.filters):
                f.process(data[:, self.channels[i]], out=out[i])
        return out

    def process_frames(self, data: np.ndarray, out: np.ndarray) -> np.ndarray:
        """:meth:`process` for the engine's blocks, without the compiled
        call's per-call typing of its arguments (about 160 ns of a 64-sample
        block's 1.3 us; :func:`~livefilt.dsp.kernels._direct`).

        ``data`` must be a C-contiguous 2-D float32 array (n, columns), as
        the engine's ring returns, and ``out`` a C-contiguous 2-D float64
        array (filters, >= n): another dtype raises TypeError, another shape
        or layout is not checked.  The samples are those of :meth:`process`.
        """
        frames = self._frames
        if frames is None:
            return self.process(data, out)
        frames(self.packed, data, out)
        return out

    def _pack(self, channels=None) -> None:
        """Gather the filters' arrays into the bank's and make theirs views.

        One float64 array holds the plan (:attr:`plan`, int64 words, through
        an int64 view; :func:`~livefilt.dsp.kernels.bank_plan`: the section
        bounds, the channels and the order of the work), every section
        (S, 6), then the state (S, 2), then each filter's last input sample:
        one array per call, as each array argument costs the compiled call
        about 45 ns to check and unpack, against about 1.4 us for a
        64-sample block.
        """
        if channels is None:
            channels = self.channels.copy()
        sizes = [f.sections for f in self.filters]
        n_sec, nf = int(sum(sizes)), len(self.filters)
        self.bounds = np.concatenate(([0], np.cumsum(sizes))).astype(np.int64)
        plan = kernels.bank_plan(sizes, channels)
        h = plan.shape[0]
        self.packed = np.empty(h + 8 * n_sec + nf)
        self.plan = self.packed[:h].view(np.int64)
        self.plan[...] = plan
        self.channels = self.plan[nf + 2:2 * nf + 2]
        self.sos = self.packed[h:h + 6 * n_sec].reshape(n_sec, 6)
        self.zi = self.packed[h + 6 * n_sec:h + 8 * n_sec].reshape(n_sec, 2)
        self.last = self.packed[h + 8 * n_sec:]
        self.sos[...] = np.concatenate([f.sos for f in self.filters])
        self.zi[...] = np.concatenate([f.zi for f in self.filters])
        self.last[...] = [f._last for f in self.filters]
        for i, (f, a, b) in enumerate(zip(self.filters, self.bounds[:-1], self.bounds[1:])):
            f.sos, f.zi = self.sos[a:b], self.zi[a:b]
            f._last_box, f._last_at, f._bank = self.last, i, self


def _as_sos(sos: np.ndarray) -> np.ndarray:
    sos = np.array(sos, dtype=np.float64, order="C", ndmin=2)  # always a copy
    if sos.ndim != 2 or sos.shape[1] != 6 or sos.shape[0] < 1:
        raise ValueError(f"sos must have shape (n_sections, 6), got {sos.shape}")
    if not np.all(sos[:, 3] == 1.0):
        raise ValueError("sos rows must be normalised with a0 = 1 (scipy layout)")
    return sos
