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
  - ``sos_bank(packed, data, y)``: every chain's cascade on one block of
    frames (n, columns) in one call (the plan, sections, state and last
    samples packed in one array, see :class:`~livefilt.dsp.sections.FilterBank`).
    ``sos_bank_frames`` is the same code for the engine's blocks (float32
    frames), called without the dispatcher's per-call typing of its
    arguments (:func:`_direct`).
  - ``mix_internal(x, offset, fracs, cycles_per_sample, phase_rad, rot,
    u)``: dual-phase mixer on an internal reference (``rot`` the phasor
    table, :func:`rotation_table`) into ``u`` (2, >= n); the output
    low-pass then runs in segment form (:mod:`livefilt.dsp.segments`, with
    ``segment_steps(...)`` stepping the state across a block's segments).
  - ``mix_cycles_rows(x, cycles, phase_rad, b0, b1, a1, zi, first, every,
    rows, work)``: the same with the reference phase given per sample (measured
    reference).
  - ``square_rows(x, b0, b1, a1, zi, first, every, rows, work)``: the RMS
    detector's square and output sections.
  - ``pll_block(x, state, coef, cycles, hz, lock)``: the tracking
    reference's phase-locked loop, sample by sample; returns the number of
    samples done (fewer when lock is lost, so the caller re-acquires there).
  - ``lockin_readout(rows, first_index, every, i_rows, q_rows, k, state, ring,
    shift, s1, s2, count, factor, dof, n_mean, per_row, ref_hz, follow_hz,
    min_dof, bias_db)``: the lock-in's read-out rows on an internal
    reference with its noise window (``LockIn._readout`` and
    ``WindowStats.update`` in one pass, the same operations in the same order).

Why a per-sample loop
---------------------
scipy's ``sosfilt`` costs a few microseconds of call overhead, which
dominates 64- to 256-sample blocks; one compiled call per block removes it.
The RMS detector and the lock-in on a measured or tracked reference run
their output low-pass through every sample and store only the rows due, at
sample indices ``first, first + every, ...``; the lock-in on an internal
reference evaluates it at the rows only, in segment form
(:mod:`livefilt.dsp.segments`): every sample still counts, so nothing
aliases, where decimating before the low-pass would.  The internal reference is
``cos``/``sin`` of the exact phase at every multiple of :data:`RESEED`
samples, times a table of the rotations by 0 .. RESEED-1 samples: a few
rounding steps from the exact phasor (1e-16), four multiplications a sample
instead of two transcendental calls, and no sample waiting for the one
before (a phasor rotated sample after sample is bound by that latency: 2.9
against 1.0 ns a sample measured here).

Why skewed groups of sections
-----------------------------
A cascade run sample by sample is bound by the latency of each section's
recursion (about 8 cycles a sample), not by its arithmetic; scipy's
``sosfilt`` runs it that way.  The cascade kernels run four sections at a
time with section ``j`` of the group ``j`` samples behind the first, so the
four recursions are independent and the processor overlaps them, with the
state held in registers.  Each section still processes its samples in order
with ``sosfilt``'s arithmetic, so the output is bit-identical.  The ramps in
and out of a group (its first and last three samples) run skewed as well.
Two sections left alone would again be bound by latency, so a bank runs a
cascade's two left-over sections in the same loop as another cascade's last
four (:func:`bank_plan`).  Measured on the demo chains (8 + 2 sections),
4096-sample blocks, in one run: 1.0 ns per section and sample against
``sosfilt``'s 1.7 ns (the project's DEVELOPERS.md has the table).

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

__all__ = ["compiled", "rotation_table", "sos_block", "sos_bank", "bank_plan", "mix_internal", "segment_steps", "mix_cycles_rows",
           "square_rows", "pll_block", "PLL_STATE", "RESEED", "ANCHOR", "NO_JIT_ENV"]

log = logging.getLogger(__name__)

