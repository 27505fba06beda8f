"""The tracking reference: a phase-locked loop on the chain's filtered input.

For sources without a reference cable (a free-running LED driver: a 555 or an
RC oscillator off by percents, drifting with temperature) the lock-in's
reference follows the signal itself: ``[reference] track = true``,
``frequency_hz`` the starting guess, ``lock_range`` the capture range,
``track_bandwidth_hz`` the loop's noise bandwidth.

Method
------
1. Acquisition: the first ``max(0.25 s, 2 / B_L)`` of filtered input after a
   start or a loss of lock, Hann window, zero-padded FFT; the highest peak
   within ``frequency_hz * (1 +- lock_range)``, refined by a parabola through
   the log magnitudes of the three bins around it (common practice).  The
   loop starts at that frequency, so the capture range is the lock range.
   Meanwhile the reference runs open loop at its last frequency.
2. Tracking: a second-order, type-2 loop (Gardner, *Phaselock Techniques*,
   3rd ed., 2005, ch. 2-3; from memory): the input mixed with the NCO's
   ``cos`` and ``-sin``, two one-pole arm sections each at ``10 B_L`` (they
   remove the 2 f0 product), phase error ``atan2(Q, I)``, a
   proportional-integral loop filter with damping 0.707 and natural
   frequency ``w_n = B_L / (0.5 (zeta + 1 / (4 zeta)))`` (Gardner's noise
   bandwidth ``B_L = (w_n / 2)(zeta + 1 / (4 zeta))``), gains ``2 zeta w_n T``
   and ``(w_n T)^2``.  It holds a frequency ramp with a steady phase error
   of ``2 pi R / w_n^2`` (R in Hz/s: 0.5 mrad per Hz/s at 5 Hz) and pulls in
   over about ``2 zeta w_n`` (2.1 Hz at 5 Hz; the acquisition lands closer).
3. Lock indicator: a low-pass (time constant ``2 / B_L``) of ``cos`` of the
   phase error; locked once it passes 0.8, until it falls below 0.5.  Below
   0.5 for ``3 * 2 / B_L + 4 / B_L`` the loop has lost the signal (or never
   found it) and acquisition starts again.

The lock-in then reads the signal's magnitude at phase near 0: with a
tracking reference the phase read-out is the loop's residual error, not the
target's phase.  On noise alone a loop can settle on a noise peak; the lock
indicator then stays false (its ``cos`` average stays low).
"""

from __future__ import annotations

import logging
import math

import numpy as np

from livefilt.dsp import kernels

__all__ = ["Tracker", "ACQUIRING", "LOST"]

log = logging.getLogger(__name__)

#: ``lock_reason`` codes the tracker gives (see ``detect.LOCK_REASONS``).
ACQUIRING, LOST = 3, 4
ZETA = 0.707


