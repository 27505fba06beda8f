"""The noise estimate of a detector's output and its uncertainty.

API map
-------
- :func:`correlation` the autocorrelation coefficient of the output of ``n``
  equal RC sections driven by white noise (closed form).
- :func:`default_window_s` the noise window that gives ``DEFAULT_DOF``
  effective degrees of freedom (relative uncertainty 12.5 %).
- :class:`WindowTables` per row count ``m`` of a window: the factor that
  makes the sample variance unbiased, the effective degrees of freedom, the
  effective number of independent rows for a mean.
- :class:`WindowStats` running mean and sample variance over the last ``W``
  rows (moved here from the detector module).

Method (the decision, with its reason)
--------------------------------------
Output rows of a lock-in are strongly correlated: a row every 10 ms from a
low-pass of ENBW 0.08 Hz.  A sample variance over ``m`` rows then
estimates ``sigma^2 (m - A/m) / (m - 1)`` instead of ``sigma^2``, with
``A = sum_ij rho(|i - j|)`` (removing the window's mean removes the part of
the noise slower than the window), which read 7 to 25 % low at 0.1 to 1 s
time constants.  The correlation ``rho`` of the output is known exactly
from the sections (white input), so we divide the sum of squares by
``m - A/m`` instead of ``m - 1`` (for uncorrelated rows that *is* ``m - 1``):
``noise^2`` is then unbiased for every time constant and slope, without
assuming anything about the input beyond a flat density across the output
bandwidth.  We chose this over estimating from faster pre-filter products
(which assumes a flat density over a wider band, hum sidebands included)
and over a fixed long window (which fixes bias only asymptotically).

Scatter: ``noise^2`` is treated as ``sigma^2 chi^2_nu / nu`` with the
effective degrees of freedom ``nu = (m - A/m)^2 / B``, ``B = sum_ij
rho^2(|i - j|)`` (Gaussian fourth moments; for independent rows ``(m -
1)^2 / m``), so the relative standard uncertainty of ``noise`` is
``1 / sqrt(2 nu)``.  The square root of an unbiased variance sits about
``1 / (4 nu)`` low in the mean and ``1 / (3 nu)`` in the median, so the
default window is the one that gives ``nu = 32`` (uncertainty 12.5 %,
mean and median within 1.1 %), at least 2 s.  See Bendat and Piersol,
*Random Data*, 4th ed., 2010, sec. 8.2 (variance of correlated-sample
estimates; from memory).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["DEFAULT_DOF", "MIN_DOF", "correlation", "default_window_s", "WindowTables",
           "WindowStats"]

#: Effective degrees of freedom the default noise window gives (u = 12.5 %).
DEFAULT_DOF = 32.0
#: Below this many degrees of freedom (u above 50 %) noise reads NaN.
MIN_DOF = 2.0


def correlation(n_sections: int, x) -> np.ndarray:
    """Autocorrelation coefficient of ``n`` cascaded RC sections' output for
    white input, at lags ``x`` in time constants.

    Closed form of ``int h(t) h(t + u) dt / int h^2`` for the impulse
    response ``h(t) = t^(n-1) e^(-t/tau) / ((n-1)! tau^n)``:
    ``e^-x sum_j C(n-1, j) (n-1+j)! x^(n-1-j) 2^-(n+j) / ((2n-2)! 2^-(2n-1))``
    (binomial expansion of ``(t + u)^(n-1)``, Euler's gamma integral).
    ``n = 1`` gives ``e^-x``.
    """
    x = np.abs(np.asarray(x, dtype=np.float64))
    n = int(n_sections)
    norm = math.factorial(2 * n - 2) * 2.0 ** (-(2 * n - 1))
    poly = np.zeros_like(x)
    for j in range(n):
        poly += math.comb(n - 1, j) * math.factorial(n - 1 + j) * 2.0 ** (-(n + j)) \
            * x ** (n - 1 - j)
    return np.exp(-x) * poly / norm


def _integrals(n_sections: int) -> tuple[float, float]:
    """``(int rho, int rho^2)`` over all lags, in time constants (numeric,
    on a fine grid; ``int rho = 1 / (2 ENBW tau)`` checks it)."""
    x = np.linspace(0.0, 80.0, 160001)
    r = correlation(n_sections, x)
    dx = x[1] - x[0]
    a = 2 * dx * (r.sum() - 0.5 * r[0])
    b = 2 * dx * ((r * r).sum() - 0.5 * r[0] ** 2)
    return float(a), float(b)


_INTEGRALS: dict[int, tuple[float, float]] = {}


def default_window_s(n_sections: int, tau_s: float, dof: float = DEFAULT_DOF,
                     boxcar_s: float | None = None) -> float:
    """The noise window giving ``dof`` effective degrees of freedom, at least 2 s.

    Dense rows: ``nu = (T - a)^2 / (T b)`` with ``a = tau int rho``, ``b =
    tau int rho^2``; solved for ``T``.  36 tau for one section, 150 tau for
    four; a moving average over ``boxcar_s`` = A has ``a = A``, ``b = 2 A / 3``
    (triangle correlation): 23.5 A.
    """
    if boxcar_s is not None:
        a, b = boxcar_s, 2.0 * boxcar_s / 3.0
    else:
        if n_sections not in _INTEGRALS:
            _INTEGRALS[n_sections] = _integrals(n_sections)
        a, b = (v * tau_s for v in _INTEGRALS[n_sections])
    t = a + dof * b / 2 + math.sqrt(dof * b * a + (dof * b / 2) ** 2)
    return max(2.0, t)


class WindowTables:
    """Per-row-count corrections for a window of up to ``rows`` rows spaced
    ``dt_s`` apart, from an output low-pass of ``n_sections`` sections of
    time constant ``tau_s`` (or a moving average over ``boxcar_s``).

    Attributes (arrays indexed by the row count ``m``, 0 .. rows)
    ----------
    factor : ``(m - 1) / (m - A/m)``: multiplies a ddof-1 sample variance
        into an unbiased one (NaN for m < 2).
    dof : effective degrees of freedom ``(m - A/m)^2 / B``.
    n_mean : effective number of independent rows for a mean, ``m^2 / A``.
    """

    def __init__(self, rows: int, dt_s: float, n_sections: int, tau_s: float,
                 boxcar_s: float | None = None):
        lags = np.arange(rows, dtype=np.float64)
        if boxcar_s is not None:  # a moving average of length T: triangle 1 - |u|/T
            rho = np.maximum(0.0, 1.0 - lags * dt_s / boxcar_s)
        else:
            rho = correlation(n_sections, lags * dt_s / tau_s)
        m = np.arange(rows + 1, dtype=np.float64)
        a = self._pair_sums(rho, m)
        b = self._pair_sums(rho * rho, m)
        with np.errstate(invalid="ignore", divide="ignore"):
            denom = m - a / m
            self.factor = np.where(m >= 2, (m - 1) / denom, np.nan)
            self.dof = np.where(m >= 2, denom * denom / b, 0.0)
            self.n_mean = np.where(m >= 1, m * m / a, 0.0)

    @staticmethod
    def _pair_sums(r: np.ndarray, m: np.ndarray) -> np.ndarray:
        """``sum_{i,j < m} r(|i - j|) = m r0 + 2 sum_{k=1}^{m-1} (m - k) r_k``."""
        k = np.arange(r.shape[0], dtype=np.float64)
        s0 = np.concatenate(([0.0, 0.0], np.cumsum(r[1:])))[:m.shape[0]]
        s1 = np.concatenate(([0.0, 0.0], np.cumsum(k[1:] * r[1:])))[:m.shape[0]]
        return m * r[0] + 2.0 * (m * s0 - s1)

    def relative_uncertainty(self, m: np.ndarray) -> np.ndarray:
        """Relative standard uncertainty of ``noise`` from ``m`` rows: ``1/sqrt(2 nu)``."""
        with np.errstate(divide="ignore"):
            return 1.0 / np.sqrt(2.0 * self.dof[m])


class WindowStats:
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
        """Add rows ``v`` (m, ch); return (mean, var, count) after each row:
        (m, ch), (m, ch) and (m,) rows in the window."""
        m = v.shape[0]
        mean = np.empty_like(v)
        var = np.empty_like(v)
        counts = np.empty(m, dtype=np.int64)
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
            cnt = np.minimum(rows + 1, W)
            counts[j:j + take] = cnt
            count = cnt[:, None].astype(np.float64)
            mean[j:j + take] = shift + s1 / count
            if self.count % W == 0:
                mean[j + take - 1] = self.shift + s1[-1] / W
            self.s1, self.s2 = s1[-1].copy(), s2[-1].copy()
            with np.errstate(invalid="ignore", divide="ignore"):
                v_ = (s2 - s1 * s1 / count) / (count - 1)
            var[j:j + take] = np.where(count >= 2, np.maximum(v_, 0.0), np.nan)
            j += take
        return mean, var, counts