#: Samples between exact re-seeds of the internal reference phasor.
RESEED = 64
#: Samples between the anchors whose exact phase the caller supplies.
ANCHOR = 4096
#: Samples a kernel works on at a time (16 KiB of float64 per channel, so a
#: long block's passes over its tile stay in the processor's cache).
TILE = 2048
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

    Every section does the arithmetic of scipy's ``sosfilt`` (transposed
    direct form II, same order of terms), so ``y`` is bit-identical to it;
    the sections run in skewed groups (:func:`_cascade`) for speed.
    """
    n = x.shape[0]
    for k in range(n):
        y[k] = x[k]
    _cascade(sos, zi, 0, sos.shape[0], y, n)


#: ``sos_bank`` plan operations (see :func:`bank_plan`).
OP_LOAD, OP_CASCADE, OP_FOUR_TWO = 0, 1, 2


def bank_plan(sizes, channels) -> np.ndarray:
    """The int64 plan :func:`sos_bank` follows for cascades of ``sizes``
    sections reading ``channels``.

    ``[cascades, bounds (cascades + 1)..., columns (cascades)..., ops,
    (kind, c, first, d, other) x ops]``.  Kinds: :data:`OP_LOAD` copies
    cascade ``c``'s column into its output row; :data:`OP_CASCADE` runs its
    sections ``first:other``; :data:`OP_FOUR_TWO` runs four sections of
    cascade ``c`` from ``first`` and two of cascade ``d`` from ``other`` in
    one skewed loop.  Two sections alone are bound by their recursions'
    latency (a 2-section chain beside an 8-section one cost a fifth of a
    64-sample block); beside another cascade's four they ride in the
    processor's idle slots.  Each cascade is in one such pair at most, so no
    pair waits for another.
    """
    sizes = [int(k) for k in sizes]
    nc = len(sizes)
    bounds = np.concatenate(([0], np.cumsum(sizes))).astype(np.int64)
    fours = [k // 4 for k in sizes]
    pairs, used = [], set()
    for d in range(nc):  # a cascade with two sections left over ...
        if sizes[d] % 4 < 2:
            continue
        for c in range(nc):  # ... beside another cascade's last four
            if c != d and fours[c] and c not in used and d not in used:
                pairs.append((c, d))
                used |= {c, d}
    giver = {c: d for c, d in pairs}
    taker = {d: c for c, d in pairs}
    ops, later = [], []
    for c in range(nc):
        b, e = int(bounds[c]), int(bounds[c + 1])
        ops.append((OP_LOAD, c, 0, 0, 0))
        if c in giver:
            cut = b + 4 * (fours[c] - 1)
            later.append((OP_CASCADE, c, cut + 4, 0, e))
        elif c in taker:
            cut = b + 4 * fours[c]
            later.append((OP_CASCADE, c, cut + 2, 0, e))
        else:
            cut = e
        if cut > b:
            ops.append((OP_CASCADE, c, b, 0, cut))
    for c, d in pairs:
        ops.append((OP_FOUR_TWO, c, int(bounds[c]) + 4 * (fours[c] - 1), d,
                    int(bounds[d]) + 4 * fours[d]))
    ops += [op for op in later if op[2] < op[4]]
    return np.concatenate(([nc], bounds, np.asarray(channels, dtype=np.int64),
                           [len(ops)], np.ravel(ops))).astype(np.int64)


@_jit
def sos_bank(packed, data, y):
    """Several cascades on one block of frames, in one call.

    ``packed`` (float64) begins with the plan (:func:`bank_plan`), its int64
    words stored as they are (read through an int64 view), then holds the
    sections ``sos`` (S, 6), their state ``zi`` (S, 2) and each cascade's
    last input sample.  The plan gives each cascade's sections, the column
    of ``data`` (n, columns) it reads (any float type, widened to float64 as
    ``astype`` would) and the order of the work; cascade ``c`` writes
    ``y[c, :n]``.  Every output is bit-identical to ``sosfilt`` (see
    :func:`sos_block`).  Three arrays instead of five: each array argument
    costs the call about 45 ns of a 64-sample block's 1.4 us; nothing is
    returned, as boxing a returned array costs more.
    """
    plan = packed.view(np.int64)
    n = data.shape[0]
    nc = plan[0]
    n_sec = plan[nc + 1]
    at = 2 * nc + 3
    n_ops = plan[at - 1]
    h = at + 5 * n_ops
    sos = packed[h:h + 6 * n_sec].reshape((n_sec, 6))
    zi = packed[h + 6 * n_sec:h + 8 * n_sec].reshape((n_sec, 2))
    for t0 in range(0, n, TILE):  # tiles stay in the processor's cache
        t1 = min(n, t0 + TILE)
        m = t1 - t0
        for o in range(at, h, 5):
            kind, c = plan[o], plan[o + 1]
            if kind == OP_LOAD:
                col = plan[nc + 2 + c]
                buf = y[c, t0:t1]
                for k in range(t0, t1):
                    buf[k - t0] = data[k, col]
            elif kind == OP_CASCADE:
                _cascade(sos, zi, plan[o + 2], plan[o + 4], y[c, t0:t1], m)
            elif m >= 4:
                _four_two(sos, zi, plan[o + 2], y[c, t0:t1], plan[o + 4], y[plan[o + 3], t0:t1], m)
            else:
                _cascade(sos, zi, plan[o + 2], plan[o + 2] + 4, y[c, t0:t1], m)
                _cascade(sos, zi, plan[o + 4], plan[o + 4] + 2, y[plan[o + 3], t0:t1], m)
    if n > 0:
        for c in range(nc):
            packed[h + 8 * n_sec + c] = data[n - 1, plan[nc + 2 + c]]


def rotation_table(cps: float) -> np.ndarray:
    """``(cos, sin)(2 pi j cps)`` for j = 0 .. RESEED-1, shape (2, RESEED):
    the internal reference's rotations within a re-seed interval."""
    angle = _TWO_PI * (np.arange(RESEED) * float(cps))
    return np.ascontiguousarray(np.stack((np.cos(angle), np.sin(angle))))


