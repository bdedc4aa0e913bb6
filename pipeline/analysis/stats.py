"""Circular statistics, multiple-testing control and permutation nulls.

Everything here is a pure NumPy function of arrays. Angles are radians, counter-clockwise
positive (see DEVELOPERS.md). The permutation index generators are seeded and return integer
index arrays, so a null can be replayed exactly and applied to any array by fancy indexing.
"""

from __future__ import annotations

import numpy as np
from scipy import stats as _sps

from pipeline.errors import ConfigError, InputError

__all__ = [
    "circular_mean",
    "resultant_length",
    "rayleigh_test",
    "bh_qvalues",
    "bh_reject",
    "permutation_pvalue",
    "binomial_interval",
    "circular_shift_indices",
    "trial_shuffle_indices",
    "split_aligned_swap_times",
    "swap_donor_times",
    "swap_orders",
]


def _resultant(angles_rad, weights, axis):
    angles_rad = np.asarray(angles_rad, dtype=np.float64)
    if weights is None:
        weights = np.ones_like(angles_rad)
    else:
        weights = np.broadcast_to(np.asarray(weights, dtype=np.float64), angles_rad.shape)
        if np.any(weights < 0):
            raise InputError(f"weights: expected non-negative values, got minimum "
                             f"{float(np.min(weights))}")
    c = np.sum(weights * np.cos(angles_rad), axis=axis)
    s = np.sum(weights * np.sin(angles_rad), axis=axis)
    w = np.sum(weights, axis=axis)
    return c, s, w


def circular_mean(angles_rad, *, weights=None, axis=None):
    """Direction of the (weighted) mean resultant vector, in (-pi, pi].

    Parameters
    ----------
    angles_rad : array_like
        Angles in radians.
    weights : array_like, optional
        Non-negative weights broadcastable to ``angles_rad`` (for example activity or bin
        counts). Default: all ones.
    axis : int, optional
        Axis to reduce; default all.

    Returns
    -------
    ndarray or float
        ``atan2(sum w sin a, sum w cos a)``.

    References
    ----------
    Zar JH (2010). Biostatistical Analysis, 5th ed., Pearson; chapter 26, "Circular
    distributions: descriptive statistics".
    """
    c, s, _ = _resultant(angles_rad, weights, axis)
    return np.arctan2(s, c)


