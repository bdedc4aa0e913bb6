"""Cross-validation splitters for autocorrelated time series.

Why not random K-fold: neighbouring imaging volumes share indicator decay, slow drift and the
same behavioural episode, so a test sample drawn at random has near-copies of itself in the
training set and the score measures interpolation, not generalisation. Blocked (contiguous)
folds with a buffer removed on either side of each test block are the standard remedy for
structured dependence (Roberts et al. 2017). The buffer must cover the indicator decay (the
calcium transient of a test-block event still rings in the neighbouring samples) plus the lag
span of the decoder (a lagged target reaches across the block edge).

Both splitters follow scikit-learn's splitter protocol (``split(X, y, groups)`` yielding
``(train, test)`` index arrays, ``get_n_splits``), so they plug into ``cross_val_score``,
``GridSearchCV`` and friends.
"""

from __future__ import annotations

import math

import numpy as np
from sklearn.model_selection import BaseCrossValidator

from pipeline.errors import ConfigError, InputError

__all__ = ["BlockedKFold", "TrialKFold", "gap_samples"]


def gap_samples(*, rate_hz, decay_s, lag_span_s=0.0, extra_s=0.0):
    """Samples to drop either side of a test block: ``ceil((decay + lag span + extra) * rate)``.

    Parameters
    ----------
    rate_hz : float
        Sampling rate (volumes per second).
    decay_s : float
        Indicator decay time constant.
    lag_span_s : float, default=0.0
        ``lag_max_s - lag_min_s`` of the decoder.
    extra_s : float, default=0.0
        Additional margin.

    References
    ----------
    Roberts DR et al. (2017). Cross-validation strategies for data with temporal, spatial,
    hierarchical, or phylogenetic structure. Ecography 40:913-929. doi:10.1111/ecog.02881
    """
    total_s = float(decay_s) + abs(float(lag_span_s)) + float(extra_s)
    return int(math.ceil(total_s * float(rate_hz) - 1e-9))


def _check(n_splits, gap):
    if int(n_splits) < 2:
        raise ConfigError(f"n_splits = {n_splits}: expected at least 2 folds")
    if int(gap) < 0:
        raise ConfigError(f"gap = {gap}: expected a non-negative number of samples")


def _train_outside(n, test, gap):
    """Training indices: all samples farther than ``gap`` from every test sample."""
    blocked = np.zeros(n + 1, dtype=np.int64)
    lo = np.clip(test - gap, 0, n)
    hi = np.clip(test + gap + 1, 0, n)
    np.add.at(blocked, lo, 1)
    np.add.at(blocked, hi, -1)
    return np.flatnonzero(np.cumsum(blocked[:n]) == 0)


class _GappedSplitter(BaseCrossValidator):
    """Shared parameters of the splitters below: fold count and the gap around test samples."""

    def __init__(self, n_splits=5, *, gap=0):
        self.n_splits = n_splits
        self.gap = gap

    def get_n_splits(self, X=None, y=None, groups=None):
        return int(self.n_splits)

    def _iter_test_indices(self, X=None, y=None, groups=None):  # pragma: no cover - unused
        for _, test in self.split(X, y, groups):
            yield test


class BlockedKFold(_GappedSplitter):
    """K contiguous test blocks, with ``gap`` samples removed from training on each side.

    Parameters
    ----------
    n_splits : int, default=5
        Number of blocks (folds).
    gap : int, default=0
        Samples on each side of a test block excluded from its training set; use
        :func:`gap_samples` (indicator decay plus lag span).

    References
    ----------
    Roberts DR et al. (2017). Ecography 40:913-929. doi:10.1111/ecog.02881
    """


    def split(self, X, y=None, groups=None):
        _check(self.n_splits, self.gap)
        n = len(X)
        k = int(self.n_splits)
        if n < k:
            raise InputError(f"BlockedKFold: n_splits = {k} blocks need at least {k} samples, "
                             f"got n_samples = {n}")
        bounds = np.linspace(0, n, k + 1).round().astype(np.int64)
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):
            test = np.arange(a, b)
            train = _train_outside(n, test, int(self.gap))
            if train.size == 0:
                raise InputError(f"BlockedKFold: gap = {self.gap} samples leaves no training "
                                 f"sample for the test block [{a}, {b}) of {n} samples")
            yield train, test



class TrialKFold(_GappedSplitter):
    """Whole trials per fold (consecutive trials grouped), with a gap around test samples.

    Trials are taken in order of first appearance and cut into ``n_splits`` runs of
    consecutive trials of about equal total length, so a test fold is a few whole trials and
    the gap only matters at its edges.

    Parameters
    ----------
    n_splits : int, default=5
    gap : int, default=0
        Samples on each side of every test sample excluded from training.

    References
    ----------
    Roberts DR et al. (2017). Ecography 40:913-929. doi:10.1111/ecog.02881
    """


    def split(self, X, y=None, groups=None):
        _check(self.n_splits, self.gap)
        if groups is None:
            raise InputError("TrialKFold: groups (the trial id of each sample) is required")
        groups = np.asarray(groups)
        n = len(X)
        if groups.shape != (n,):
            raise InputError(f"TrialKFold: groups must have shape ({n},), got {groups.shape}")
        _, first, inverse = np.unique(groups, return_index=True, return_inverse=True)
        order = np.argsort(first)                 # trials in order of appearance
        rank = np.empty_like(order)
        rank[order] = np.arange(order.size)
        trial_rank = rank[inverse]
        k = int(self.n_splits)
        if order.size < k:
            raise InputError(f"TrialKFold: n_splits = {k} needs at least {k} trials, got "
                             f"{order.size}")
        sizes = np.bincount(trial_rank, minlength=order.size)
        cum = np.cumsum(sizes)
        # fold of each trial: cut the cumulative length into k near-equal parts
        fold_of_trial = np.minimum((k * (cum - sizes / 2.0) / n).astype(np.int64), k - 1)
        # guarantee every fold owns at least one trial
        fold_of_trial = np.maximum.accumulate(fold_of_trial)
        for f in range(k):
            if not np.any(fold_of_trial == f):
                fold_of_trial = np.minimum(np.arange(order.size) * k // order.size, k - 1)
                break
        for f in range(k):
            test = np.flatnonzero(fold_of_trial[trial_rank] == f)
            train = _train_outside(n, test, int(self.gap))
            if train.size == 0:
                raise InputError(f"TrialKFold: gap = {self.gap} samples leaves no training "
                                 f"sample for fold {f}")
            yield train, test