@_jit
def mix_internal(x, offset, fracs, cps, phase, rot, u):
    """Internal-reference mixer: ``u[0]``, ``u[1]`` (2, >= n) get the
    in-phase and quadrature products of the block ``x``.

    The block starts ``offset`` samples after an anchor, a sample index that
    is a multiple of :data:`ANCHOR`; ``fracs[i]`` is the exact reference phase
    (cycles, mod 1) at the ``i``-th anchor from there.  The phase ``j``
    samples after an anchor is ``2 pi (j cps + frac) + phase``, evaluated at
    every multiple of :data:`RESEED`; the ``RESEED`` samples from there take
    that phasor times ``rot[:, j] = (cos, sin)(2 pi j cps)``, one complex
    product each and none depending on the sample before, so the phasor at
    a sample depends on its index only.
    """
    n = x.shape[0]
    k = 0
    while k < n:
        pos = offset + k
        off = pos % ANCHOR
        j0 = off % RESEED
        theta = ((off - j0) * cps + fracs[pos // ANCHOR]) * _TWO_PI + phase
        c = math.cos(theta) * _SQRT2
        s = math.sin(theta) * _SQRT2
        run = min(RESEED - j0, n - k)
        xs = x[k:k + run]
        tc = rot[0, j0:j0 + run]
        ts = rot[1, j0:j0 + run]
        wi = u[0, k:k + run]
        wq = u[1, k:k + run]
        for j in range(run):
            wi[j] = (c * tc[j] - s * ts[j]) * xs[j]
            wq[j] = -(s * tc[j] + c * ts[j]) * xs[j]
        k += run


@_jit
def segment_steps(mats, z, contrib, u, k0, index0, seglen, every, cd, rows, tmp):
    """The output low-pass across a block's complete segments
    (:class:`livefilt.dsp.segments.RowLowpass`): for segment ``j`` (samples
    ``k0 + j seglen ..`` of ``u``, sample index ``index0 + j seglen``), when
    that index is a multiple of ``every`` the row ``C z + D u`` is written to
    ``rows[:, m]``; then ``z = Pcur z + contrib[:, j]`` and ``Pcur = P``
    (``mats`` = [P, Pcur], ``cd`` = C then D, ``tmp`` (sections,) scratch).
    Returns m."""
    nsec = z.shape[0]
    nch = z.shape[1]
    m = 0
    for j in range(contrib.shape[1]):
        if (index0 + j * seglen) % every == 0:
            for ch in range(nch):
                y = cd[nsec] * u[ch, k0 + j * seglen]
                for i in range(nsec):
                    y += cd[i] * z[i, ch]
                rows[ch, m] = y
            m += 1
        for ch in range(nch):
            for i in range(nsec):
                v = contrib[ch, j, i]
                for q in range(nsec):
                    v += mats[1, i, q] * z[q, ch]
                tmp[i] = v
            for i in range(nsec):
                z[i, ch] = tmp[i]
        for i in range(nsec):
            for q in range(nsec):
                mats[1, i, q] = mats[0, i, q]
    return m


@_jit
def mix_cycles_rows(x, cycles, phase, b0, b1, a1, zi, first, every, rows, work):
    """Lock-in with the reference phase given per sample (cycles); as above."""
    n = x.shape[0]
    m = 0
    for t0 in range(0, n, TILE):
        t1 = min(n, t0 + TILE)
        for k in range(t0, t1):
            theta = cycles[k] * _TWO_PI + phase
            xk = x[k]
            work[0, k - t0] = math.cos(theta) * xk * _SQRT2
            work[1, k - t0] = -math.sin(theta) * xk * _SQRT2
        m = _lowpass_rows(b0, b1, a1, zi, work, t0, t1, first, every, rows, m)
    return m


@_jit
def square_rows(x, b0, b1, a1, zi, first, every, rows, work):
    """RMS detector: ``x**2`` through the output sections; rows (1, m)."""
    n = x.shape[0]
    m = 0
    for t0 in range(0, n, TILE):
        t1 = min(n, t0 + TILE)
        for k in range(t0, t1):
            work[0, k - t0] = x[k] * x[k]
        m = _lowpass_rows(b0, b1, a1, zi, work, t0, t1, first, every, rows, m)
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
def lockin_readout(rows, first_index, every, i_rows, q_rows, k, state, ring, shift, s1, s2,
                   count, factor, dof, n_mean, per_row, ref_hz, follow_hz, min_dof, bias_db):
    # The lock-in read-out on an internal reference, row by row: the numpy
    # LockIn._readout and WindowStats.update with the same operations in the
    # same order (sums sequential, as numpy's cumsum and its reductions across
    # rows are), so the rows agree to rounding.  state = (last I, last Q,
    # unwrapped phase); count[0] = rows the window has seen; ring, shift, s1,
    # s2: the window's (see WindowStats); rows k.. enter the window.
    m = i_rows.shape[0]
    n_win = ring.shape[0]
    n_ch = ring.shape[1]
    nan = np.nan
    to_deg = 180.0 / math.pi
    db_per = 20.0 / math.log(10.0)
    sqrt_half = math.sqrt(0.5)
    v = np.empty(n_ch)
    mean = np.empty(n_ch)
    var = np.empty(n_ch)
    pr, pq = state[0], state[1]
    csum = 0.0
    for j in range(m):
        r = rows[j]
        i = i_rows[j]
        q = q_rows[j]
        idx = first_index + j * every
        r.index = idx
        r.in_phase = i
        r.quadrature = q
        amp = math.hypot(i, q)
        r.amplitude = amp
        deg = math.atan2(q, i) * to_deg
        r.phase_deg = deg + 360.0 if deg <= -180.0 else deg
        # the row-to-row increment: angle(z * conj(previous z)), numpy's product
        br, bi = pr, -pq
        inc = math.atan2(i * bi + q * br, i * br - q * bi)
        csum += inc
        phi = state[2] + csum
        pr, pq = i, q
        noise = nan
        noise_u = nan
        vec = nan
        off = nan
        off_u = nan
        if j >= k:
            t = float(idx // every)
            v[0] = i
            v[1] = q
            v[2] = (i + q) * sqrt_half
            v[3] = t
            v[4] = phi
            v[5] = (t + phi) * sqrt_half
            v[6] = inc
            c0 = count[0]
            if c0 == 0:
                for c in range(n_ch):
                    shift[c] = v[c]
            slot = c0 % n_win
            for c in range(n_ch):
                new = v[c] - shift[c]
                old = ring[slot, c] - shift[c] if c0 >= n_win else 0.0
                s1[c] = s1[c] + (new - old)
                s2[c] = s2[c] + (new * new - old * old)
                ring[slot, c] = v[c]
            count[0] = c0 + 1
            cnt = min(c0 + 1, n_win)
            if (c0 + 1) % n_win == 0:  # the sums afresh from the window
                for c in range(n_ch):
                    acc = 0.0
                    for w in range(n_win):
                        acc += ring[w, c]
                    shift[c] = acc / n_win
                for c in range(n_ch):
                    a1 = 0.0
                    a2 = 0.0
                    for w in range(n_win):
                        d = ring[w, c] - shift[c]
                        a1 += d
                        a2 += d * d
                    s1[c] = a1
                    s2[c] = a2
            fc = float(cnt)
            for c in range(n_ch):
                mean[c] = shift[c] + s1[c] / fc
                if cnt >= 2:
                    x = (s2[c] - s1[c] * s1[c] / fc) / (fc - 1.0)
                    var[c] = 0.0 if x < 0.0 else x
                else:
                    var[c] = nan
            mi, mq, vi, vq = mean[0], mean[1], var[0], var[1]
            cov = var[2] - 0.5 * (vi + vq)
            m2 = mi * mi + mq * mq
            if m2 > 0:
                across = (mq * mq * vi - 2 * mi * mq * cov + mi * mi * vq) / m2
            else:
                across = 0.5 * (vi + vq)
            x = across * factor[cnt]
            if x < 0.0:
                x = 0.0
            noise = math.sqrt(x) if dof[cnt] >= min_dof else nan
            if noise == noise:
                noise_u = 1.0 / math.sqrt(2.0 * dof[cnt])
            vec = math.sqrt(m2)
            vt, vp = var[3], var[4]
            cov_tp = var[5] - 0.5 * (vt + vp)
            slope = cov_tp / vt
            resid = vp - cov_tp * slope
            if resid < 0.0:
                resid = 0.0
            off = slope * per_row
            u_line = math.sqrt(resid * 12.0 / n_mean[cnt]) / cnt
            u_walk = math.sqrt(1.2 * var[6] / cnt)
            if n_mean[cnt] >= 10 and resid < 0.25:
                if u_line != u_line or u_walk > u_line:  # fmax: the larger, NaN ignored
                    u_line = u_walk
                off_u = u_line * per_row
        r.noise = noise
        r.noise_u = noise_u
        r.vector_amplitude = vec
        r.offset_hz = off
        r.offset_u_hz = off_u
        r.snr_db = 20.0 * math.log10(amp / noise)
        rel = noise / amp
        r.snr_u_db = db_per * math.sqrt(noise_u * noise_u + rel * rel)
        x = amp * amp - 2.0 * noise * noise
        r.amplitude_corrected = math.sqrt(0.0 if x < 0.0 else x)
        r.biased = not (20.0 * math.log10(vec / noise) >= bias_db)
        r.ref_hz = ref_hz
        drifting = abs(off) - 2.0 * off_u > follow_hz
        r.locked = not drifting
        r.lock_reason = 1 if drifting else 0
    if m:
        state[0], state[1] = pr, pq
        state[2] = state[2] + csum
    return m


@_jit
def _cascade(sos, zi, first, end, buf, n):
    # Sections first..end-1 in place on buf[:n].  Four sections at a time
    # run skewed (section j of the group on sample k - j), so their four state
    # recursions are independent and overlap in the processor, with the
    # state in registers; each section still sees its samples in order with
    # sosfilt's arithmetic, so the result is bit-identical.
    s = first
    if n >= 4:
        while end - s >= 4:
            _four(sos, zi, s, buf, n)
            s += 4
        if end - s >= 2:
            _two(sos, zi, s, buf, n)
            s += 2
    while s < end:
        _one(sos, zi, s, buf, 0, n)
        s += 1


@_jit
def _one(sos, zi, s, buf, lo, hi):
    # section s over buf[lo:hi] in place: scipy's order of terms
    b0 = sos[s, 0]
    b1 = sos[s, 1]
    b2 = sos[s, 2]
    a1 = sos[s, 4]
    a2 = sos[s, 5]
    z0 = zi[s, 0]
    z1 = zi[s, 1]
    for k in range(lo, hi):
        v = buf[k]
        w = b0 * v + z0
        z0 = b1 * v - a1 * w + z1
        z1 = b2 * v - a2 * w
        buf[k] = w
    zi[s, 0] = z0
    zi[s, 1] = z1


@_jit
def _bq(c0, c1, c2, c4, c5, za, zb, v):
    # one section on one sample, sosfilt's order of terms: (output, za, zb)
    w = c0 * v + za
    return w, c1 * v - c4 * w + zb, c2 * v - c5 * w


@_jit
def _two(sos, zi, s, buf, n):
    # sections s, s+1 on buf[:n] (n >= 2), the second one sample behind; the
    # first and last steps (one section each) held in registers as well
    p0, p1, p2, p4, p5 = sos[s, 0], sos[s, 1], sos[s, 2], sos[s, 4], sos[s, 5]
    q0, q1, q2, q4, q5 = sos[s + 1, 0], sos[s + 1, 1], sos[s + 1, 2], sos[s + 1, 4], sos[s + 1, 5]
    pa, pb, qa, qb = zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1]
    vq, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[0])
    for k in range(1, n):
        v = buf[k]
        w = p0 * v + pa
        pa = p1 * v - p4 * w + pb
        pb = p2 * v - p5 * w
        x = q0 * vq + qa
        qa = q1 * vq - q4 * x + qb
        qb = q2 * vq - q5 * x
        buf[k - 1] = x
        vq = w
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    buf[n - 1] = x
    zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1] = pa, pb, qa, qb


