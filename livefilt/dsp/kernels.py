"""Compiled per-sample kernels for the filters and detectors (numba).

API map
-------
- :func:`compiled` returns the namespace of compiled kernels, or None when
  the compiled path is unavailable (numba missing, compilation failing, or
  the environment variable ``LIVEFILT_NO_JIT=1``); callers then take their
  scipy path, which gives the same numbers.  The first time it returns None
  it logs one warning saying why.
- Kernels (all update their state arrays in place, allocate nothing):

  - ``sos_block(sos, zi, x, y)``: cascade of second-order sections over one
    block, transposed direct form II, the arithmetic of scipy's ``sosfilt``.
  - ``sos_bank(sos, zi, bounds, last, data, channels, y)``: every chain's cascade
    on one block of frames (n, channels) in one call.
  - ``mix_internal_rows(x, offset, fracs, cycles_per_sample, phase_rad, b0,
    b1, a1, zi, first, every, rows)``: dual-phase mixer on an internal reference,
    then the detector's first-order output sections; returns the number of
    rows written.
  - ``mix_cycles_rows(x, cycles, phase_rad, b0, b1, a1, zi, first, every,
    rows)``: the same with the reference phase given per sample (measured
    reference).
  - ``square_rows(x, b0, b1, a1, zi, first, every, rows)``: the RMS
    detector's square and output sections.
  - ``pll_block(x, state, coef, cycles, hz, lock)``: the tracking
    reference's phase-locked loop, sample by sample; returns the number of
    samples done (fewer when lock is lost, so the caller re-acquires there).

Why a per-sample loop
---------------------
scipy's ``sosfilt`` costs a few microseconds of call overhead, which
dominates 64- to 256-sample blocks; one compiled call per block removes it.
The lock-in keeps every sample of its output low-pass (the sections are
recursive, so no sample may be skipped) but stores only the rows due, at
sample indices ``first, first + every, ...``: that is exact, where decimating
before the low-pass would add aliasing.  The internal reference is a
rotating phasor, re-seeded with ``cos``/``sin`` of the exact phase at
every multiple of :data:`RESEED` samples, so its error stays below about ``RESEED`` rounding
steps (1e-14) while most samples cost four multiplications instead of two
transcendental calls.

Compiled with ``cache=True``: the first run compiles (a few seconds), later
runs load the machine code from ``__pycache__``.

References
----------
scipy.signal.sosfilt and scipy.signal.lfilter (transposed direct form II,
the reference these kernels reproduce).
"""

from __future__ import annotations

import logging
import math
import os

import numpy as np

__all__ = ["compiled", "sos_block", "sos_bank", "mix_internal_rows", "mix_cycles_rows",
           "square_rows", "pll_block", "PLL_STATE", "RESEED", "ANCHOR", "NO_JIT_ENV"]

log = logging.getLogger(__name__)

#: Samples between exact re-seeds of the internal reference phasor.
RESEED = 64
#: Samples between the anchors whose exact phase the caller supplies.
ANCHOR = 4096
#: Environment variable that forces the scipy path when set to "1".
NO_JIT_ENV = "LIVEFILT_NO_JIT"

_state = {"kernels": None, "failed": None, "warned": False}

try:
    import numba
except ImportError as e:  # the scipy path is taken; compiled() says why
    numba = None
    _IMPORT_ERROR = e

    def _jit(func):
        return func
else:
    _IMPORT_ERROR = None
    _jit = numba.njit(cache=True, nogil=True, error_model="numpy")

_SQRT2 = math.sqrt(2.0)
_TWO_PI = 2.0 * math.pi


def compiled():
    """The compiled kernels, or None when the scipy path must be used.

    Returns
    -------
    namespace or None
        An object with the kernels listed in the module docstring.

    Notes
    -----
    Checked when a filter or detector is built, so a test may set
    ``LIVEFILT_NO_JIT=1`` to build the scipy path beside the compiled one.
    The first call compiles each kernel on tiny arrays (or loads it from the
    cache), so a failure shows here and not in the middle of a block.
    """
    if os.environ.get(NO_JIT_ENV, "") == "1":
        _warn_once(f"compiled kernels disabled ({NO_JIT_ENV}=1): using the scipy path")
        return None
    if _state["kernels"] is None and _state["failed"] is None:
        try:
            _state["kernels"] = _build()
        except Exception as e:  # numba missing or failing: any reason falls back
            _state["failed"] = f"{type(e).__name__}: {e}"
    if _state["kernels"] is None:
        _warn_once(f"compiled kernels unavailable ({_state['failed']}): using the scipy path")
    return _state["kernels"]


# -- kernels ----------------------------------------------------------------
@_jit
def sos_block(sos, zi, x, y):
    """Second-order sections over block ``x`` into ``y``; ``zi`` (n, 2) in place.

    The loop and the order of terms of scipy's ``sosfilt`` (sample outer,
    section inner, transposed direct form II).
    """
    n_sec = sos.shape[0]
    for k in range(x.shape[0]):
        v = x[k]
        for s in range(n_sec):
            w = sos[s, 0] * v + zi[s, 0]
            zi[s, 0] = sos[s, 1] * v - sos[s, 4] * w + zi[s, 1]
            zi[s, 1] = sos[s, 2] * v - sos[s, 5] * w
            v = w
        y[k] = v


