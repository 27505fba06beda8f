"""Detectors at the end of a chain: the software lock-in and the RMS detector.

API map
-------
- :class:`ReferenceSpec`: the ``[reference]`` table (internal frequency and
  phase, or a measured reference on an input channel).
- :class:`DetectorSpec`: a chain's ``detector`` table (type, time constant,
  slope, noise window).
- :func:`make_detector` builds a :class:`LockIn` or an :class:`RmsDetector`.
- Both detectors: ``process(x, start_index, ref=None) -> rows`` (structured
  array of :data:`READING_DTYPE`, one row per sample index ``k`` with
  ``k % output_every == 0``), ``enbw_hz``, ``settling_s(fraction)``,
  ``reset()``, ``note_gap(frames)``.

Decisions
---------
Amplitudes are RMS, not peak.  A sine ``A cos(w t + phi)`` reads
``amplitude = A / sqrt(2)``, ``in_phase = (A / sqrt 2) cos(phi - phi_ref)``,
``quadrature = (A / sqrt 2) sin(phi - phi_ref)`` and ``phase_deg = phi -
phi_ref`` wrapped to (-180, 180]: a signal that leads the reference reads a
positive phase.  The mixer multiplies by ``sqrt(2) cos(theta)`` and
``-sqrt(2) sin(theta)``, ``theta`` being the reference phase.

``noise`` is the RMS fluctuation of the output across the signal's direction:
the standard deviation of (I, Q) along the unit vector perpendicular to their
mean over the last ``noise_window_s`` of output rows (sample variance, ddof 1;
fewer rows than a window: the rows there are; NaN before two rows, and NaN
while the output low-pass settles after a start, 99.9 % of a step; with a zero
mean, ``sqrt((var(I) + var(Q)) / 2)``).  A target moved toward or away from the
sensor changes the amplitude along the mean direction only, so the noise
read-out does not mistake motion for noise.  Noise is isotropic in the (I, Q)
plane, so for white input of one-sided density ``e`` (V/sqrt(Hz)) it still
tends to ``e * sqrt(enbw_hz)``.
For the RMS detector ``noise`` is the standard deviation of ``amplitude`` over
the window and ``snr_db`` compares the window's mean amplitude with it.

Output low-pass
---------------
``n = slope_db_oct / 6`` identical first-order sections of time constant
``tau``.  The pole is exact, ``a = exp(-1 / (fs tau))``; the numerator is the
triangle-hold (first-order-hold) equivalent of the RC section, which makes
the cascade's step response track the continuous ``P(n, t / tau)`` to half a
sample for every ``n`` (a plain ``(1 - a) / (1 - a z^-1)`` section is early by
``(n + 1) / 2`` samples).  See Franklin, Powell and Workman, *Digital Control
of Dynamic Systems*, 3rd ed., 1998, sec. 6.3 (triangle-hold equivalent; from
memory).

Compiled path
-------------
By default both detectors run one compiled call per block
(:mod:`livefilt.dsp.kernels`): mixer (or square) and the ``n`` output sections,
sample by sample, storing only the rows due.  The sections are linear and
recursive, so every sample still passes through them, but the per-sample
cost is a few multiply-adds; rows are read at their own sample indices, so
nothing is decimated and nothing can alias.  A decimating front end (mix,
then low-pass and downsample in stages) would cost less per sample but
would not reproduce the straightforward full-rate computation to 1e-9; the
per-sample loop does (to about 1e-14, the internal reference being a
phasor re-seeded from the exact phase every 64 samples), and it is
already far below the time budget at 192 kHz.  ``exact_path=True``, or
compiled kernels unavailable (``LIVEFILT_NO_JIT=1``), selects the
straightforward numpy/scipy path below; tests compare the two.

State (for a faster path that must match)
-----------------------------------------
``LockIn``: ``b`` (2,), ``a`` (2,) section coefficients; ``zi`` (n, 2, 1)
lfilter state of the sections for the rows I, Q; ``stats`` a
:class:`_WindowStats` over (I, Q) rows; ``tracker`` a :class:`_RefTracker`
or None.  ``RmsDetector``: the same with ``zi`` (n, 1, 1) on ``x**2`` and
``stats`` over the amplitude rows.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from scipy.signal import lfilter
from scipy.special import gamma, gammaincinv

from livefilt.dsp import kernels
from livefilt import fields
from livefilt.errors import SettingError

__all__ = [
    "READING_DTYPE",
    "ReferenceSpec",
    "DetectorSpec",
    "LockIn",
    "RmsDetector",
    "make_detector",
]

log = logging.getLogger(__name__)

#: One detector reading (one output row).
_SQRT_HALF = np.sqrt(0.5)

READING_DTYPE = np.dtype([
    ("index", np.int64),
    ("in_phase", np.float64),
    ("quadrature", np.float64),
    ("amplitude", np.float64),
    ("phase_deg", np.float64),
    ("noise", np.float64),
    ("snr_db", np.float64),
    ("ref_hz", np.float64),
    ("locked", np.bool_),
])

_SLOPES = (6, 12, 18, 24)
_WAVEFORMS = ("square", "sine")
_SQRT2 = math.sqrt(2.0)
_NO_ROWS = np.empty(0, READING_DTYPE)
_NO_ROWS.flags.writeable = False  # shared by every block with no row due


# -- settings ---------------------------------------------------------------
@dataclass(frozen=True)
class ReferenceSpec:
    """The modulation reference of the lock-in.

    Attributes
    ----------
    frequency_hz : float or None
        Internal reference frequency, Hz (0 < f < fs/2); with ``channel``
        set, the expected frequency (starting guess and lock-range centre).
    phase_deg : float
        Phase offset added to the reference, degrees.
    channel : int or None
        Input channel carrying a measured reference.
    waveform : {"square", "sine"}
        Shape of the measured reference.
    lock_range : float
        Relative lock range around ``frequency_hz`` (0 < r < 1).
    """

    frequency_hz: float | None = None
    phase_deg: float = 0.0
    channel: int | None = None
    waveform: str = "square"
    lock_range: float = 0.2

    @property
    def measured(self) -> bool:
        return self.channel is not None

    @classmethod
    def from_mapping(cls, table: dict, fs: float, channels: int) -> "ReferenceSpec":
        """Validate the ``[reference]`` table; field paths are relative to it.

        Raises
        ------
        SettingError
            For an unknown key or a value out of range.
        """
        _check_keys(table, ("frequency_hz", "phase_deg", "channel", "waveform", "lock_range"),
                    "a [reference] table")
        freq = table.get("frequency_hz")
        if freq is not None:
            freq = _number(table, "frequency_hz")
            if not 0 < freq < fs / 2:
                raise SettingError("frequency_hz", table["frequency_hz"],
                                   f"must be above 0 and below Nyquist, {fs / 2:g} Hz")
        phase = _number(table, "phase_deg", 0.0)
        channel = table.get("channel")
        if channel is not None:
            if isinstance(channel, bool) or not isinstance(channel, int):
                raise SettingError("channel", channel, "must be an input channel number (integer)")
            if not 0 <= channel < channels:
                raise SettingError("channel", channel,
                                   f"must be an input channel, 0 to {channels - 1}")
        if freq is None and channel is None:
            raise SettingError("frequency_hz", None,
                               "a lock-in needs frequency_hz or channel (a measured reference)")
        waveform = table.get("waveform", "square")
        fields.choice(waveform, "waveform", _WAVEFORMS)
        lock_range = _number(table, "lock_range", 0.2)
        if not 0 < lock_range < 1:
            raise SettingError("lock_range", table["lock_range"],
                               "must be above 0 and below 1 (relative to frequency_hz)")
        return cls(freq, phase, channel, waveform, lock_range)

    def to_mapping(self) -> dict:
        """The table that :meth:`from_mapping` turns back into this spec."""
        out = {}
        if self.frequency_hz is not None:
            out["frequency_hz"] = self.frequency_hz
        out["phase_deg"] = self.phase_deg
        if self.channel is not None:
            out["channel"] = self.channel
        out["waveform"] = self.waveform
        out["lock_range"] = self.lock_range
        return out


@dataclass(frozen=True)
class DetectorSpec:
    """A chain's detector.

    Attributes
    ----------
    type : {"lockin", "rms"}
    time_constant_s : float
        Time constant of each output low-pass section, s.
    slope_db_oct : int
        6, 12, 18 or 24 dB/octave: 1 to 4 cascaded sections.
    noise_window_s : float
        Window of output rows over which the noise is estimated, s.
    """

    type: str
    time_constant_s: float
    slope_db_oct: int = 24
    noise_window_s: float = 2.0

    @property
    def sections(self) -> int:
        """Number of cascaded first-order sections."""
        return self.slope_db_oct // 6

    @classmethod
    def from_mapping(cls, table: dict, fs: float) -> "DetectorSpec":
        """Validate a ``detector`` table; field paths are relative to it.

        ``noise_window_s`` defaults to max(2 s, 20 time constants).

        Raises
        ------
        SettingError
            For an unknown key, a missing time constant or a value out of range.
        """
        _check_keys(table, ("type", "time_constant_s", "slope_db_oct", "noise_window_s"),
                    "a detector")
        kind = table.get("type", "lockin")
        fields.choice(kind, "type", ("lockin", "rms"))
        if "time_constant_s" not in table:
            raise SettingError("time_constant_s", None, "is required (seconds, > 0)")
        tau = _number(table, "time_constant_s")
        if not tau >= 2.0 / fs:
            raise SettingError("time_constant_s", table["time_constant_s"],
                               f"must be at least 2 sample periods, {2.0 / fs:g} s at {fs:g} Hz")
        slope = table.get("slope_db_oct", 24)
        if isinstance(slope, bool) or not isinstance(slope, (int, float)) or slope not in _SLOPES:
            raise SettingError("slope_db_oct", slope, "must be 6, 12, 18 or 24 (dB/octave)")
        window = _number(table, "noise_window_s", max(2.0, 20.0 * tau))
        if not window > 0:
            raise SettingError("noise_window_s", table["noise_window_s"], "must be above 0 s")
        return cls(kind, tau, int(slope), window)

    def to_mapping(self) -> dict:
        """The table that :meth:`from_mapping` turns back into this spec."""
        return {"type": self.type, "time_constant_s": self.time_constant_s,
                "slope_db_oct": self.slope_db_oct, "noise_window_s": self.noise_window_s}


def make_detector(spec: DetectorSpec, reference: ReferenceSpec | None, fs: float,
                  output_every: int, exact_path: bool = False) -> "LockIn | RmsDetector":
    """Build the detector ``spec`` asks for.

    Parameters
    ----------
    spec : DetectorSpec
    reference : ReferenceSpec or None
        Needed for a lock-in.
    fs : float
        Sample rate, Hz.
    output_every : int
        One output row every this many samples (rows at ``k % output_every == 0``).
    exact_path : bool
        Use the straightforward numpy/scipy path instead of the compiled one.

    Raises
    ------
    SettingError
        ``reference`` when a lock-in has no reference.
    """
    if isinstance(output_every, bool) or not isinstance(output_every, (int, np.integer)) \
            or output_every < 1:
        raise SettingError("output_every", output_every, "must be a whole number of samples >= 1")
    if spec.type == "rms":
        return RmsDetector(spec, fs, int(output_every), exact_path)
    if reference is None:
        raise SettingError("reference", None,
                           "a lock-in needs frequency_hz or channel in [reference]")
    return LockIn(spec, reference, fs, int(output_every), exact_path)


# -- detectors --------------------------------------------------------------
class _Detector:
    """Shared parts: the output low-pass, the noise window, row selection."""

    _channels = 1
    _stat_channels = 1  # streams kept in the noise window

    def __init__(self, spec: DetectorSpec, fs: float, output_every: int,
                 exact_path: bool = False):
        self.spec = spec
        self.fs = float(fs)
        self.output_every = output_every
        self.tau = spec.time_constant_s
        self.n_sections = spec.sections
        self.b, self.a = _section_coefficients(self.fs, self.tau)
        self.exact_path = bool(exact_path)
        self._kern = None if self.exact_path else kernels.compiled()
        self._coef = (float(self.b[0]), float(self.b[1]), float(self.a[1]))
        self._rows_buf = np.empty((self._channels, 0))
        #: rows in the noise window
        self.window_rows = max(2, int(round(spec.noise_window_s * self.fs / output_every)))
        self._work: dict = {}
        self.reset()

    @property
    def enbw_hz(self) -> float:
        """One-sided equivalent noise bandwidth of the output low-pass, Hz.

        ``Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau)`` (REFERENCES row 3a;
        closed form by integrating ``|H|^2`` of n RC sections).
        """
        n = self.n_sections
        return gamma(n - 0.5) / (4.0 * math.sqrt(math.pi) * gamma(n) * self.tau)

    def settling_s(self, fraction: float) -> float:
        """Time for a step to reach ``fraction`` of its final value, s.

        ``tau * P^-1(n, fraction)``, P the regularised lower incomplete gamma
        function (DLMF 8.2; REFERENCES row 3c).
        """
        if not 0 < fraction < 1:
            raise SettingError("fraction", fraction, "must be above 0 and below 1")
        return float(self.tau * gammaincinv(self.n_sections, fraction))

    def reset(self) -> None:
        """Forget all state (filters start from zero, the noise window empties)."""
        self.zi = np.zeros((self.n_sections, self._channels, 1))
        self.stats = _WindowStats(self.window_rows, self._stat_channels)
        self._quiet_until: int | None = None

    def _settling(self, index: np.ndarray) -> int:
        """How many of the rows at ``index`` fall while the output low-pass is
        still settling after a start (99.9 %, REFERENCES row 3c).

        Their noise and SNR read NaN and they stay out of the noise window:
        the output's rise from zero is the detector's own transient, not noise.
        Counted from the first row's sample index, so any block split agrees.
        """
        if self._quiet_until is None:
            if not len(index):
                return 0
            self._quiet_until = int(index[0]) + int(np.ceil(self.settling_s(0.999) * self.fs))
        return int(np.searchsorted(index, self._quiet_until))

    def note_gap(self, frames: int) -> None:
        """Samples were lost before the next block; the filter state is kept."""

    def _lowpass(self, work: np.ndarray) -> np.ndarray:
        """Run the n sections over ``work`` (channels, n) in place of state ``zi``."""
        for i in range(self.n_sections):
            work, self.zi[i] = lfilter(self.b, self.a, work, axis=1, zi=self.zi[i])
        return work

    def _row_slice(self, start_index: int, n: int) -> slice:
        return slice((-start_index) % self.output_every, n, self.output_every)

    def _row_buffer(self, n: int) -> np.ndarray:
        """Room for the rows of an ``n``-sample block, (channels, rows); grows only."""
        need = n // self.output_every + 1
        if self._rows_buf.shape[1] < need:
            self._rows_buf = np.empty((self._channels, max(need, 2 * self._rows_buf.shape[1])))
        return self._rows_buf

    def _buffer(self, name: str, shape: tuple) -> np.ndarray:
        """A per-block work array, reused while the block size repeats."""
        buf = self._work.get(name)
        if buf is None or buf.shape != shape:
            buf = self._work[name] = np.empty(shape)
        return buf


class LockIn(_Detector):
    """Dual-phase software lock-in.

    The input is multiplied by ``sqrt(2) cos(theta)`` (in-phase) and
    ``-sqrt(2) sin(theta)`` (quadrature), ``theta`` the reference phase, and
    both products pass the output low-pass; so a signal ``A cos(theta + phi)``
    reads in_phase ``A/sqrt(2) cos(phi)``, quadrature ``A/sqrt(2) sin(phi)``,
    phase ``phi`` (positive when the signal leads the reference).

    The internal reference phase at sample ``k`` is ``2 pi f k / fs +
    phase``, with ``(k f / fs) mod 1`` taken in exact rational arithmetic at
    each block start, so it stays exact after hours and across gaps.  A
    measured reference is tracked by :class:`_RefTracker`.

    References
    ----------
    Meade, *Lock-in Amplifiers: Principles and Applications*, IEE 1983
    (dual-phase detection; from memory).
    """

    _channels = 2
    _stat_channels = 3  # I, Q and (I + Q)/sqrt 2 (for the I-Q covariance)

    def __init__(self, spec: DetectorSpec, reference: ReferenceSpec, fs: float,
                 output_every: int, exact_path: bool = False):
        self.reference = reference
        self.phase_rad = math.radians(reference.phase_deg)
        if not reference.measured:
            # f / fs as an exact fraction p / q of the float values given
            ratio = Fraction(reference.frequency_hz) / Fraction(fs)
            self._p, self._q = ratio.numerator, ratio.denominator
            self._cycles_per_sample = float(ratio)
            self._anchor1 = np.empty(1)
        super().__init__(spec, fs, output_every, exact_path)

    def reset(self) -> None:
        super().reset()
        self.tracker = (_RefTracker(self.reference, self.fs)
                        if self.reference.measured else None)

    def note_gap(self, frames: int) -> None:
        """Samples were lost: the measured-reference tracker re-acquires."""
        if self.tracker is not None:
            self.tracker.note_gap()

    def process(self, x: np.ndarray, start_index: int, ref: np.ndarray | None = None) -> np.ndarray:
        """Mix, low-pass and read out one block.

        Parameters
        ----------
        x : ndarray, shape (n,), float64
            The chain's filtered output.
        start_index : int
            Running sample index of ``x[0]`` (dropped samples counted).
        ref : ndarray, shape (n,), optional
            The raw reference-channel block (measured reference only).

        Returns
        -------
        ndarray of READING_DTYPE, one row per ``k % output_every == 0``.
        """
        x = np.ascontiguousarray(x, dtype=np.float64)
        n = x.shape[0]
        start_index = int(start_index)
        if self.tracker is not None:
            if ref is None:
                raise ValueError("a measured reference needs the reference block (ref)")
            cycles, ref_hz, locked = self.tracker.process(np.asarray(ref, np.float64), start_index)
        else:
            cycles = None
            ref_hz, locked = self.reference.frequency_hz, None
        if self._kern is None:
            return self._process_exact(x, start_index, cycles, ref_hz, locked)
        first = (-start_index) % self.output_every
        rows = self._row_buffer(n)
        b0, b1, a1 = self._coef
        if cycles is None:
            offset = start_index % kernels.ANCHOR
            fracs = self._anchor_phases(start_index - offset, offset + n)
            m = self._kern.mix_internal_rows(x, offset, fracs, self._cycles_per_sample, self.phase_rad, b0, b1, a1,
                                             self.zi, first, self.output_every, rows)
        else:
            m = self._kern.mix_cycles_rows(x, cycles, self.phase_rad, b0, b1, a1, self.zi,
                                           first, self.output_every, rows)
        if m == 0:
            return _NO_ROWS
        if locked is not None:
            at = slice(first, n, self.output_every)
            ref_hz, locked = ref_hz[at], locked[at]
        return self._readout(start_index + first, rows[0, :m], rows[1, :m], ref_hz, locked)

    def _process_exact(self, x, start_index, cycles, ref_hz, locked) -> np.ndarray:
        """The straightforward full-rate path: numpy mixer, scipy lfilter sections."""
        n = x.shape[0]
        if cycles is None:
            cycles = self._internal_cycles(start_index, n)
        theta = self._buffer("theta", (n,))
        np.multiply(cycles, 2.0 * math.pi, out=theta)
        theta += self.phase_rad
        work = self._buffer("mix", (2, n))
        np.cos(theta, out=work[0])
        np.sin(theta, out=work[1])
        work[1] *= -1.0
        work *= x
        work *= _SQRT2
        out = self._lowpass(work)
        rows_at = self._row_slice(start_index, n)
        if locked is not None:
            ref_hz, locked = ref_hz[rows_at], locked[rows_at]
        return self._readout(start_index + rows_at.start, out[0, rows_at], out[1, rows_at],
                             ref_hz, locked)

    def _readout(self, first_index: int, i_rows, q_rows, ref_hz, locked) -> np.ndarray:
        """Rows from the low-passed I and Q at the due samples."""
        rows = np.empty(i_rows.shape[0], READING_DTYPE)
        rows["index"] = np.arange(first_index, first_index + i_rows.shape[0] * self.output_every,
                                  self.output_every)
        rows["in_phase"] = i_rows
        rows["quadrature"] = q_rows
        rows["amplitude"] = np.hypot(i_rows, q_rows)
        rows["phase_deg"] = _wrap_deg(np.degrees(np.arctan2(q_rows, i_rows)))
        # Noise across the signal's direction: the variance of (I, Q) along the
        # unit vector perpendicular to the window's mean (I, Q).  Slow amplitude
        # changes (a target being moved) lie along the mean and are not noise;
        # isotropic noise has the same variance in every direction, so for
        # white input this still tends to e * sqrt(ENBW).  The third stream
        # (I + Q)/sqrt 2 gives the covariance: var = (vI + vQ)/2 + cov.
        k = self._settling(rows["index"])
        rows["noise"][:k] = np.nan
        if k < len(rows):
            i_s, q_s = i_rows[k:], q_rows[k:]
            mean, var = self.stats.update(np.stack((i_s, q_s, (i_s + q_s) * _SQRT_HALF), axis=1))
            mi, mq, vi, vq = mean[:, 0], mean[:, 1], var[:, 0], var[:, 1]
            cov = var[:, 2] - 0.5 * (vi + vq)
            m2 = mi * mi + mq * mq
            with np.errstate(invalid="ignore", divide="ignore"):
                across = np.where(m2 > 0, (mq * mq * vi - 2 * mi * mq * cov + mi * mi * vq) / m2,
                                  0.5 * (vi + vq))
            rows["noise"][k:] = np.sqrt(np.maximum(across, 0.0))
        rows["snr_db"] = _snr_db(rows["amplitude"], rows["noise"])
        rows["ref_hz"] = ref_hz
        rows["locked"] = True if locked is None else locked
        return rows

    def _anchor_phases(self, anchor: int, span: int) -> np.ndarray:
        """Exact ``(k f / fs) mod 1`` at the anchors ``anchor + i ANCHOR`` in a span."""
        count = max(1, (span - 1) // kernels.ANCHOR + 1)
        buf = self._buffer("anchors", (count,)) if count > 1 else self._anchor1
        p, q = self._p, self._q
        for i in range(count):
            buf[i] = ((anchor + i * kernels.ANCHOR) * p % q) / q
        return buf

    def _internal_cycles(self, start_index: int, n: int) -> np.ndarray:
        """Reference phase in cycles, ``(k f / fs) mod 1`` at the block start
        exactly (integers), then ``+ j f / fs`` for the ``j``-th sample."""
        frac0 = (start_index * self._p % self._q) / self._q
        ramp = self._work.get("ramp")
        if ramp is None or ramp.shape[0] != n:
            ramp = self._work["ramp"] = np.arange(n) * self._cycles_per_sample
        cycles = self._buffer("cycles", (n,))
        np.add(ramp, frac0, out=cycles)
        return cycles


class RmsDetector(_Detector):
    """Band power: ``amplitude = sqrt(low-pass of x**2)`` with the lock-in's
    output low-pass; in_phase = amplitude, quadrature = 0, phase NaN."""

    def process(self, x: np.ndarray, start_index: int, ref: np.ndarray | None = None) -> np.ndarray:
        """Square, low-pass, read out one block (see :meth:`LockIn.process`)."""
        x = np.ascontiguousarray(x, dtype=np.float64)
        n = x.shape[0]
        start_index = int(start_index)
        if self._kern is None:
            work = self._buffer("square", (1, n))
            np.multiply(x, x, out=work[0])
            out = self._lowpass(work)
            rows_at = self._row_slice(start_index, n)
            return self._readout(start_index + rows_at.start, out[0, rows_at])
        first = (-start_index) % self.output_every
        buf = self._row_buffer(n)
        b0, b1, a1 = self._coef
        m = self._kern.square_rows(x, b0, b1, a1, self.zi, first, self.output_every, buf)
        if m == 0:
            return _NO_ROWS
        return self._readout(start_index + first, buf[0, :m])

    def _readout(self, first_index: int, power) -> np.ndarray:
        """Rows from the low-passed square at the due samples."""
        amp = np.sqrt(np.maximum(power, 0.0))
        rows = np.empty(amp.shape[0], READING_DTYPE)
        rows["index"] = np.arange(first_index, first_index + amp.shape[0] * self.output_every,
                                  self.output_every)
        rows["in_phase"] = amp
        rows["quadrature"] = 0.0
        rows["amplitude"] = amp
        rows["phase_deg"] = np.nan
        k = self._settling(rows["index"])
        rows["noise"][:k] = np.nan
        rows["snr_db"][:k] = np.nan
        if k < len(rows):
            mean, var = self.stats.update(amp[k:, None])
            rows["noise"][k:] = np.sqrt(var[:, 0])
            rows["snr_db"][k:] = _snr_db(mean[:, 0], rows["noise"][k:])
        rows["ref_hz"] = np.nan
        rows["locked"] = True
        return rows


# -- private helpers --------------------------------------------------------
class _RefTracker:
    """Follows a measured reference: frequency and phase from its rising
    crossings of the running mean, feeding a phase-continuous oscillator.

    Method
    ------
    - Running mean and mean absolute deviation of the channel: one-pole
      low-passes (time constant max(0.05 s, 20 expected periods), 0.2 s
      when no frequency is expected).  A Schmitt trigger with
      hysteresis ``hyst * deviation`` around the mean finds rising edges;
      the crossing time is interpolated linearly between the last sample at or
      below the mean and the next one.
    - The last ``fit_len`` crossings are fitted with a straight line
      (crossing time against cycle number, least squares): period and phase.
      The fundamental of either waveform is ``cos(theta)``, which rises
      through the mean at ``theta = -90 deg``.
    - At each crossing the oscillator keeps its phase and takes the fitted
      frequency plus the correction that meets the fitted phase one period
      later (dead-beat), so its phase never jumps while locked.
    - Locked: at least ``min_cycles`` crossings, fit residual under 2 % of
      a period, frequency inside the lock range, and no more than 3 periods
      since the last crossing.  Losing lock logs one warning; the next
      crossing after a loss starts a new acquisition.

    State: ``mean_zi``, ``dev_zi`` (1,) lfilter states; ``high`` Schmitt
    state (None: unknown); ``last_np`` (index, d, d_next) of the last sample
    at or below the mean; ``t_ring``/``c_ring`` (fit_len,) times and cycle
    numbers of the recent crossings (``n_cross`` so far, slot ``i % fit_len``);
    ``osc_index``, ``osc_phase`` (cycles), ``osc_step`` (cycles per sample)
    the oscillator segment in force; ``period`` fitted period in samples.
    """

    min_cycles = 8
    max_residual = 0.02

    def __init__(self, spec: ReferenceSpec, fs: float):
        self.spec = spec
        self.fs = fs
        self.expected = spec.frequency_hz
        self.hyst = 0.5 if spec.waveform == "square" else 0.25
        mean_tau = max(0.05, 20.0 / self.expected) if self.expected else 0.2
        self.mean_a = math.exp(-1.0 / (fs * mean_tau))
        # about half a second of crossings: averages the +-0.5 sample
        # quantisation of a hard-edged square's crossings
        self.fit_len = int(min(1024, max(16, 0.5 * (self.expected or 1000.0))))
        self.t_ring = np.zeros(self.fit_len)
        self.c_ring = np.zeros(self.fit_len)
        self.mean_zi = None
        self.dev_zi = np.zeros(1)
        self.osc_index = 0
        self.osc_phase = 0.0
        self.osc_step = (self.expected or 0.0) / fs
        self.locked = False
        self._warned = False
        self.note_gap()

    def note_gap(self) -> None:
        self.high = None
        self.last_np = None
        self._restart("samples lost, re-acquiring")

    def _restart(self, why: str) -> None:
        self.n_cross = 0
        self.cycle = 0
        self.period = None
        self.last_cross = None
        self._set_locked(False, why)

    def _set_locked(self, value: bool, why: str) -> None:
        if self.locked and not value and not self._warned:
            log.warning("reference on channel %s lost lock: %s", self.spec.channel, why)
            self._warned = True
        if value:
            self._warned = False
        self.locked = value

    def process(self, ref: np.ndarray, start: int):
        """Return (oscillator phase in cycles, ref_hz, locked) per sample."""
        n = ref.shape[0]
        if n == 0:
            return np.empty(0), np.empty(0), np.empty(0, dtype=bool)
        if self.mean_zi is None:  # the running mean starts at the first sample
            self.mean_zi = np.array([self.mean_a * ref[0]])
        a = self.mean_a
        mean, self.mean_zi = lfilter([1 - a], [1, -a], ref, zi=self.mean_zi)
        d = ref - mean
        dev, self.dev_zi = lfilter([1 - a], [1, -a], np.abs(d), zi=self.dev_zi)
        h = self.hyst * dev
        up, down = d > h, d < -h
        # Schmitt trigger, vectorised: the state is the last threshold passed
        last = np.where(up | down, np.arange(n), -1)
        np.maximum.accumulate(last, out=last)
        high = np.where(last >= 0, up[np.maximum(last, 0)],
                        bool(self.high) if self.high is not None else True)
        if self.high is None:
            # unknown start: an edge counts only after a low was seen
            seen_low = np.maximum.accumulate(down)
            high = high | ~seen_low
        before = np.concatenate(([self.high if self.high is not None else True], high[:-1]))
        edges = np.flatnonzero(high & ~before)
        # last sample at or below the mean, for each sample
        nonpos = np.where(d <= 0, np.arange(n), -1)
        np.maximum.accumulate(nonpos, out=nonpos)

        cyc = np.empty(n)
        hz = np.empty(n)
        locked = np.empty(n, dtype=bool)
        seg = 0
        for e in edges:
            self._fill(seg, e, start, cyc, hz, locked)
            j = nonpos[e]
            if j >= 0:
                d0, d1 = d[j], d[j + 1]
                t = start + j + d0 / (d0 - d1)
            elif self.last_np is not None:
                j_abs, d0, d1 = self.last_np
                if d1 is None:
                    d1 = d[0]
                t = j_abs + d0 / (d0 - d1)
            else:
                t = start + e - 0.5
            self._crossing(t, start + e)
            seg = e
        self._fill(seg, n, start, cyc, hz, locked)
        self.high = bool(high[-1])
        if nonpos[-1] >= 0:
            j = nonpos[-1]
            self.last_np = (start + j, d[j], d[j + 1] if j + 1 < n else None)
        elif self.last_np is not None and self.last_np[2] is None:
            self.last_np = (self.last_np[0], self.last_np[1], d[0])
        return cyc, hz, locked

    def _fill(self, i0: int, i1: int, start: int, cyc, hz, locked) -> None:
        """Oscillator phase, frequency and lock for samples [i0, i1)."""
        if i1 <= i0:
            return
        k = np.arange(start + i0, start + i1)
        steps = k - self.osc_index
        cyc[i0:i1] = np.mod(self.osc_phase + self.osc_step * steps, 1.0)
        hz[i0:i1] = self.fs / self.period if self.period else (self.expected or np.nan)
        if self.locked:
            alive = k <= self.last_cross + 3.0 * self.period
            locked[i0:i1] = alive
            if not alive[-1]:
                self._restart("no reference crossings for 3 periods")
        else:
            locked[i0:i1] = False

    def _crossing(self, t: float, k: int) -> None:
        """A rising crossing at fractional index ``t``, detected at sample ``k``."""
        if self.last_cross is not None and self.period is not None \
                and t - self.last_cross > 3.0 * self.period:
            self._restart("crossings resumed after a pause")
        if self.n_cross:
            step = 1 if self.period is None else max(1, round((t - self.last_cross) / self.period))
            self.cycle += step
        slot = self.n_cross % self.fit_len
        self.t_ring[slot] = t
        self.c_ring[slot] = self.cycle
        self.n_cross += 1
        self.last_cross = t
        m = min(self.n_cross, self.fit_len)
        if m < 3:
            return
        # least squares, crossing time against cycle number, both taken
        # relative to this crossing so that hours of samples cost no precision
        tt = self.t_ring[:m] - t
        c = self.c_ring[:m] - self.cycle
        c_mean = c.sum() / m
        c -= c_mean
        t_mean = tt.sum() / m
        tt -= t_mean
        period = float(np.dot(c, tt) / np.dot(c, c))
        if not period > 2.0:
            self._restart("crossings faster than Nyquist")
            return
        tt -= period * c
        rms = math.sqrt(float(np.dot(tt, tt)) / m) / period
        self.period = period
        freq = self.fs / period
        in_range = (self.expected is None and freq < self.fs / 2) or (
            self.expected is not None
            and abs(freq - self.expected) <= self.spec.lock_range * self.expected)
        ok = m >= self.min_cycles and rms < self.max_residual and in_range
        # fitted model, in cycles: a crossing sits at its cycle number - 1/4 (a
        # rising crossing of cos(theta) is at theta = -90 deg)
        origin = t + t_mean

        def model(idx: float) -> float:
            return (idx - origin) / period + c_mean - 0.25

        cur = self.osc_phase + self.osc_step * (k - self.osc_index)
        if ok and not self.locked:
            # acquisition: take the model's phase at once
            self.osc_phase = model(k) % 1.0
            self.osc_step = 1.0 / period
        else:
            # dead-beat: meet the model one period from now, phase continuous
            err = (model(k + period) - cur - 1.0 + 0.5) % 1.0 - 0.5
            self.osc_phase = cur % 1.0
            self.osc_step = (1.0 + err) / period
        self.osc_index = k
        if ok != self.locked:
            if ok:
                log.info("reference on channel %s locked at %.4f Hz", self.spec.channel, freq)
                self._set_locked(True, "")
            else:
                why = (f"frequency {freq:.3f} Hz outside the lock range"
                       if not in_range else "irregular crossings")
                self._set_locked(False, why)


class _WindowStats:
    """Running mean and sample variance over the last ``W`` rows, O(1) a row.

    Sums of ``v - K`` and ``(v - K)**2`` are carried, ``K`` a shift; every
    time the row count reaches a multiple of ``W`` the sums are recomputed
    exactly from the window (so rounding does not build up over hours, and
    ``K`` follows the level, which keeps cancellation small).  Recomputation
    happens at fixed row numbers, so the result does not depend on how rows
    arrive in blocks.

    State: ``ring`` (W, ch) the last W rows (row r in slot r % W), ``count``
    rows seen, ``shift`` (ch,), ``s1`` (ch,), ``s2`` (ch,).
    """

    def __init__(self, window: int, channels: int):
        self.window = window
        self.ring = np.zeros((window, channels))
        self.count = 0
        self.shift = np.zeros(channels)
        self.s1 = np.zeros(channels)
        self.s2 = np.zeros(channels)

    def update(self, v: np.ndarray):
        """Add rows ``v`` (m, ch); return (mean, var) after each row, (m, ch)."""
        m = v.shape[0]
        mean = np.empty_like(v)
        var = np.empty_like(v)
        W = self.window
        j = 0
        while j < m:
            if self.count == 0:
                self.shift = v[0].copy()
            r0 = self.count
            # rows up to and including the next one with r % W == W - 1
            take = min(m - j, W - r0 % W)
            seg = v[j:j + take]
            rows = np.arange(r0, r0 + take)
            leave = self.ring[rows % W]  # slots about to be overwritten
            gone = (rows >= W)[:, None]
            shift = self.shift
            new = seg - shift
            old = np.where(gone, leave - shift, 0.0)
            s1 = np.cumsum(np.vstack((self.s1, new - old)), axis=0)[1:]
            s2 = np.cumsum(np.vstack((self.s2, new * new - old * old)), axis=0)[1:]
            self.ring[rows % W] = seg
            self.count += take
            if self.count % W == 0:
                self.shift = self.ring.mean(axis=0)
                dev = self.ring - self.shift
                s1[-1] = dev.sum(axis=0)
                s2[-1] = (dev * dev).sum(axis=0)
            count = np.minimum(rows + 1, W)[:, None].astype(np.float64)
            mean[j:j + take] = shift + s1 / count
            if self.count % W == 0:
                mean[j + take - 1] = self.shift + s1[-1] / W
            self.s1, self.s2 = s1[-1].copy(), s2[-1].copy()
            with np.errstate(invalid="ignore", divide="ignore"):
                v_ = (s2 - s1 * s1 / count) / (count - 1)
            var[j:j + take] = np.where(count >= 2, np.maximum(v_, 0.0), np.nan)
            j += take
        return mean, var


def _check_keys(table: dict, known: tuple, what: str) -> None:
    fields.check_keys(table, known, what)


def _number(table: dict, key: str, default=fields.MISSING) -> float:
    """``table[key]`` as a finite float (booleans refused)."""
    value = table.get(key, default)
    if value is fields.MISSING:
        raise SettingError(key, None, "is required (a number)")
    return fields.real(value, key)


def _section_coefficients(fs: float, tau: float) -> tuple[np.ndarray, np.ndarray]:
    """Triangle-hold equivalent of ``1 / (1 + s tau)`` at rate ``fs``.

    ``H(z) = (b0 + b1 z^-1) / (1 - a z^-1)`` with ``a = exp(-x)``,
    ``x = 1 / (fs tau)``, ``b0 = 1 - (1 - a) / x``, ``b1 = (1 - a) - b0``
    (unity DC gain).  ``b0`` by its series for small ``x``, where the closed
    form cancels.
    """
    x = 1.0 / (fs * tau)
    one_minus_a = -math.expm1(-x)
    if x < 0.1:
        term = b0 = x / 2.0
        for k in range(3, 12):  # x/2! - x^2/3! + x^3/4! - ...
            term *= -x / k
            b0 += term
    else:
        b0 = (x + math.expm1(-x)) / x
    return np.array([b0, one_minus_a - b0]), np.array([1.0, -math.exp(-x)])


def _wrap_deg(deg: np.ndarray) -> np.ndarray:
    """Wrap to (-180, 180]."""
    return np.where(deg <= -180.0, deg + 360.0, deg)


def _snr_db(amplitude: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """``20 log10(amplitude / noise)``; inf, -inf or NaN instead of raising."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return 20.0 * np.log10(amplitude / noise)