@_jit
def _four(sos, zi, s, buf, n):
    # sections s..s+3 on buf[:n] (n >= 3), section s+j running j samples
    # behind; the ramps in and out (1, 2, 3 sections at a time) run skewed
    # too, so no section waits for another one's whole ramp
    p0, p1, p2, p4, p5 = sos[s, 0], sos[s, 1], sos[s, 2], sos[s, 4], sos[s, 5]
    q0, q1, q2, q4, q5 = sos[s + 1, 0], sos[s + 1, 1], sos[s + 1, 2], sos[s + 1, 4], sos[s + 1, 5]
    r0, r1, r2, r4, r5 = sos[s + 2, 0], sos[s + 2, 1], sos[s + 2, 2], sos[s + 2, 4], sos[s + 2, 5]
    u0, u1, u2, u4, u5 = sos[s + 3, 0], sos[s + 3, 1], sos[s + 3, 2], sos[s + 3, 4], sos[s + 3, 5]
    pa, pb, qa, qb = zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1]
    ra, rb, ua, ub = zi[s + 2, 0], zi[s + 2, 1], zi[s + 3, 0], zi[s + 3, 1]
    # ramp in: vq, vr, vu are the inputs waiting for sections s+1, s+2, s+3
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[0])
    vq = w
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[1])
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    vr, vq = x, w
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[2])
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    vu, vr, vq = y, x, w
    for k in range(3, n):
        v = buf[k]
        w = p0 * v + pa
        pa = p1 * v - p4 * w + pb
        pb = p2 * v - p5 * w
        x = q0 * vq + qa
        qa = q1 * vq - q4 * x + qb
        qb = q2 * vq - q5 * x
        y = r0 * vr + ra
        ra = r1 * vr - r4 * y + rb
        rb = r2 * vr - r5 * y
        z = u0 * vu + ua
        ua = u1 * vu - u4 * z + ub
        ub = u2 * vu - u5 * z
        buf[k - 3] = z
        vu = y
        vr = x
        vq = w
    # ramp out: the last sample through sections s+1..s+3
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 3] = z
    vu, vr = y, x
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 2] = z
    vu = y
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 1] = z
    zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1] = pa, pb, qa, qb
    zi[s + 2, 0], zi[s + 2, 1], zi[s + 3, 0], zi[s + 3, 1] = ra, rb, ua, ub


