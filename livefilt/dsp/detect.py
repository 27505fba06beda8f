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
:class:`~livefilt.dsp.noise.WindowStats` over (I, Q) rows; ``tracker`` a :class:`_RefTracker`
or None.  ``RmsDetector``: the same with ``zi`` (n, 1, 1) on ``x**2`` and
``stats`` over the amplitude rows.
"""

from __future__ import annotations

import functools
import logging
import math
import threading
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import scipy  # its submodules load on first use (the straightforward path, settling times)

from livefilt.dsp import kernels
from livefilt.dsp.memo import remembered
from livefilt.dsp.segments import RowLowpass
from livefilt import fields
from livefilt.dsp.track import Tracker
from livefilt.dsp.noise import MIN_DOF, WindowStats, WindowTables, default_window_s
from livefilt.errors import SettingError

__all__ = [
    "READING_DTYPE",
    "BIAS_SNR_DB",
    "LOCK_REASONS",
    "ReferenceSpec",
    "DetectorSpec",
    "LockIn",
    "RmsDetector",
    "make_detector",
    "BoxcarLockIn",
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
    # added with the honest read-outs (see livefilt.dsp.noise and the docstring)
    ("noise_u", np.float64),           # relative standard uncertainty of noise (fraction)
    ("snr_u_db", np.float64),          # standard uncertainty of snr_db, dB
    ("vector_amplitude", np.float64),  # |window mean of (I, Q)|, RMS
    ("amplitude_corrected", np.float64),  # sqrt(max(amplitude^2 - 2 noise^2, 0))
    ("biased", np.bool_),              # SNR below BIAS_SNR_DB (or unknown): magnitude biased high
    ("offset_hz", np.float64),         # signal frequency minus ref_hz, from the phase slope
    ("offset_u_hz", np.float64),       # its standard uncertainty
    ("lock_reason", np.int8),          # 0 locked, else a key of LOCK_REASONS
])

#: SNR below which a magnitude reading is marked biased (Rice bias above ~ 1 %).
BIAS_SNR_DB = 10.0

#: Why ``locked`` is false, by ``lock_reason`` code.
LOCK_REASONS = {
    0: "",
    1: "phase drifts faster than the output low-pass follows (reference off)",
    2: "measured reference not locked",
    3: "tracking: acquiring",
    4: "tracking: lost",
}

_SLOPES = (6, 12, 18, 24)
_WAVEFORMS = ("square", "sine")
_SQRT2 = math.sqrt(2.0)
_NO_ROWS = np.empty(0, READING_DTYPE)
_NO_ROWS.flags.writeable = False  # shared by every block with no row due

# One mixer-product array (2, n) per thread, shared by every lock-in that runs
# there: a block's product is used up inside LockIn.process, so 16 chains on
# two threads cycle two arrays through the processor's cache instead of 16
# (1 MB each for a 65536-frame step).  Measured here, 8 inputs x 192 kHz, 16
# chains, five runs alternating: two threads 49-57 x real time against 46-53,
# speed-up over one thread 1.29-1.47 against 1.29-1.42; one thread unchanged.
_MIXED = threading.local()


def _mixed_scratch(n: int) -> np.ndarray:
    """This thread's mixer-product array of shape (2, n), C-contiguous."""
    buf = getattr(_MIXED, "buf", None)
    if buf is None or buf.shape[1] != n:
        buf = _MIXED.buf = np.empty((2, n))
    return buf


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
        Relative lock range around ``frequency_hz`` (0 < r < 1); the capture
        range of a tracking reference.
    track : bool
        Follow the signal itself (:mod:`livefilt.dsp.track`): a phase-locked
        loop on the chain's filtered input, ``frequency_hz`` the starting guess.
    track_bandwidth_hz : float
        The tracking loop's noise bandwidth, Hz.
    """

    frequency_hz: float | None = None
    phase_deg: float = 0.0
    channel: int | None = None
    waveform: str = "square"
    lock_range: float = 0.2
    track: bool = False
    track_bandwidth_hz: float = 5.0

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
        _check_keys(table, ("frequency_hz", "phase_deg", "channel", "waveform", "lock_range",
                            "track", "track_bandwidth_hz"), "a [reference] table")
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
        track = table.get("track", False)
        if not isinstance(track, bool):
            raise SettingError("track", track, "must be true or false")
        if track and freq is None:
            raise SettingError("frequency_hz", None,
                               "tracking (track = true) needs frequency_hz as the starting guess")
        if track and channel is not None:
            raise SettingError("track", track,
                               "must be false with a measured reference (channel); choose one")
        bw = _number(table, "track_bandwidth_hz", 5.0)
        if track and not 0 < bw <= 0.02 * freq:
            raise SettingError("track_bandwidth_hz", table.get("track_bandwidth_hz"),
                               "must be above 0 and at most 2 % of frequency_hz, "
                               f"{0.02 * freq:g} Hz")
        return cls(freq, phase, channel, waveform, lock_range, track, bw)

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
        if self.track:
            out["track"] = True
            out["track_bandwidth_hz"] = self.track_bandwidth_hz
        return out


@dataclass(frozen=True)
class DetectorSpec:
    """A chain's detector.

    Attributes
    ----------
    type : {"lockin", "rms", "boxcar"}
    time_constant_s : float
        Time constant of each output low-pass section, s; for "boxcar" the
        lag budget ``settling_s`` (the average spans the whole reference
        periods that fit in it).
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

        ``noise_window_s`` defaults to the window that gives the noise
        estimate 32 effective degrees of freedom (12.5 % uncertainty; 36 time
        constants for one section, 150 for four; at least 2 s), see
        :func:`livefilt.dsp.noise.default_window_s`.

        Raises
        ------
        SettingError
            For an unknown key, a missing time constant or a value out of range.
        """
        kind = table.get("type", "lockin")
        if kind == "boxcar":
            _check_keys(table, ("type", "settling_s", "noise_window_s"), "a boxcar detector")
            if "settling_s" not in table:
                raise SettingError("settling_s", None,
                                   "is required for a boxcar detector (the lag budget, s)")
            lag = _number(table, "settling_s")
            if not lag >= 2.0 / fs:
                raise SettingError("settling_s", table["settling_s"],
                                   f"must be at least 2 sample periods, {2.0 / fs:g} s at {fs:g} Hz")
            window = _number(table, "noise_window_s", default_window_s(1, lag, boxcar_s=lag))
            if not window > 0:
                raise SettingError("noise_window_s", table["noise_window_s"], "must be above 0 s")
            return cls(kind, lag, 24, window)
        _check_keys(table, ("type", "time_constant_s", "slope_db_oct", "noise_window_s"),
                    "a detector")
        fields.choice(kind, "type", ("lockin", "rms", "boxcar"))
        if "time_constant_s" not in table:
            raise SettingError("time_constant_s", None, "is required (seconds, > 0)")
        tau = _number(table, "time_constant_s")
        if not tau >= 2.0 / fs:
            raise SettingError("time_constant_s", table["time_constant_s"],
                               f"must be at least 2 sample periods, {2.0 / fs:g} s at {fs:g} Hz")
        slope = table.get("slope_db_oct", 24)
        if isinstance(slope, bool) or not isinstance(slope, (int, float)) or slope not in _SLOPES:
            raise SettingError("slope_db_oct", slope, "must be 6, 12, 18 or 24 (dB/octave)")
        window = _number(table, "noise_window_s", default_window_s(int(slope) // 6, tau))
        if not window > 0:
            raise SettingError("noise_window_s", table["noise_window_s"], "must be above 0 s")
        return cls(kind, tau, int(slope), window)

    def to_mapping(self) -> dict:
        """The table that :meth:`from_mapping` turns back into this spec."""
        if self.type == "boxcar":
            return {"type": "boxcar", "settling_s": self.time_constant_s,
                    "noise_window_s": self.noise_window_s}
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
    if spec.type == "boxcar":
        if reference.frequency_hz is None:
            raise SettingError("reference", None, "a boxcar detector needs frequency_hz in "
                               "[reference] (its average spans whole periods)")
        return BoxcarLockIn(spec, reference, fs, int(output_every), exact_path)
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
        #: the compiled path's output low-pass, read at the rows only (lock-in
        #: on an internal reference; the others run it sample by sample)
        self._lp = None
        self._rows_buf = np.empty((self._channels, 0))
        #: rows in the noise window
        self.window_rows = max(2, int(round(spec.noise_window_s * self.fs / output_every)))
        self._tables = None
        self._work: dict = {}
        self.reset()

    @property
    def enbw_hz(self) -> float:
        """One-sided equivalent noise bandwidth of the output low-pass, Hz.

        ``Gamma(n - 1/2) / (4 sqrt(pi) Gamma(n) tau)`` (REFERENCES row 3a;
        closed form by integrating ``|H|^2`` of n RC sections).
        """
        n = self.n_sections
        return math.gamma(n - 0.5) / (4.0 * math.sqrt(math.pi) * math.gamma(n) * self.tau)

    def settling_s(self, fraction: float) -> float:
        """Time for a step to reach ``fraction`` of its final value, s.

        ``tau * P^-1(n, fraction)``, P the regularised lower incomplete gamma
        function (DLMF 8.2; REFERENCES row 3c); the inverse is kept per
        (n, fraction) (:func:`livefilt.dsp.memo.remembered`), so a start-up
        need not import scipy.special.
        """
        if not 0 < fraction < 1:
            raise SettingError("fraction", fraction, "must be above 0 and below 1")
        n = self.n_sections
        p_inv = remembered("gammaincinv", repr((n, float(fraction).hex())),
                           lambda: np.array([scipy.special.gammaincinv(n, fraction)]))
        return float(self.tau * p_inv[0])

    def reset(self) -> None:
        """Forget all state (filters start from zero, the noise window empties)."""
        self.zi = np.zeros((self.n_sections, self._channels, 1))
        if self._lp is not None:
            self._lp.reset()
        self._stats = None
        self._quiet_until: int | None = None

    def _settling(self, first_index: int, m: int) -> int:
        """How many of the ``m`` rows from sample ``first_index`` (one every
        ``output_every`` samples) fall while the output low-pass is still
        settling after a start (99.9 %, REFERENCES row 3c).

        Their noise and SNR read NaN and they stay out of the noise window:
        the output's rise from zero is the detector's own transient, not noise.
        Counted from the first row's sample index, so any block split agrees.
        """
        if not m:
            return 0
        if self._quiet_until is None:
            self._quiet_until = int(first_index) + int(np.ceil(self.settling_s(0.999) * self.fs))
        d = self._quiet_until - int(first_index)
        return 0 if d <= 0 else min(m, -(-d // self.output_every))  # rows before it

    def note_gap(self, frames: int) -> None:
        """Samples were lost before the next block; the filter state is kept."""
        if self._lp is not None:
            self._lp.hold()

    # The window's ring and tables are built at the first settled row: a
    # detector built only for its figures (ENBW, settling) at one row per
    # sample and a 150 s window would otherwise hold hundreds of MB.
    @property
    def stats(self) -> WindowStats:
        """The noise window's running sums (built at first use)."""
        if self._stats is None:
            self._stats = WindowStats(self.window_rows, self._stat_channels)
        return self._stats

    @property
    def tables(self) -> WindowTables:
        """Bias factors and degrees of freedom per row count (built at first use)."""
        if self._tables is None:
            self._tables = self._make_tables()
        return self._tables

    def _make_tables(self) -> WindowTables:
        return WindowTables(self.window_rows, self.output_every / self.fs, self.n_sections,
                            self.tau)

    def _unbiased_noise(self, var_ddof1: np.ndarray, count: np.ndarray) -> np.ndarray:
        """Noise from a ddof-1 window variance of ``count`` rows: corrected
        for the rows' correlation (:class:`~livefilt.dsp.noise.WindowTables`),
        NaN below :data:`~livefilt.dsp.noise.MIN_DOF` degrees of freedom."""
        ok = self.tables.dof[count] >= MIN_DOF
        with np.errstate(invalid="ignore"):
            v = np.maximum(var_ddof1 * self.tables.factor[count], 0.0)
        return np.where(ok, np.sqrt(v), np.nan)

    def _fill_common(self, rows: np.ndarray) -> None:
        """SNR and its uncertainty, the bias-corrected magnitude, the flag
        (``vector_amplitude`` and ``noise`` already filled).

        ``snr_u_db = 20 / ln 10 * sqrt(noise_u^2 + (noise / amplitude)^2)``:
        the noise estimate's own scatter and the amplitude's (first order).
        ``amplitude_corrected = sqrt(max(amplitude^2 - 2 noise^2, 0))``: for a
        Rice-distributed magnitude ``E[R^2] = A^2 + 2 sigma^2`` (Rice 1944), so
        its square is unbiased.
        """
        amp, noise = rows["amplitude"], rows["noise"]
        snr = _snr_db(amp, noise)
        rows["snr_db"] = snr
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = noise / amp
            rows["snr_u_db"] = 20.0 / math.log(10.0) * np.sqrt(rows["noise_u"] ** 2 + rel * rel)
            rows["amplitude_corrected"] = np.sqrt(np.maximum(amp * amp - 2.0 * noise * noise, 0.0))
            # flagged on the window's SNR (vector average against the noise),
            # steadier than a row's own; NaN (unknown) counts as biased
            rows["biased"] = ~(_snr_db(rows["vector_amplitude"], noise) >= BIAS_SNR_DB)

    def _lowpass(self, work: np.ndarray) -> np.ndarray:
        """Run the n sections over ``work`` (channels, n) in place of state ``zi``."""
        for i in range(self.n_sections):
            work, self.zi[i] = scipy.signal.lfilter(self.b, self.a, work, axis=1, zi=self.zi[i])
        return work

    def _row_slice(self, start_index: int, n: int) -> slice:
        return slice((-start_index) % self.output_every, n, self.output_every)

    def _row_buffer(self, n: int) -> np.ndarray:
        """Room for the rows of an ``n``-sample block, (channels, rows); grows only."""
        need = n // self.output_every + 1
        if self._rows_buf.shape[1] < need:
            self._rows_buf = np.empty((self._channels, max(need, 2 * self._rows_buf.shape[1])))
        return self._rows_buf

    def _scratch(self) -> np.ndarray:
        """The compiled kernels' work array, (channels, one tile)."""
        buf = self._work.get("scratch")
        if buf is None:
            buf = self._work["scratch"] = np.empty((self._channels, kernels.TILE))
        return buf

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
    # I, Q, (I + Q)/sqrt 2 (for the I-Q covariance), row time t, unwrapped
    # phase, (t + phase)/sqrt 2 (for the slope of the phase), its row-to-row increment
    _stat_channels = 7

    def __init__(self, spec: DetectorSpec, reference: ReferenceSpec, fs: float,
                 output_every: int, exact_path: bool = False):
        self.reference = reference
        self.phase_rad = math.radians(reference.phase_deg)
        if not reference.measured:
            # f / fs as an exact fraction p / q of the float values given
            ratio = Fraction(reference.frequency_hz) / Fraction(fs)
            self._p, self._q = ratio.numerator, ratio.denominator
            self._cycles_per_sample = float(ratio)
            self._rotation = kernels.rotation_table(self._cycles_per_sample)
            self._anchor1 = np.empty(1)
        super().__init__(spec, fs, output_every, exact_path)
        if self._kern is not None and not reference.measured and not reference.track:
            # built here, not at the first block: its weights take a moment
            self._lp = RowLowpass(*self._coef, self.n_sections, 2, output_every)
            _warm_readout(self._kern)

    def reset(self) -> None:
        super().reset()
        self._last_z, self._phi = 0j, 0.0
        r = self.reference
        if r.measured:
            self.tracker = _RefTracker(r, self.fs)
        elif r.track:
            self.tracker = Tracker(r.frequency_hz, r.lock_range, r.track_bandwidth_hz, self.fs,
                                   self.exact_path)
        else:
            self.tracker = None

    def note_gap(self, frames: int) -> None:
        """Samples were lost: the measured-reference tracker re-acquires, a
        tracking loop's oscillator advances over the gap; the output
        low-pass keeps its state."""
        super().note_gap(frames)
        if isinstance(self.tracker, Tracker):
            self.tracker.note_gap(frames)
        elif self.tracker is not None:
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
        why = None
        if isinstance(self.tracker, Tracker):
            cycles, ref_hz, locked, why = self.tracker.process(x, start_index)
        elif self.tracker is not None:
            if ref is None:
                raise ValueError("a measured reference needs the reference block (ref)")
            cycles, ref_hz, locked = self.tracker.process(np.asarray(ref, np.float64), start_index)
            why = 2
        else:
            cycles = None
            ref_hz, locked = self.reference.frequency_hz, None
        if self._kern is None:
            return self._process_exact(x, start_index, cycles, ref_hz, locked, why)
        first = (-start_index) % self.output_every
        if cycles is None:
            offset = start_index % kernels.ANCHOR
            fracs = self._anchor_phases(start_index - offset, offset + n)
            mixed = _mixed_scratch(n)  # used up below: RowLowpass copies what it keeps
            self._kern.mix_internal(x, offset, fracs, self._cycles_per_sample, self.phase_rad,
                                    self._rotation, mixed)
            rows, m = self._lp.process(mixed, start_index)
        else:
            rows = self._row_buffer(n)
            b0, b1, a1 = self._coef
            m = self._kern.mix_cycles_rows(x, cycles, self.phase_rad, b0, b1, a1, self.zi,
                                           first, self.output_every, rows, self._scratch())
        if m == 0:
            return _NO_ROWS
        if self.tracker is None:  # an internal reference
            return self._readout_compiled(start_index + first, rows[0, :m], rows[1, :m])
        if locked is not None:
            at = slice(first, n, self.output_every)
            ref_hz, locked = ref_hz[at], locked[at]
            if isinstance(why, np.ndarray):
                why = why[at]
        return self._readout(start_index + first, rows[0, :m], rows[1, :m], ref_hz, locked, why)

    def _readout_compiled(self, first_index: int, i_rows, q_rows) -> np.ndarray:
        """:meth:`_readout` on an internal reference in one compiled pass
        (``kernels.lockin_readout``: the same operations in the same order,
        the noise window's state updated in place); no GIL held meanwhile."""
        m = i_rows.shape[0]
        rows = np.empty(m, READING_DTYPE)
        every = self.output_every
        k = self._settling(first_index, m)
        st, tb = self.stats, self.tables
        count = self._work.get("count")
        if count is None:
            count = self._work["count"] = np.zeros(1, np.int64)
        count[0] = st.count
        state = self._buffer("state", (3,))
        state[0], state[1], state[2] = self._last_z.real, self._last_z.imag, self._phi
        self._kern.lockin_readout(rows, int(first_index), int(every), i_rows, q_rows, int(k), state,
                                  st.ring, st.shift, st.s1, st.s2, count, tb.factor, tb.dof,
                                  tb.n_mean, self.fs / every / (2.0 * math.pi),
                                  float(self.reference.frequency_hz), self.follow_hz, MIN_DOF,
                                  BIAS_SNR_DB)
        st.count = int(count[0])
        self._last_z, self._phi = complex(state[0], state[1]), float(state[2])
        return rows

    def _process_exact(self, x, start_index, cycles, ref_hz, locked, why=None) -> np.ndarray:
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
            if isinstance(why, np.ndarray):
                why = why[rows_at]
        return self._readout(start_index + rows_at.start, out[0, rows_at], out[1, rows_at],
                             ref_hz, locked, why)

    def _readout(self, first_index: int, i_rows, q_rows, ref_hz, locked, why=None) -> np.ndarray:
        """Rows from the low-passed I and Q at the due samples.

        ``locked``/``why``: the reference's own lock and reason codes per row
        (None: an internal reference, locked unless its phase drifts).
        """
        m = i_rows.shape[0]
        if m == 0:
            return _NO_ROWS
        rows = np.empty(m, READING_DTYPE)
        index = np.arange(first_index, first_index + m * self.output_every, self.output_every)
        rows["index"] = index
        rows["in_phase"] = i_rows
        rows["quadrature"] = q_rows
        amp = np.hypot(i_rows, q_rows)
        rows["amplitude"] = amp
        rows["phase_deg"] = _wrap_deg(np.degrees(np.arctan2(q_rows, i_rows)))
        # unwrapped phase, rad: the sum of the row-to-row phase increments
        z = i_rows + 1j * q_rows
        prev = np.empty_like(z)
        prev[0] = self._last_z
        prev[1:] = z[:-1]
        inc = np.angle(z * np.conj(prev))
        phi = self._phi + np.cumsum(inc)
        self._last_z, self._phi = complex(z[-1]), float(phi[-1])
        for name in ("noise", "noise_u", "vector_amplitude", "offset_hz", "offset_u_hz"):
            rows[name] = np.nan
        k = self._settling(first_index, m)
        if k < m:
            # Noise across the signal's direction: the variance of (I, Q) along
            # the unit vector perpendicular to the window's mean (I, Q).  Slow
            # amplitude changes (a target being moved) lie along the mean and
            # are not noise; isotropic noise has the same variance in every
            # direction.  (I + Q)/sqrt 2 gives the I-Q covariance, (t + phi)/sqrt 2
            # the time-phase covariance: var = (v1 + v2)/2 + cov.
            i_s, q_s = i_rows[k:], q_rows[k:]
            t = (index[k:] // self.output_every).astype(np.float64)
            p = phi[k:]
            mean, var, cnt = self.stats.update(np.stack(
                (i_s, q_s, (i_s + q_s) * _SQRT_HALF, t, p, (t + p) * _SQRT_HALF, inc[k:]), axis=1))
            mi, mq, vi, vq = mean[:, 0], mean[:, 1], var[:, 0], var[:, 1]
            cov = var[:, 2] - 0.5 * (vi + vq)
            m2 = mi * mi + mq * mq
            with np.errstate(invalid="ignore", divide="ignore"):
                if isinstance(self.tracker, Tracker):
                    # a tracking reference follows the quadrature noise within
                    # its loop bandwidth (across read 0.7 of e sqrt(ENBW) at
                    # 5 Hz): take the spread along the signal instead (target
                    # motion then counts as noise)
                    across = np.where(m2 > 0,
                                      (mi * mi * vi + 2 * mi * mq * cov + mq * mq * vq) / m2,
                                      0.5 * (vi + vq))
                else:
                    across = np.where(m2 > 0,
                                      (mq * mq * vi - 2 * mi * mq * cov + mi * mi * vq) / m2,
                                      0.5 * (vi + vq))
                noise = self._unbiased_noise(across, cnt)
                rows["noise"][k:] = noise
                rows["noise_u"][k:] = np.where(np.isnan(noise), np.nan,
                                               self.tables.relative_uncertainty(cnt))
                vec = np.sqrt(m2)
                rows["vector_amplitude"][k:] = vec
                # frequency offset: least-squares slope of the unwrapped phase
                # over the window's rows; its uncertainty from the regression
                # variance 12 s^2 / (N T^2), s^2 the residual variance of the
                # phase about the line, N the window's effective number of
                # independent rows (common practice for a line fit; the
                # effective count stands in for correlated rows)
                vt, vp = var[:, 3], var[:, 4]
                cov_tp = var[:, 5] - 0.5 * (vt + vp)
                slope = cov_tp / vt  # rad per row
                resid = np.maximum(vp - cov_tp * slope, 0.0)
                per_row = self.fs / self.output_every / (2.0 * math.pi)
                rows["offset_hz"][k:] = slope * per_row
                # ... or, when larger, that of a random-walking phase (noise
                # alone: the unwrapped phase wanders), 6/5 s_inc^2 / m per row^2
                # with s_inc^2 the variance of the row-to-row increments
                u_line = np.sqrt(resid * 12.0 / self.tables.n_mean[cnt]) / cnt
                u_walk = np.sqrt(1.2 * var[:, 6] / cnt)
                # fewer than 10 independent rows, or a phase scattered by more
                # than 0.5 rad RMS about the line (the signal under about 6 dB
                # SNR: noise's own phase wanders and wraps), judge nothing:
                # NaN, no drift call
                ok = (self.tables.n_mean[cnt] >= 10) & (resid < 0.25)
                rows["offset_u_hz"][k:] = np.where(ok, np.fmax(u_line, u_walk) * per_row, np.nan)
        self._fill_common(rows)
        rows["ref_hz"] = ref_hz
        lock = np.ones(m, dtype=bool) if locked is None else np.asarray(locked, dtype=bool).copy()
        reason = np.zeros(m, dtype=np.int8)
        if why is not None:
            reason[:] = np.where(lock, 0, why)
        drifting = np.abs(rows["offset_hz"]) - 2.0 * rows["offset_u_hz"] > self.follow_hz
        if isinstance(self.tracker, Tracker):
            # the loop's own indicator rules: a window still holding a
            # re-acquisition's phase transient would read as drift for a window
            drifting = np.zeros(m, dtype=bool)
        drift_now = lock & drifting
        reason[drift_now] = 1
        lock[drift_now] = False
        rows["locked"] = lock
        rows["lock_reason"] = reason
        return rows

    @property
    def ripple_2f0(self) -> float:
        """The 2 f0 ripple of the output relative to the signal: the sections'
        gain at 2 f0, ``(1 + (4 pi f0 tau)^2)^(-n/2)`` (the mixer's 2 f0 product
        is as large as the wanted one; analog form of the sections)."""
        f0 = self.reference.frequency_hz
        if f0 is None:
            return float("nan")
        return (1.0 + (4.0 * math.pi * f0 * self.tau) ** 2) ** (-self.n_sections / 2.0)

    def settled_s(self, band: float = 0.01) -> float:
        """Time after a step until the output stays within ``band`` of its final
        value, the 2 f0 ripple accounted: the step's tail must fall within
        ``band - ripple``, ``tau P^-1(n, 1 - (band - ripple))``; ``inf`` when the
        ripple alone fills the band (one 10 ms section at 1370 Hz ripples
        0.58 %: 54.7 ms to 1 %, not the 46 ms of the tail alone)."""
        r = self.ripple_2f0
        r = 0.0 if not math.isfinite(r) else r
        if r >= band:
            return math.inf
        return float(self.tau * scipy.special.gammaincinv(self.n_sections, 1.0 - (band - r)))

    @property
    def follow_hz(self) -> float:
        """The frequency offset at which the output low-pass's gain falls to
        0.99: ``(1 + (2 pi f tau)^2)^(-n/2) = 0.99``.  A reference further off
        than that (significantly, by two standard uncertainties) reads
        ``locked`` false: the amplitude reads low by more than 1 %."""
        x = math.sqrt(0.99 ** (-2.0 / self.n_sections) - 1.0)
        return x / (2.0 * math.pi * self.tau)

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


class BoxcarLockIn(LockIn):
    """Dual-phase lock-in whose output filter is a moving average over whole
    reference periods: the matched filter for a held target at the lag limit.

    ``N = round(M fs / f0)`` samples, ``M = floor(settling_s f0)`` periods
    (at least one): the average of the last N mixer products, read at each
    output row (a decimation of the moving average; the running sums are
    recomputed exactly every N samples, :class:`~livefilt.dsp.noise.WindowStats`).
    A whole number of periods nulls the 2 f0 product (to the half-sample
    rounding of N).  ENBW ``fs / (2 N) = 1 / (2 T)``; a step settles
    completely after ``T = N / fs``, linearly (``settling_s(p) = p T``).
    ENBW x settling is 0.5, against 0.785 at best for n RC sections
    (regularised gamma function, REFERENCES row 3c).
    Same outputs as :class:`LockIn`; straightforward numpy path only.
    """

    def __init__(self, spec: DetectorSpec, reference: ReferenceSpec, fs: float,
                 output_every: int, exact_path: bool = False):
        f0 = reference.frequency_hz
        self.periods = max(1, int(math.floor(spec.time_constant_s * f0 + 1e-9)))
        self.length = max(1, int(round(self.periods * fs / f0)))
        self.average_s = self.length / fs
        super().__init__(spec, reference, fs, output_every, True)

    def _make_tables(self) -> WindowTables:
        return WindowTables(self.window_rows, self.output_every / self.fs, 1, self.average_s,
                            boxcar_s=self.average_s)

    def baseband_response(self, offset_hz) -> np.ndarray:
        """Gain of the N-sample average at an offset from the reference
        (Dirichlet kernel, ``sin(pi f N / fs) / (N sin(pi f / fs))``)."""
        f = np.abs(np.atleast_1d(np.asarray(offset_hz, dtype=float)))
        x = np.pi * f / self.fs
        with np.errstate(invalid="ignore", divide="ignore"):
            g = np.sin(self.length * x) / (self.length * np.sin(x))
        return np.where(x == 0, 1.0, g)

    @property
    def enbw_hz(self) -> float:
        """``fs / (2 N)``: the one-sided ENBW of an N-sample average (closed form)."""
        return self.fs / (2.0 * self.length)

    def settling_s(self, fraction: float) -> float:
        """``fraction * T``: a step through a moving average rises linearly."""
        if not 0 < fraction < 1:
            raise SettingError("fraction", fraction, "must be above 0 and below 1")
        return fraction * self.average_s

    @property
    def follow_hz(self) -> float:
        """Offset at which the average's gain ``sin(pi f T) / (pi f T)`` is 0.99."""
        return 0.24509 / (math.pi * self.average_s)  # sin x / x = 0.99 at x = 0.24509

    def reset(self) -> None:
        super().reset()
        self._avg = WindowStats(self.length, 2)  # N samples x 2: 0.4 MB a second of lag at 48 kHz

    def _lowpass(self, work: np.ndarray) -> np.ndarray:
        """The moving average over N samples in place of the RC sections."""
        mean, _, _ = self._avg.update(work.T)
        return mean.T


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
        m = self._kern.square_rows(x, b0, b1, a1, self.zi, first, self.output_every, buf,
                                   self._scratch())
        if m == 0:
            return _NO_ROWS
        return self._readout(start_index + first, buf[0, :m])

    def _readout(self, first_index: int, power) -> np.ndarray:
        """Rows from the low-passed square at the due samples."""
        amp = np.sqrt(np.maximum(power, 0.0))
        m = amp.shape[0]
        rows = np.empty(m, READING_DTYPE)
        rows["index"] = np.arange(first_index, first_index + m * self.output_every,
                                  self.output_every)
        rows["in_phase"] = amp
        rows["quadrature"] = 0.0
        rows["amplitude"] = amp
        rows["phase_deg"] = np.nan
        for name in ("noise", "noise_u", "vector_amplitude"):
            rows[name] = np.nan
        k = self._settling(first_index, m)
        if k < m:
            mean, var, cnt = self.stats.update(amp[k:, None])
            noise = self._unbiased_noise(var[:, 0], cnt)
            rows["noise"][k:] = noise
            rows["noise_u"][k:] = np.where(np.isnan(noise), np.nan,
                                           self.tables.relative_uncertainty(cnt))
            rows["vector_amplitude"][k:] = mean[:, 0]  # the window's mean amplitude
        self._fill_common(rows)
        if k < m:  # the RMS detector compares the window's mean amplitude with the noise
            rows["snr_db"][k:] = _snr_db(rows["vector_amplitude"][k:], rows["noise"][k:])
        rows["amplitude_corrected"] = amp  # band power: no Rice bias to remove
        rows["biased"] = False
        rows["ref_hz"] = np.nan
        rows["offset_hz"] = np.nan
        rows["offset_u_hz"] = np.nan
        rows["locked"] = True
        rows["lock_reason"] = 0
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
        mean, self.mean_zi = scipy.signal.lfilter([1 - a], [1, -a], ref, zi=self.mean_zi)
        d = ref - mean
        dev, self.dev_zi = scipy.signal.lfilter([1 - a], [1, -a], np.abs(d), zi=self.dev_zi)
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


@functools.cache
def _warm_readout(kern) -> None:
    """Compile (or load) the read-out kernel once, with the argument types of
    the real calls, before any engine starts: compiled at its first block
    instead, it stalled a live source for seconds on a fresh install."""
    z = np.zeros(0)
    kern.lockin_readout(np.empty(0, READING_DTYPE), 0, 1, z, z, 0, np.zeros(3), np.zeros((2, 7)),
                        np.zeros(7), np.zeros(7), np.zeros(7), np.zeros(1, np.int64), z, z, z,
                        1.0, 1.0, 1.0, MIN_DOF, BIAS_SNR_DB)


def _wrap_deg(deg: np.ndarray) -> np.ndarray:
    """Wrap to (-180, 180]."""
    return np.where(deg <= -180.0, deg + 360.0, deg)


def _snr_db(amplitude: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """``20 log10(amplitude / noise)``; inf, -inf or NaN instead of raising."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return 20.0 * np.log10(amplitude / noise)