@_jit
def sos_bank(sos, zi, bounds, last, data, channels, y):
    """Several cascades on one block of frames, in one call.

    Cascade ``c`` is sections ``bounds[c]:bounds[c + 1]`` of ``sos``/``zi``
    and reads column ``channels[c]`` of ``data`` (n, channels), any float
    type, widened to float64 as ``astype`` would; it writes ``y[c, :n]``
    and its last input sample to ``last[c]``.  The cascades are interleaved
    sample by sample (they are independent, so the processor overlaps them);
    within a cascade the loop and the order of terms are those of
    :func:`sos_block`, so every output is bit-identical to ``sosfilt``.
    The arguments that do not change per block come first, so a caller can
    bind them once (``functools.partial``).  Returns nothing: boxing a
    returned array costs about 10 % of a 256-sample call.
    """
    n = data.shape[0]
    nc = channels.shape[0]
    for k in range(n):
        for c in range(nc):
            v = np.float64(data[k, channels[c]])
            for s in range(bounds[c], bounds[c + 1]):
                w = sos[s, 0] * v + zi[s, 0]
                zi[s, 0] = sos[s, 1] * v - sos[s, 4] * w + zi[s, 1]
                zi[s, 1] = sos[s, 2] * v - sos[s, 5] * w
                v = w
            y[c, k] = v
    if n > 0:
        for c in range(nc):
            last[c] = data[n - 1, channels[c]]