@_jit
def _four_two(sos, zi, s, buf, t, buf2, n):
    # _four's sections s..s+3 on buf[:n] and _two's sections t, t+1 on
    # buf2[:n] (another cascade) in one loop (n >= 3): six independent
    # recursions; each section's arithmetic and order as in _four and _two
    p0, p1, p2, p4, p5 = sos[s, 0], sos[s, 1], sos[s, 2], sos[s, 4], sos[s, 5]
    q0, q1, q2, q4, q5 = sos[s + 1, 0], sos[s + 1, 1], sos[s + 1, 2], sos[s + 1, 4], sos[s + 1, 5]
    r0, r1, r2, r4, r5 = sos[s + 2, 0], sos[s + 2, 1], sos[s + 2, 2], sos[s + 2, 4], sos[s + 2, 5]
    u0, u1, u2, u4, u5 = sos[s + 3, 0], sos[s + 3, 1], sos[s + 3, 2], sos[s + 3, 4], sos[s + 3, 5]
    g0, g1, g2, g4, g5 = sos[t, 0], sos[t, 1], sos[t, 2], sos[t, 4], sos[t, 5]
    h0, h1, h2, h4, h5 = sos[t + 1, 0], sos[t + 1, 1], sos[t + 1, 2], sos[t + 1, 4], sos[t + 1, 5]
    pa, pb, qa, qb = zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1]
    ra, rb, ua, ub = zi[s + 2, 0], zi[s + 2, 1], zi[s + 3, 0], zi[s + 3, 1]
    ga, gb, ha, hb = zi[t, 0], zi[t, 1], zi[t + 1, 0], zi[t + 1, 1]
    # ramps in: the four's as in _four; the two's first three samples
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[0])
    vq = w
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[1])
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    vr, vq = x, w
    w, pa, pb = _bq(p0, p1, p2, p4, p5, pa, pb, buf[2])
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    vu, vr, vq = y, x, w
    vh, ga, gb = _bq(g0, g1, g2, g4, g5, ga, gb, buf2[0])
    for k in range(1, 3):
        e, ga, gb = _bq(g0, g1, g2, g4, g5, ga, gb, buf2[k])
        f, ha, hb = _bq(h0, h1, h2, h4, h5, ha, hb, vh)
        buf2[k - 1] = f
        vh = e
    for k in range(3, n):
        v = buf[k]
        w = p0 * v + pa
        pa = p1 * v - p4 * w + pb
        pb = p2 * v - p5 * w
        x = q0 * vq + qa
        qa = q1 * vq - q4 * x + qb
        qb = q2 * vq - q5 * x
        y = r0 * vr + ra
        ra = r1 * vr - r4 * y + rb
        rb = r2 * vr - r5 * y
        z = u0 * vu + ua
        ua = u1 * vu - u4 * z + ub
        ub = u2 * vu - u5 * z
        v2 = buf2[k]
        e = g0 * v2 + ga
        ga = g1 * v2 - g4 * e + gb
        gb = g2 * v2 - g5 * e
        f = h0 * vh + ha
        ha = h1 * vh - h4 * f + hb
        hb = h2 * vh - h5 * f
        buf[k - 3] = z
        buf2[k - 1] = f
        vu = y
        vr = x
        vq = w
        vh = e
    # ramps out
    x, qa, qb = _bq(q0, q1, q2, q4, q5, qa, qb, vq)
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 3] = z
    vu, vr = y, x
    y, ra, rb = _bq(r0, r1, r2, r4, r5, ra, rb, vr)
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 2] = z
    vu = y
    z, ua, ub = _bq(u0, u1, u2, u4, u5, ua, ub, vu)
    buf[n - 1] = z
    f, ha, hb = _bq(h0, h1, h2, h4, h5, ha, hb, vh)
    buf2[n - 1] = f
    zi[s, 0], zi[s, 1], zi[s + 1, 0], zi[s + 1, 1] = pa, pb, qa, qb
    zi[s + 2, 0], zi[s + 2, 1], zi[s + 3, 0], zi[s + 3, 1] = ra, rb, ua, ub
    zi[t, 0], zi[t, 1], zi[t + 1, 0], zi[t + 1, 1] = ga, gb, ha, hb


