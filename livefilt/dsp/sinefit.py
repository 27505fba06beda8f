"""Sine fits and the digitizer figures computed from them.

API map
-------
- :func:`fit3`: three-parameter fit at a known frequency (IEEE Std 1057).
- :func:`fit4`: four-parameter fit, the frequency fitted too (IEEE Std 1057).
- :func:`tone_figures`: SINAD, THD (harmonics 2..10), SFDR and ENOB of a tone
  (:class:`ToneFigures`), per IEEE Std 1241.
- :func:`enob`, :func:`ideal_sinad_db`.

Methods
-------
IEEE Std 1057 (digitizing waveform recorders), sine-fit algorithms: the
three-parameter fit is linear least squares on ``cos``, ``sin`` and a constant
at the known frequency; the four-parameter fit starts from the largest DFT bin
(refined by a parabola through its neighbours), does a three-parameter fit
there, and then iterates the linearised model with a fourth column
``t (-A sin + B cos)`` for the frequency step (Gauss-Newton) until the step is
below ``1e-12`` of the frequency.  (Clause numbers from memory: 4.1.3.1 and
4.1.3.3 of the 1994 edition.)  See also Handel, IEEE Trans. Instrum. Meas.
49(6):1189-1193, 2000.

IEEE Std 1241-2010 figures: SINAD = 20 log10(signal rms / rms of the fit
residual) (noise and distortion, DC excluded); THD from the harmonics
2..10, each a three-parameter fit of the residual at ``h f`` (aliased
harmonics fold by themselves: a sampled ``cos(2 pi h f t)`` is the folded
tone); SFDR = the fundamental over the largest other spectral component
(flat-top window on the residual, so no leakage of the fundamental);
ENOB = (SINAD - 1.76) / 6.02, which holds for a full-scale sine (an ideal
N-bit quantiser gives SINAD = 6.02 N + 1.76 dB, with quantisation noise
q^2 / 12).  For a tone below full scale the SINAD is also referred to full
scale (``enob_fs_bits``; common practice, adding 20 log10(FS / A)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from livefilt.errors import SettingError

__all__ = ["SineFit", "ToneFigures", "fit3", "fit4", "tone_figures", "enob", "ideal_sinad_db"]


@dataclass
class SineFit:
    """``x[n] ~ a cos(w t) + b sin(w t) + offset``, ``t = n / rate_hz``.

    Attributes
    ----------
    amplitude : float
        Peak amplitude ``hypot(a, b)``.
    phase_rad : float
        Phase of ``amplitude cos(w t + phase)``.
    offset : float
    frequency_hz : float
    residual_rms : float
        RMS of ``x`` minus the model.
    iterations : int
    """

    a: float
    b: float
    offset: float
    frequency_hz: float
    rate_hz: float
    residual_rms: float
    iterations: int = 0

    @property
    def amplitude(self) -> float:
        return float(math.hypot(self.a, self.b))

    @property
    def rms(self) -> float:
        return self.amplitude / math.sqrt(2)

    @property
    def phase_rad(self) -> float:
        return float(math.atan2(-self.b, self.a))

    def model(self, n: int) -> np.ndarray:
        """The fitted sine at samples 0..n-1."""
        wt = 2 * np.pi * self.frequency_hz / self.rate_hz * np.arange(n)
        return self.a * np.cos(wt) + self.b * np.sin(wt) + self.offset


@dataclass
class ToneFigures:
    """The IEEE Std 1241 figures of one tone record.

    ``thd_db`` and ``sfdr_db`` are in dB relative to the fundamental (THD
    negative, SFDR positive); ``harmonics`` lists ``(h, folded_hz, peak amplitude)``.
    """

    fit: SineFit
    sinad_db: float
    thd_db: float
    sfdr_db: float
    enob_bits: float
    enob_fs_bits: float
    noise_rms: float
    spur_hz: float
    full_scale: float = 1.0
    harmonics: list = field(default_factory=list)

    @property
    def amplitude_fs(self) -> float:
        """Peak amplitude as a fraction of full scale."""
        return self.fit.amplitude / self.full_scale


def _check(x) -> np.ndarray:
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 1 or x.size < 16:
        raise SettingError("samples", int(np.size(x)), "a sine fit needs at least 16 samples of one channel")
    return x


def fit3(x, rate_hz: float, frequency_hz: float) -> SineFit:
    """Three-parameter least-squares sine fit at a known frequency (IEEE Std 1057)."""
    x = _check(x)
    if not 0 < frequency_hz < rate_hz / 2:
        raise SettingError("frequency_hz", frequency_hz,
                           f"must be above 0 and below Nyquist, {rate_hz / 2:g} Hz")
    a, b, c, resid = _linear(x, 2 * np.pi * frequency_hz / rate_hz)
    return SineFit(a, b, c, float(frequency_hz), float(rate_hz), resid)


def fit4(x, rate_hz: float, frequency_hz: float | None = None, max_iterations: int = 50) -> SineFit:
    """Four-parameter least-squares sine fit (IEEE Std 1057).

    Starts at the largest DFT bin (Hann window; within ten bins or 2 % of
    ``frequency_hz`` when a guess is given), refined by a parabola through its
    neighbours: Gauss-Newton converges from within a bin or so.
    """
    x = _check(x)
    n = x.size
    frequency_hz = _dft_peak_hz(x, rate_hz, frequency_hz)
    w = 2 * np.pi * frequency_hz / rate_hz  # rad per sample
    # time from the middle of the record keeps the frequency column well conditioned
    k = np.arange(n) - (n - 1) / 2
    m3 = np.column_stack([np.cos(w * k), np.sin(w * k), np.ones(n)])
    a, b, c = np.linalg.lstsq(m3, x, rcond=None)[0]
    it = 0
    for it in range(1, max_iterations + 1):
        ph = w * k
        cs, sn = np.cos(ph), np.sin(ph)
        # a, b refer to samples counted from the middle in this loop
        m = np.column_stack([cs, sn, np.ones(n), k * (-a * sn + b * cs)])
        sol, *_ = np.linalg.lstsq(m, x, rcond=None)
        a, b, c, dw = sol
        w += dw
        if abs(dw) <= 1e-12 * abs(w):
            break
    if not 0 < w < np.pi:
        raise SettingError("frequency_hz", w * rate_hz / (2 * np.pi),
                           "the fit left 0 Hz to Nyquist: the record holds no clear tone")
    a, b, c, resid = _linear(x, w)
    return SineFit(a, b, c, float(w * rate_hz / (2 * np.pi)), float(rate_hz), resid, it)


def enob(sinad_db: float) -> float:
    """ENOB = (SINAD - 1.76) / 6.02 (IEEE Std 1241; a full-scale sine)."""
    return (sinad_db - 1.76) / 6.02


def ideal_sinad_db(bits: int) -> float:
    """SINAD of an ideal ``bits``-bit quantiser with a full-scale sine:
    20 log10(2^N sqrt(3/2)) = 6.02 N + 1.76 dB (IEEE Std 1241; textbook result)."""
    return 20 * math.log10(2.0 ** bits * math.sqrt(1.5))


def tone_figures(x, rate_hz: float, frequency_hz: float | None = None,
                 full_scale: float = 1.0, harmonics=range(2, 11)) -> ToneFigures:
    """SINAD, THD, SFDR and ENOB of the tone in ``x`` (IEEE Std 1241 figures,
    IEEE Std 1057 four-parameter fit).

    Parameters
    ----------
    x : ndarray
    rate_hz : float
    frequency_hz : float, optional
        Starting guess of the tone's frequency.
    full_scale : float
        Peak amplitude of a full-scale sine in the units of ``x``.
    harmonics : iterable of int
        Harmonic numbers in THD (default 2 to 10).
    """
    x = _check(x)
    fit = fit4(x, rate_hz, frequency_hz)
    n = x.size
    resid = x - fit.model(n)
    noise = float(np.sqrt(np.mean(resid ** 2)))
    sig_rms = fit.rms
    sinad = 20 * math.log10(sig_rms / noise) if noise > 0 else math.inf
    # harmonics: three-parameter fits of the residual at h f (folded by sampling)
    found, power = [], 0.0
    f1 = fit.frequency_hz
    res_hz = rate_hz / n
    for h in harmonics:
        folded = _fold(h * f1, rate_hz)
        if folded < 2 * res_hz or folded > rate_hz / 2 - 2 * res_hz or abs(folded - f1) < 4 * res_hz:
            continue  # on DC, Nyquist or the fundamental: not separable
        a, b, _, _ = _linear(resid, 2 * np.pi * folded / rate_hz)
        amp = math.hypot(a, b)
        found.append((int(h), float(folded), float(amp)))
        power += amp * amp
    thd = 10 * math.log10(power / fit.amplitude ** 2) if power > 0 else -math.inf
    # SFDR: largest component of the residual, flat-top window (amplitude-true)
    win = signal.get_window("flattop", n, fftbins=True)
    spec = np.abs(np.fft.rfft((resid - resid.mean()) * win)) * (2.0 / win.sum())
    f = np.fft.rfftfreq(n, 1.0 / rate_hz)
    spec[f < 6 * res_hz] = 0.0  # DC and the flat-top's skirt around it
    k = int(np.argmax(spec))
    spur = float(spec[k])
    sfdr = 20 * math.log10(fit.amplitude / spur) if spur > 0 else math.inf
    bits = enob(sinad)
    bits_fs = enob(sinad + 20 * math.log10(full_scale / fit.amplitude)) if fit.amplitude > 0 else math.nan
    return ToneFigures(fit, float(sinad), float(thd), float(sfdr), float(bits), float(bits_fs),
                       noise, float(f[k]), float(full_scale), found)


# -- private -----------------------------------------------------------------
def _linear(x: np.ndarray, w: float):
    """Least squares on cos(w n), sin(w n), 1 (n from 0): (a, b, c, residual rms)."""
    n = x.size
    ph = w * np.arange(n)
    m = np.column_stack([np.cos(ph), np.sin(ph), np.ones(n)])
    sol, *_ = np.linalg.lstsq(m, x, rcond=None)
    resid = x - m @ sol
    return float(sol[0]), float(sol[1]), float(sol[2]), float(np.sqrt(np.mean(resid ** 2)))


def _dft_peak_hz(x: np.ndarray, rate_hz: float, near: float | None = None) -> float:
    n = x.size
    spec = np.abs(np.fft.rfft((x - x.mean()) * np.hanning(n)))
    spec[0] = 0.0
    spec[-1] = 0.0
    if near is not None:
        k0 = near * n / rate_hz
        span = max(10.0, 0.02 * k0)
        bins = np.arange(spec.size)
        spec[np.abs(bins - k0) > span] = 0.0
    k = max(1, int(np.argmax(spec)))
    shift = 0.0
    if k < spec.size - 1:
        lo, mid, hi = np.log(np.maximum(spec[k - 1:k + 2], 1e-300))
        den = lo - 2 * mid + hi
        if den < 0:
            shift = 0.5 * (lo - hi) / den
    return (k + shift) * rate_hz / n


def _fold(f: float, rate_hz: float) -> float:
    """Where a tone at ``f`` lands after sampling, 0 to Nyquist."""
    r = f % rate_hz
    return rate_hz - r if r > rate_hz / 2 else r