class Tracker:
    """Spectral acquisition, then a PLL; ``process(x, start)`` returns
    (NCO phase in cycles, loop frequency Hz, locked, reason code) per sample.

    Parameters
    ----------
    guess_hz, lock_range, bandwidth_hz : the reference's starting frequency,
        relative capture range and loop noise bandwidth.
    fs : sample rate, Hz.
    exact_path : run the loop as plain Python (the same function uncompiled).
    """

    def __init__(self, guess_hz: float, lock_range: float, bandwidth_hz: float, fs: float,
                 exact_path: bool = False):
        self.fs = float(fs)
        self.guess = float(guess_hz)
        self.bandwidth = float(bandwidth_hz)
        wn = self.bandwidth / (0.5 * (ZETA + 1.0 / (4.0 * ZETA)))  # rad/s
        t = 1.0 / self.fs
        arm_hz = 10.0 * self.bandwidth
        metric_tau = 2.0 / self.bandwidth
        self.lo = self.guess * (1.0 - lock_range)
        self.hi = min(self.guess * (1.0 + lock_range), 0.5 * self.fs)
        self.coef = np.array([
            math.exp(-2.0 * math.pi * arm_hz / self.fs),
            2.0 * ZETA * wn * t / (2.0 * math.pi),
            (wn * t) ** 2 / (2.0 * math.pi),
            math.exp(-1.0 / (self.fs * metric_tau)),
            self.fs, self.lo / self.fs, self.hi / self.fs,
            0.9, 0.7, self.fs * (3.0 * metric_tau + 4.0 / self.bandwidth)])
        self.acq_n = int(round(self.fs * max(0.25, 2.0 / self.bandwidth)))
        self._acq = np.empty(self.acq_n)
        kern = None if exact_path else kernels.compiled()
        self._loop = kern.pll_block if kern is not None else getattr(
            kernels.pll_block, "py_func", kernels.pll_block)
        self.state = np.zeros(len(kernels.PLL_STATE))
        self.state[1] = self.guess / self.fs
        self._begin(ACQUIRING)

    @property
    def capture_range_hz(self) -> tuple[float, float]:
        """Frequencies the acquisition searches, Hz."""
        return self.lo, self.hi

    def _begin(self, why: int) -> None:
        self.acquiring = True
        self.fill = 0
        self.why = why

    def note_gap(self, frames: int) -> None:
        """Samples were lost: the NCO advances over them at its frequency."""
        self.state[0] = (self.state[0] + frames * self.state[1]) % 1.0
        self.state[11] = (self.state[11] + frames * self.state[1]) % 1.0

    def process(self, x: np.ndarray, start: int):
        n = x.shape[0]
        cycles = np.empty(n)
        hz = np.empty(n)
        lock = np.zeros(n, dtype=np.bool_)
        why = np.zeros(n, dtype=np.int8)
        pos = 0
        while pos < n:
            if self.acquiring:
                take = min(n - pos, self.acq_n - self.fill)
                self._acq[self.fill:self.fill + take] = x[pos:pos + take]
                ph, fr, rp = self.state[0], self.state[1], self.state[11]
                c = rp + fr * np.arange(take)
                cycles[pos:pos + take] = c - np.floor(c)
                self.state[0] = (ph + fr * take) % 1.0
                self.state[11] = (rp + fr * take) % 1.0
                hz[pos:pos + take] = fr * self.fs
                why[pos:pos + take] = self.why
                self.fill += take
                pos += take
                if self.fill == self.acq_n:
                    self._acquire()
                continue
            done = self._loop(x[pos:], self.state, self.coef, cycles[pos:], hz[pos:], lock[pos:])
            seg = slice(pos, pos + done)
            why[seg] = np.where(lock[seg], 0, self.why)
            pos += done
            if self.state[9] > self.coef[9]:
                log.warning("tracking reference lost the signal near %.2f Hz; searching "
                            "%.1f to %.1f Hz again", self.state[1] * self.fs, self.lo, self.hi)
                self._begin(LOST)
        return cycles, hz, lock, why

    def _acquire(self) -> None:
        """Start the loop at the spectrum's peak within the capture range."""
        seg = self._acq * np.hanning(self.acq_n)
        size = 4 * self.acq_n
        spec = np.abs(np.fft.rfft(seg, size))
        f = np.fft.rfftfreq(size, 1.0 / self.fs)
        inside = np.flatnonzero((f >= self.lo) & (f <= self.hi))
        est = self.state[1] * self.fs
        if inside.size:
            k = int(inside[np.argmax(spec[inside])])
            est = f[k]
            if 0 < k < spec.size - 1:
                a, b, c = np.log(spec[k - 1:k + 2] + 1e-300)
                den = a - 2 * b + c
                if den < 0:
                    est += 0.5 * (a - c) / den * (f[1] - f[0])
        est = min(max(est, self.lo), self.hi)
        self.state[1] = est / self.fs
        self.state[2:11] = 0.0  # arms, slow averages, low count, held
        self.state[12] = 0.0
        self.acquiring = False
        log.info("tracking reference: acquiring at %.3f Hz", est)