def resultant_length(angles_rad, *, weights=None, axis=None):
    """Mean resultant length ``r = |sum w e^{ia}| / sum w`` in [0, 1].

    Zero weights everywhere give NaN. See :func:`circular_mean` for parameters.

    References
    ----------
    Zar JH (2010). Biostatistical Analysis, 5th ed., chapter 26.
    """
    c, s, w = _resultant(angles_rad, weights, axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.hypot(c, s) / w


def rayleigh_test(angles_rad, *, weights=None, axis=None):
    """Rayleigh test of circular uniformity against a unimodal alternative.

    Parameters
    ----------
    angles_rad : array_like
        Angles in radians.
    weights : array_like, optional
        Integer counts (grouped data: one angle per bin, weight = count). ``n`` is then the sum
        of the weights.
    axis : int, optional
        Axis to reduce; default all.

    Returns
    -------
    z : ndarray or float
        Rayleigh's ``z = R^2 / n`` with ``R = n r``.
    p : ndarray or float
        ``exp(sqrt(1 + 4n + 4(n^2 - R^2)) - (1 + 2n))``, the small-sample approximation that
        is accurate for n as small as 10, clipped to [0, 1].

    References
    ----------
    Zar JH (2010). Biostatistical Analysis, 5th ed., chapter 27, "Circular distributions:
    hypothesis testing", Rayleigh test (equation 27.4), after Greenwood & Durand (1955).
    """
    c, s, n = _resultant(angles_rad, weights, axis)
    big_r = np.hypot(c, s)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = big_r**2 / n
    p = np.exp(np.sqrt(1.0 + 4.0 * n + 4.0 * (n**2 - big_r**2)) - (1.0 + 2.0 * n))
    return z, np.clip(p, 0.0, 1.0)


def bh_qvalues(p_values, *, axis=-1):
    """Benjamini-Hochberg adjusted p-values (q-values), NaN-aware.

    ``q_(i) = min_{j >= i} m p_(j) / j`` over the sorted finite p-values of each slice along
    ``axis``; NaN entries stay NaN and do not count in ``m``.

    Parameters
    ----------
    p_values : array_like
        P-values in [0, 1].
    axis : int, default=-1
        Axis holding one family of tests.

    Returns
    -------
    ndarray
        Same shape as ``p_values``; reject at FDR level ``q`` where ``q_values <= q``.

    Raises
    ------
    InputError
        A p-value outside [0, 1].

    References
    ----------
    Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and
    powerful approach to multiple testing. J R Stat Soc B 57:289-300.
    doi:10.1111/j.2517-6161.1995.tb02031.x
    """
    p = np.asarray(p_values, dtype=np.float64)
    finite = p[np.isfinite(p)]
    if finite.size and (finite.min() < 0 or finite.max() > 1):
        raise InputError(f"p_values: expected values in [0, 1], got range "
                         f"[{finite.min()}, {finite.max()}]")
    moved = np.moveaxis(p, axis, -1)
    out = np.full(moved.shape, np.nan)
    flat_p = moved.reshape(-1, moved.shape[-1])
    flat_q = out.reshape(-1, moved.shape[-1])
    for row, qrow in zip(flat_p, flat_q, strict=True):
        ok = np.flatnonzero(np.isfinite(row))
        if ok.size == 0:
            continue
        order = ok[np.argsort(row[ok], kind="stable")]
        m = ok.size
        scaled = row[order] * m / np.arange(1, m + 1)
        qrow[order] = np.minimum(np.minimum.accumulate(scaled[::-1])[::-1], 1.0)
    return np.moveaxis(out, -1, axis)


def bh_reject(p_values, *, q=0.05, axis=-1):
    """Boolean rejections of the Benjamini-Hochberg step-up procedure at FDR level ``q``.

    References
    ----------
    Benjamini Y, Hochberg Y (1995). J R Stat Soc B 57:289-300.
    """
    if not 0 < q < 1:
        raise ConfigError(f"fdr_q = {q}: expected a level strictly between 0 and 1")
    qv = bh_qvalues(p_values, axis=axis)
    return np.isfinite(qv) & (qv <= q)


def permutation_pvalue(observed, null, *, alternative="greater"):
    """Permutation p-value with the +1 correction, ``(1 + #{null >= obs}) / (n + 1)``.

    Parameters
    ----------
    observed : array_like of shape (...)
        The statistic on the real data.
    null : array_like of shape (n_permutations, ...)
        The statistic on each permutation.
    alternative : {"greater", "less", "two-sided"}, default="greater"
        ``"two-sided"`` compares absolute values.

    Returns
    -------
    ndarray
        P-values in ``[1/(n+1), 1]``; never zero.

    References
    ----------
    Phipson B, Smyth GK (2010). Permutation p-values should never be zero: calculating exact
    p-values when permutations are randomly drawn. Stat Appl Genet Mol Biol 9:39.
    doi:10.2202/1544-6115.1585
    """
    obs = np.asarray(observed)
    nul = np.asarray(null)
    if nul.shape[1:] != obs.shape:
        raise InputError(f"null: expected shape (n_permutations, {', '.join(map(str, obs.shape))}"
                         f"), got {nul.shape}")
    if alternative == "greater":
        exceed = nul >= obs
    elif alternative == "less":
        exceed = nul <= obs
    elif alternative == "two-sided":
        exceed = np.abs(nul) >= np.abs(obs)
    else:
        raise ConfigError(f"alternative = {alternative!r}: expected 'greater', 'less' or "
                          f"'two-sided'")
    return (1.0 + exceed.sum(axis=0)) / (nul.shape[0] + 1.0)


def binomial_interval(k, n, *, confidence=0.95, method="wilson"):
    """Confidence interval of a binomial proportion ``k / n``.

    Parameters
    ----------
    k, n : array_like of int
        Successes and trials.
    confidence : float, default=0.95
    method : {"wilson", "clopper-pearson"}, default="wilson"

    Returns
    -------
    low, high : ndarray
        Interval bounds in [0, 1]; NaN where ``n == 0``.

    References
    ----------
    Wilson EB (1927). Probable inference, the law of succession, and statistical inference.
    J Am Stat Assoc 22:209-212. doi:10.1080/01621459.1927.10502953
    Clopper CJ, Pearson ES (1934). The use of confidence or fiducial limits illustrated in the
    case of the binomial. Biometrika 26:404-413. doi:10.1093/biomet/26.4.404
    """
    k = np.asarray(k, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    alpha = 1.0 - confidence
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "wilson":
            zq = _sps.norm.ppf(1.0 - alpha / 2.0)
            phat = k / n
            denom = 1.0 + zq**2 / n
            centre = (phat + zq**2 / (2 * n)) / denom
            half = zq * np.sqrt(phat * (1 - phat) / n + zq**2 / (4 * n**2)) / denom
            low, high = centre - half, centre + half
        elif method == "clopper-pearson":
            low = np.where(k > 0, _sps.beta.ppf(alpha / 2, k, n - k + 1), 0.0)
            high = np.where(k < n, _sps.beta.ppf(1 - alpha / 2, k + 1, n - k), 1.0)
        else:
            raise ConfigError(f"method = {method!r}: expected 'wilson' or 'clopper-pearson'")
    low = np.where(n > 0, np.clip(low, 0.0, 1.0), np.nan)
    high = np.where(n > 0, np.clip(high, 0.0, 1.0), np.nan)
    return low, high


def circular_shift_indices(n_samples, n_permutations, *, min_shift, seed=0):
    """Index arrays that rotate a series by a random offset of at least ``min_shift``.

    Row ``i`` is ``(arange(n) - offset_i) % n``: ``y[idx[i]]`` is ``y`` shifted forward by
    ``offset_i`` samples, with offsets drawn uniformly from ``[min_shift, n - min_shift]``.
    Circular shifts keep each series' autocorrelation but can overstate significance on
    slowly drifting signals (Harris 2020); prefer :func:`trial_shuffle_indices` when trials
    exist.

    Returns
    -------
    ndarray of int64, shape (n_permutations, n_samples)

    Raises
    ------
    ConfigError
        ``min_shift`` leaves no admissible offset.

    References
    ----------
    Harris KD (2020). Nonsense correlations in neuroscience. bioRxiv 2020.11.29.402719.
    doi:10.1101/2020.11.29.402719
    """
    n = int(n_samples)
    lo, hi = int(min_shift), n - int(min_shift)
    if lo < 1 or hi < lo:
        raise ConfigError(f"min_shift = {min_shift} samples: expected 1 <= min_shift <= "
                          f"n_samples / 2 = {n // 2}")
    gen = np.random.default_rng(seed)
    offsets = gen.integers(lo, hi + 1, size=int(n_permutations))
    return (np.arange(n)[None, :] - offsets[:, None]) % n


def trial_shuffle_indices(trial_ids, n_permutations, *, seed=0):
    """Index arrays that re-concatenate whole trials in a random order.

    ``y[idx[i]]`` keeps each trial's samples together and in order, but places the trials in a
    permuted order (never the identity when more than one trial exists). Trials of unequal
    length shift the boundaries; the series keeps its within-trial structure, so the null keeps
    each variable's autocorrelation without the wrap-around artefacts of circular shifts.

    Parameters
    ----------
    trial_ids : array_like of shape (n_samples,)
        Trial label of each sample; samples of a trial must be contiguous.
    n_permutations : int
    seed : int, default=0

    Returns
    -------
    ndarray of int64, shape (n_permutations, n_samples)

    Raises
    ------
    InputError
        Fewer than two trials, or a trial whose samples are not contiguous.

    References
    ----------
    Harris KD (2020). Nonsense correlations in neuroscience. bioRxiv 2020.11.29.402719.
    """
    ids = np.asarray(trial_ids)
    if ids.ndim != 1 or ids.size == 0:
        raise InputError(f"trial_ids: expected a non-empty 1-D array, got shape {ids.shape}")
    change = np.flatnonzero(ids[1:] != ids[:-1]) + 1
    starts = np.concatenate([[0], change])
    stops = np.concatenate([change, [ids.size]])
    if np.unique(ids[starts]).size != starts.size:
        seen: set = set()
        for s in starts:
            if ids[s] in seen:
                raise InputError(f"trial_ids: trial {ids[s].item()!r} is not contiguous (it starts "
                                 f"again at sample {s})")
            seen.add(ids[s])
    n_trials = starts.size
    if n_trials < 2:
        raise InputError(f"trial_ids: a trial shuffle needs at least 2 trials, got {n_trials}")
    gen = np.random.default_rng(seed)
    blocks = [np.arange(a, b) for a, b in zip(starts, stops, strict=True)]
    out = np.empty((int(n_permutations), ids.size), dtype=np.int64)
    ident = np.arange(n_trials)
    for i in range(int(n_permutations)):
        order = gen.permutation(n_trials)
        while np.array_equal(order, ident):
            order = gen.permutation(n_trials)
        out[i] = np.concatenate([blocks[j] for j in order])
    return out


def split_aligned_swap_times(t_s, trial, anchors, *, n_permutations, kinds=None, seed=0):
    """Source times of a trial swap aligned at each trial's split (a null for tuning tests).

    In permutation ``i`` the sample of trial ``A`` at time ``s_A + tau`` (``s_A`` its first
    split) takes the behaviour of trial ``pi_i(A)`` at ``s_pi(A) + tau``, clipped to that
    trial's span; ``pi_i`` permutes the trials within each kind (trials showing the same
    targets) and is never the identity. The swapped regressors keep their place relative to
    the split, their smoothness and their presence gates, so under the null they are
    exchangeable with the observed ones; a re-concatenation of whole trials of unequal length
    (:func:`trial_shuffle_indices`) instead moves every boundary and, for sparse
    autocorrelated activity, was measured anti-conservative (see DEVELOPERS.md).

    Parameters
    ----------
    t_s : ndarray of shape (n_samples,)
        Times of the samples tested.
    trial : ndarray of int, shape (n_samples,)
        Trial of each sample; every trial needs an entry in ``anchors``.
    anchors : dict of int to (split, start, end)
        Each trial's first split and its span (same clock as ``t_s``).
    n_permutations : int
    kinds : dict of int to int, optional
        Each trial's kind; trials are swapped only within a kind (kinds with a single trial
        keep it). All one kind when omitted.
    seed : int, default=0

    Returns
    -------
    ndarray of float64, shape (n_permutations, n_samples)
        The time of the behaviour each sample gets in each permutation.

    Raises
    ------
    InputError
        A trial without an anchor, or no two trials of one kind to swap.

    References
    ----------
    Harris KD (2020). Nonsense correlations in neuroscience. bioRxiv 2020.11.29.402719
    (nulls that keep each series' own structure).
    Winkler AM et al. (2015). Multi-level block permutation. NeuroImage 123:253-268
    (exchangeability blocks: permutations only within blocks). doi:10.1016/j.neuroimage.2015.05.092
    """
    donors, _ = swap_donor_times(t_s, trial, anchors)
    order = swap_orders(trial, n_permutations, kinds=kinds, seed=seed)
    return donors[order, np.arange(np.size(t_s))[None, :]]


def swap_donor_times(t_s, trial, anchors):
    """For every trial ``B`` and sample ``j``: the time of ``B`` aligned with sample ``j``.

    Returns
    -------
    donors : ndarray of shape (n_trials, n_samples)
        ``clip(split_B + (t_j - split_A(j)), start_B, end_B)``, trials in sorted id order.
    table : ndarray of shape (n_trials, 3)
        (split, start, end) of each trial.
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    ids = np.unique(np.asarray(trial))
    missing = [int(i) for i in ids if int(i) not in anchors]
    if missing:
        raise InputError(f"trial swap: trial {missing[0]} has no split to align on")
    table = np.array([anchors[int(i)] for i in ids], dtype=np.float64).reshape(-1, 3)
    rel = t_s - table[np.searchsorted(ids, trial), 0]
    donors = np.clip(table[:, :1] + rel[None, :], table[:, 1:2], table[:, 2:3])
    return donors, table


def swap_orders(trial, n_permutations, *, kinds=None, seed=0):
    """Donor trial of every sample in every permutation of the split-aligned swap.

    Returns
    -------
    ndarray of int32, shape (n_permutations, n_samples)
        Index (into the sorted trial ids) of the trial whose behaviour each sample gets.
    """
    trial = np.asarray(trial)
    ids = np.unique(trial)
    own = np.searchsorted(ids, trial)
    kind = np.array([0 if kinds is None else kinds.get(int(i), 0) for i in ids])
    groups = [g for g in (np.flatnonzero(kind == k) for k in np.unique(kind)) if g.size >= 2]
    if not groups:
        raise InputError(f"trial swap: no two trials of one kind to swap ({ids.size} trials)")
    gen = np.random.default_rng(seed)
    ident = np.arange(ids.size)
    out = np.empty((int(n_permutations), trial.size), dtype=np.int32)
    for i in range(int(n_permutations)):
        order = ident.copy()
        while np.array_equal(order, ident):
            for g in groups:
                order[g] = g[gen.permutation(g.size)]
        out[i] = order[own]
    return out