@_jit
def mix_internal_rows(x, offset, fracs, cps, phase, b0, b1, a1, zi, first, every, rows):
    """Internal-reference lock-in over one block; rows (2, m) written, m returned.

    The block starts ``offset`` samples after an anchor, a sample index that
    is a multiple of :data:`ANCHOR`; ``fracs[i]`` is the exact reference phase
    (cycles, mod 1) at the ``i``-th anchor from there.  The phase ``j``
    samples after an anchor is ``2 pi (j cps + frac) + phase``, evaluated at
    every multiple of :data:`RESEED` and carried between by phasor rotation,
    so the phasor at a sample depends on its index only, not on the split
    into blocks.
    """
    rot_c = math.cos(_TWO_PI * cps)
    rot_s = math.sin(_TWO_PI * cps)
    lead = offset % RESEED
    theta = ((offset - lead) * cps + fracs[0]) * _TWO_PI + phase
    c = math.cos(theta)
    s = math.sin(theta)
    for _ in range(lead):
        c, s = c * rot_c - s * rot_s, s * rot_c + c * rot_s
    m = 0
    due = first
    for k in range(x.shape[0]):
        pos = offset + k
        off = pos % ANCHOR
        if off % RESEED == 0:
            theta = (off * cps + fracs[pos // ANCHOR]) * _TWO_PI + phase
            c = math.cos(theta)
            s = math.sin(theta)
        xk = x[k]
        i_v = _sections(c * xk * _SQRT2, b0, b1, a1, zi, 0)
        q_v = _sections(-s * xk * _SQRT2, b0, b1, a1, zi, 1)
        if k == due:
            rows[0, m] = i_v
            rows[1, m] = q_v
            m += 1
            due += every
        c, s = c * rot_c - s * rot_s, s * rot_c + c * rot_s
    return m


@_jit
def mix_cycles_rows(x, cycles, phase, b0, b1, a1, zi, first, every, rows):
    """Lock-in with the reference phase given per sample (cycles); as above."""
    m = 0
    due = first
    for k in range(x.shape[0]):
        theta = cycles[k] * _TWO_PI + phase
        xk = x[k]
        i_v = _sections(math.cos(theta) * xk * _SQRT2, b0, b1, a1, zi, 0)
        q_v = _sections(-math.sin(theta) * xk * _SQRT2, b0, b1, a1, zi, 1)
        if k == due:
            rows[0, m] = i_v
            rows[1, m] = q_v
            m += 1
            due += every
    return m


@_jit
def square_rows(x, b0, b1, a1, zi, first, every, rows):
    """RMS detector: ``x**2`` through the output sections; rows (1, m)."""
    m = 0
    due = first
    for k in range(x.shape[0]):
        v = _sections(x[k] * x[k], b0, b1, a1, zi, 0)
        if k == due:
            rows[0, m] = v
            m += 1
            due += every
    return m


#: Layout of the PLL state vector: NCO phase (cycles), frequency (cycles per
#: sample), two arm sections for I and for Q, the slow averages of I, Q and
#: of the arm magnitude, samples below the loss threshold, 1.0 once locked,
#: the phase of the reference handed to the lock-in (cycles), the slow
#: average of the phase error.
PLL_STATE = ("phase", "freq", "i1", "i2", "q1", "q2", "i_slow", "q_slow", "r_slow", "low",
             "held", "ref_phase", "e_slow")


@_jit
def pll_block(x, state, coef, cycles, hz, lock):
    """Second-order (type 2) phase-locked loop over ``x``; see
    :mod:`livefilt.dsp.track` for the design.

    ``coef``: arm pole, proportional and integral gains (cycles per radian),
    slow-average pole, rate Hz, lowest and highest frequency (cycles per
    sample), lock and loss thresholds of the metric, samples below the loss
    threshold that mean lost.  Writes the reference phase for the lock-in
    (cycles: the integral of the loop filter's integrator, so without the
    proportional path's phase jitter), the loop frequency (Hz) and the lock
    flag; returns the samples done, stopping after the one at which lock is
    lost.
    """
    pa, kp, ki, la, fs, f_lo, f_hi, th_lock, th_loss, lose_n = (
        coef[0], coef[1], coef[2], coef[3], coef[4], coef[5], coef[6], coef[7], coef[8], coef[9])
    ph, fr, i1, i2, q1, q2 = state[0], state[1], state[2], state[3], state[4], state[5]
    i_s, q_s, r_s, low, held, rp = state[6], state[7], state[8], state[9], state[10], state[11]
    e_s = state[12]
    n = x.shape[0]
    done = n
    for k in range(n):
        theta = _TWO_PI * ph
        xk = x[k]
        i1 = pa * i1 + (1.0 - pa) * (xk * math.cos(theta))
        q1 = pa * q1 + (1.0 - pa) * (-xk * math.sin(theta))
        i2 = pa * i2 + (1.0 - pa) * i1
        q2 = pa * q2 + (1.0 - pa) * q1
        r = math.sqrt(i2 * i2 + q2 * q2)
        i_s = la * i_s + (1.0 - la) * i2
        q_s = la * q_s + (1.0 - la) * q2
        r_s = la * r_s + (1.0 - la) * r
        # multiplying detector normalised by the slow in-phase level: an
        # interferer in the arms averages out instead of capturing the loop
        ref = i_s if i_s > 0.25 * r_s else 0.25 * r_s
        e = q2 / ref if ref > 0.0 else 0.0
        if e > 1.5:
            e = 1.5
        elif e < -1.5:
            e = -1.5
        cycles[k] = rp
        fr += ki * e
        if fr < f_lo:
            fr = f_lo
        elif fr > f_hi:
            fr = f_hi
        ph += fr + kp * e
        ph -= math.floor(ph)
        # the lock-in's reference: the loop frequency plus the slow average of
        # the proportional path (a ramp's steady phase error), without its jitter
        e_s = la * e_s + (1.0 - la) * e
        rp += fr + kp * e_s
        rp -= math.floor(rp)
        hz[k] = (fr + kp * e_s) * fs
        mag = math.sqrt(i_s * i_s + q_s * q_s)
        met = i_s / mag if mag > 0.0 else 0.0  # cos of the slow vector's phase
        if met > th_lock:
            held = 1.0
        if met < th_loss:
            low += 1.0
        else:
            low = 0.0
        lock[k] = held > 0.0 and met >= th_loss
        if low > lose_n:
            done = k + 1
            break
    state[0], state[1], state[2], state[3], state[4], state[5] = ph, fr, i1, i2, q1, q2
    state[6], state[7], state[8], state[9], state[10], state[11] = i_s, q_s, r_s, low, held, rp
    state[12] = e_s
    return done


# -- private helpers --------------------------------------------------------
@_jit
def _sections(v, b0, b1, a1, zi, ch):
    # lfilter of order 1, scipy's order of terms: y = z + b0 x; z = b1 x - a1 y
    for s in range(zi.shape[0]):
        w = zi[s, ch, 0] + b0 * v
        zi[s, ch, 0] = b1 * v - a1 * w
        v = w
    return v


def _warn_once(message: str) -> None:
    if not _state["warned"]:
        _state["warned"] = True
        log.warning(message)


class _Kernels:
    """The compiled kernels, as attributes."""

    def __init__(self):
        self.sos_block = sos_block
        self.sos_bank = sos_bank
        self.mix_internal_rows = mix_internal_rows
        self.mix_cycles_rows = mix_cycles_rows
        self.square_rows = square_rows
        self.pll_block = pll_block


def _build() -> _Kernels:
    """Compile (or load from the cache) the kernels every engine uses.

    The rarer ones (measured reference, RMS detector, other array types)
    compile or load at their first call; start-up pays only for these.
    """
    if numba is None:
        raise _IMPORT_ERROR
    x = np.zeros(4)
    one = np.array([[1.0, 0, 0, 1, 0, 0]])
    sos_block(one, np.zeros((1, 2)), x, np.zeros(4))
    sos_bank(one, np.zeros((1, 2)), np.array([0, 1]), np.zeros(1),
             np.zeros((4, 2), np.float32), np.array([1]), np.zeros((1, 4)))
    mix_internal_rows(x, 4094, np.zeros(2), 0.1, 0.0, 0.5, 0.1, -0.4, np.zeros((1, 2, 1)), 0, 1,
                      np.zeros((2, 4)))
    return _Kernels()
