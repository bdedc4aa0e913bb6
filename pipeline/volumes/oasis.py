"""Deconvolution of calcium traces into non-negative events by OASIS (AR(1) model).

Model: ``c[t] = gamma * c[t-1] + s[t]`` with ``c[-1] = 0`` and ``s >= 0``; the fit minimises

    1/2 * ||y - c||^2 + lam * sum(s)

(optionally with a minimum event size ``s_min``, the thresholded variant of the same paper).
Writing ``sum(s) = <mu, c>`` with ``mu = (1 - gamma, ..., 1 - gamma, 1)`` turns the penalty into a
shift of the data, ``y - lam * mu``, which the pool-adjacent-violators loop then fits exactly.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from pipeline.errors import ConfigError, InputError

__all__ = ["ar1_gamma", "noise_sigma", "deconvolve", "deconvolve_many"]


def ar1_gamma(decay_s, rate_hz):
    """AR(1) coefficient ``gamma = exp(-dt / decay_s)`` for a volume rate and indicator decay.

    Raises
    ------
    ConfigError
        If ``decay_s`` or ``rate_hz`` is not positive.
    """
    if decay_s <= 0 or rate_hz <= 0:
        raise ConfigError(
            f"traces.decay_s and the volume rate must be > 0, got decay_s={decay_s}, "
            f"rate_hz={rate_hz}"
        )
    return float(math.exp(-1.0 / (rate_hz * decay_s)))


def noise_sigma(y):
    """Robust noise standard deviation of each trace from its first differences.

    ``sigma = 1.4826 * MAD(diff(y)) / sqrt(2)``: white noise of variance sigma^2 gives
    differences of variance 2 sigma^2, and the median absolute deviation ignores the few
    large steps made by calcium transients (1.4826 makes MAD consistent for a Gaussian).

    Parameters
    ----------
    y : ndarray of shape (n_cells, n_t) or (n_t,)

    Returns
    -------
    ndarray of shape (n_cells,) or float

    References
    ----------
    Hampel FR (1974). The influence curve and its role in robust estimation. J Am Stat Assoc
    69:383-393. doi:10.1080/01621459.1974.10482962
    """
    y = np.asarray(y, dtype=np.float64)
    d = np.diff(y, axis=-1)
    mad = np.median(np.abs(d - np.median(d, axis=-1, keepdims=True)), axis=-1)
    return 1.4826 * mad / np.sqrt(2.0)


@numba.njit(cache=True, nogil=True)
def _oasis_ar1(y, gamma, lam, s_min, c, s):  # pragma: no cover - compiled
    """Fit one trace in place (``c`` and ``s`` are outputs)."""
    n = y.shape[0]
    v = np.empty(n)  # pool value at its first sample
    w = np.empty(n)  # pool weight sum(gamma^(2k))
    start = np.empty(n, dtype=np.int64)
    length = np.empty(n, dtype=np.int64)
    npool = 0
    clamped = False  # first pool held at 0 by c >= 0 (s[0] >= 0)
    for t in range(n):
        yt = y[t] - lam * (1.0 - gamma) if t < n - 1 else y[t] - lam
        v[npool] = yt
        w[npool] = 1.0
        start[npool] = t
        length[npool] = 1
        npool += 1
        # merge backwards while the newest pool violates s >= s_min
        while npool > 1:
            i = npool - 1
            gl = gamma ** length[i - 1]
            if v[i] >= gl * v[i - 1] + s_min:
                break
            if clamped and i - 1 == 0:
                v[0] = 0.0
            else:
                wi = w[i - 1] + gl * gl * w[i]
                v[i - 1] = (w[i - 1] * v[i - 1] + gl * w[i] * v[i]) / wi
                w[i - 1] = wi
            length[i - 1] += length[i]
            npool -= 1
        if npool == 1 and v[0] < 0.0:
            v[0] = 0.0
            clamped = True
    for p in range(npool):
        val = v[p]
        for k in range(length[p]):
            c[start[p] + k] = val
            val *= gamma
    s[0] = c[0]
    for t in range(1, n):
        s[t] = c[t] - gamma * c[t - 1]
        if s[t] < 0.0:  # rounding only
            s[t] = 0.0


def deconvolve(y, *, gamma, lam=0.0, s_min=0.0):
    """OASIS deconvolution of one trace with an AR(1) calcium model.

    Parameters
    ----------
    y : ndarray of shape (n_t,)
        Trace (dF/F or fluorescence with baseline removed).
    gamma : float
        AR(1) coefficient in (0, 1), see :func:`ar1_gamma`.
    lam : float, default=0.0
        Sparsity penalty on the summed events (units of ``y``).
    s_min : float, default=0.0
        Minimum event size; 0 gives the exact convex problem.

    Returns
    -------
    c : ndarray of shape (n_t,)
        Denoised calcium.
    s : ndarray of shape (n_t,)
        Events, ``s >= 0``.

    Raises
    ------
    ConfigError
        If ``gamma``, ``lam`` or ``s_min`` is out of range.
    InputError
        If ``y`` is not a finite 1-d array.

    References
    ----------
    Friedrich J, Zhou P, Paninski L (2017). Fast online deconvolution of calcium imaging data.
    PLoS Comput Biol 13:e1005423. doi:10.1371/journal.pcbi.1005423
    """
    _check(gamma, lam, s_min)
    y = np.asarray(y, dtype=np.float64)
    if y.ndim != 1 or not np.all(np.isfinite(y)):
        raise InputError(f"deconvolve: expected a finite 1-d trace, got shape {y.shape}")
    c = np.zeros_like(y)
    s = np.zeros_like(y)
    if y.size:
        _oasis_ar1(y, float(gamma), float(lam), float(s_min), c, s)
    return c, s


def _check(gamma, lam, s_min):
    if not 0.0 < gamma < 1.0:
        raise ConfigError(f"OASIS gamma: expected a value in (0, 1), got {gamma}")
    if lam < 0 or s_min < 0:
        raise ConfigError(f"OASIS lam and s_min must be >= 0, got lam={lam}, s_min={s_min}")


@numba.njit(cache=True, nogil=True)
def _many(y, gamma, lam, s_min, c, s):  # pragma: no cover - compiled
    for i in range(y.shape[0]):
        _oasis_ar1(y[i], gamma, lam[i], s_min[i], c[i], s[i])


def deconvolve_many(y, *, gamma, lam_sigma=0.0, s_min_sigma=3.0):
    """OASIS on every row of ``y`` with penalties scaled by each row's noise.

    The sparsity rule: ``sigma`` is estimated per cell by :func:`noise_sigma` (MAD of first
    differences), then ``lam = lam_sigma * sigma`` and ``s_min = s_min_sigma * sigma``. The
    default keeps only events at least 3 noise sigma high (a one-sample noise excursion of
    3 sigma has probability ~0.1 %).

    Parameters
    ----------
    y : ndarray of shape (n_cells, n_t)
    gamma : float
        AR(1) coefficient in (0, 1).
    lam_sigma : float, default=0.0
    s_min_sigma : float, default=3.0

    Returns
    -------
    c : ndarray of shape (n_cells, n_t), float32
    s : ndarray of shape (n_cells, n_t), float32
    sigma : ndarray of shape (n_cells,), float64

    Raises
    ------
    ConfigError
        If a parameter is out of range.
    InputError
        If ``y`` is not a finite 2-d array.

    References
    ----------
    Friedrich J, Zhou P, Paninski L (2017). Fast online deconvolution of calcium imaging data.
    PLoS Comput Biol 13:e1005423. doi:10.1371/journal.pcbi.1005423
    """
    _check(gamma, lam_sigma, s_min_sigma)
    y = np.ascontiguousarray(y, dtype=np.float64)
    if y.ndim != 2 or not np.all(np.isfinite(y)):
        raise InputError(
            f"deconvolve_many: expected a finite (n_cells, n_t) array, got shape {y.shape}"
        )
    sigma = noise_sigma(y) if y.shape[1] > 1 else np.zeros(y.shape[0])
    c = np.zeros_like(y)
    s = np.zeros_like(y)
    if y.size:
        _many(y, float(gamma), lam_sigma * sigma, s_min_sigma * sigma, c, s)
    return c.astype(np.float32), s.astype(np.float32), sigma