@_jit
def _lowpass_rows(b0, b1, a1, zi, work, t0, t1, first, every, rows, m):
    # the tile of samples t0..t1-1, mixed into work[:, :t1 - t0], through
    # every channel's first-order sections in place; the due samples (first,
    # first + every, ...) in the tile go to rows from row m; returns the new m
    n = t1 - t0
    if zi.shape[1] == 2:
        _first_order_iq(b0, b1, a1, zi, work, n)
    else:
        for ch in range(zi.shape[1]):
            _first_order(b0, b1, a1, zi, ch, work[ch], n)
    k = first + ((t0 - first + every - 1) // every) * every if t0 > first else first
    while k < t1:
        for ch in range(zi.shape[1]):
            rows[ch, m] = work[ch, k - t0]
        m += 1
        k += every
    return m


@_jit
def _first_order(b0, b1, a1, zi, ch, buf, n):
    # zi.shape[0] equal first-order sections on buf[:n] in place (lfilter of
    # order 1, scipy's order of terms: y = z + b0 x; z = b1 x - a1 y), four
    # at a time skewed by one sample each, as in _cascade: bit-identical
    n_sec = zi.shape[0]
    s = 0
    if n >= 4:
        while n_sec - s >= 4:
            za, zb, zc, zd = zi[s, ch, 0], zi[s + 1, ch, 0], zi[s + 2, ch, 0], zi[s + 3, ch, 0]
            za = _order1(b0, b1, a1, za, buf, 0, 3)
            zb = _order1(b0, b1, a1, zb, buf, 0, 2)
            zc = _order1(b0, b1, a1, zc, buf, 0, 1)
            vb, vc, vd = buf[2], buf[1], buf[0]
            for k in range(3, n):
                v = buf[k]
                wa = za + b0 * v
                za = b1 * v - a1 * wa
                wb = zb + b0 * vb
                zb = b1 * vb - a1 * wb
                wc = zc + b0 * vc
                zc = b1 * vc - a1 * wc
                wd = zd + b0 * vd
                zd = b1 * vd - a1 * wd
                buf[k - 3] = wd
                vd = wc
                vc = wb
                vb = wa
            buf[n - 1], buf[n - 2], buf[n - 3] = vb, vc, vd
            zi[s, ch, 0] = za
            zi[s + 1, ch, 0] = _order1(b0, b1, a1, zb, buf, n - 1, n)
            zi[s + 2, ch, 0] = _order1(b0, b1, a1, zc, buf, n - 2, n)
            zi[s + 3, ch, 0] = _order1(b0, b1, a1, zd, buf, n - 3, n)
            s += 4
    while s < n_sec:
        zi[s, ch, 0] = _order1(b0, b1, a1, zi[s, ch, 0], buf, 0, n)
        s += 1


@_jit
def _first_order_iq(b0, b1, a1, zi, work, n):
    # the lock-in's I and Q (work[0], work[1]) through the same sections in
    # one pass per pair of sections: four independent recursions a sample
    # (sections s, s+1 of I and of Q, s+1 one sample behind), as in _cascade
    n_sec = zi.shape[0]
    x, y = work[0], work[1]
    s = 0
    if n >= 2:
        while n_sec - s >= 2:
            ia = _order1(b0, b1, a1, zi[s, 0, 0], x, 0, 1)
            qa = _order1(b0, b1, a1, zi[s, 1, 0], y, 0, 1)
            ib, qb = zi[s + 1, 0, 0], zi[s + 1, 1, 0]
            vi, vq = x[0], y[0]
            for k in range(1, n):
                u = x[k]
                w = y[k]
                wa = ia + b0 * u
                ia = b1 * u - a1 * wa
                va = qa + b0 * w
                qa = b1 * w - a1 * va
                wb = ib + b0 * vi
                ib = b1 * vi - a1 * wb
                vb = qb + b0 * vq
                qb = b1 * vq - a1 * vb
                x[k - 1] = wb
                y[k - 1] = vb
                vi = wa
                vq = va
            x[n - 1], y[n - 1] = vi, vq
            zi[s, 0, 0], zi[s, 1, 0] = ia, qa
            zi[s + 1, 0, 0] = _order1(b0, b1, a1, ib, x, n - 1, n)
            zi[s + 1, 1, 0] = _order1(b0, b1, a1, qb, y, n - 1, n)
            s += 2
    while s < n_sec:  # one section left: I and Q side by side
        ia, qa = zi[s, 0, 0], zi[s, 1, 0]
        for k in range(n):
            u = x[k]
            w = y[k]
            wa = ia + b0 * u
            ia = b1 * u - a1 * wa
            va = qa + b0 * w
            qa = b1 * w - a1 * va
            x[k] = wa
            y[k] = va
        zi[s, 0, 0], zi[s, 1, 0] = ia, qa
        s += 1


@_jit
def _order1(b0, b1, a1, z, buf, lo, hi):
    # one first-order section over buf[lo:hi] in place; returns its state
    for k in range(lo, hi):
        v = buf[k]
        w = z + b0 * v
        z = b1 * v - a1 * w
        buf[k] = w
    return z


def _warn_once(message: str) -> None:
    if not _state["warned"]:
        _state["warned"] = True
        log.warning(message)


class _Kernels:
    """The compiled kernels, as attributes."""

    def __init__(self):
        self.sos_block = sos_block
        self.sos_bank = sos_bank
        self.sos_bank_frames = _direct(sos_bank, (np.zeros(1), np.zeros((1, 1), np.float32),
                                                  np.zeros((1, 1))))
        self.mix_internal = mix_internal
        self.segment_steps = segment_steps
        self.mix_cycles_rows = mix_cycles_rows
        self.square_rows = square_rows
        self.pll_block = pll_block
        self.lockin_readout = lockin_readout


def _direct(kernel, examples):
    """The compiled code of ``kernel`` for the types of ``examples``, callable
    from Python without the dispatcher (``kernel`` itself if numba does not
    expose it).

    A dispatcher call types every argument to pick its compiled version:
    about 160 ns of a 64-sample bank call's 1.3 us here.  The compiled
    version's own wrapper still refuses a non-array or an array of another
    dtype (TypeError) and still releases the GIL, but does not check the
    number of dimensions or the layout: callers pass exactly the example
    types (numba's ``Dispatcher.overloads``: signature -> compile result,
    whose ``entry_point`` is that wrapper).
    """
    try:
        sig = tuple(numba.typeof(a) for a in examples)
        return kernel.overloads[sig].entry_point
    except Exception as e:  # numba's internals moved: the dispatcher still works
        log.debug("direct call of %s unavailable (%s)", getattr(kernel, "__name__", kernel), e)
        return kernel


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
    plan = bank_plan([1], [1])
    sos_bank(np.concatenate((plan.view(np.float64), one.ravel(), np.zeros(3))),
             np.zeros((4, 2), np.float32), np.zeros((1, 4)))
    mix_internal(x, 4094, np.zeros(2), 0.1, 0.0, np.zeros((2, RESEED)), np.zeros((2, 4)))
    segment_steps(np.zeros((2, 1, 1)), np.zeros((1, 2)), np.zeros((2, 1, 1)), np.zeros((2, 4)), 0,
                  0, 1, 1, np.zeros(2), np.zeros((2, 4)), np.zeros(1))
    return _Kernels()
