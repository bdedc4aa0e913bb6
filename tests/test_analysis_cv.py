"""Blocked and whole-trial splitters: coverage, gaps, scikit-learn compatibility."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import Ridge
from sklearn.model_selection import cross_val_score

from pipeline.analysis.cv import BlockedKFold, TrialKFold, gap_samples
from pipeline.errors import ConfigError, InputError


def _check_folds(folds, n, gap):
    tested = np.concatenate([te for _, te in folds])
    # coverage: every sample is tested exactly once (the property scikit-learn's KFold tests
    # check)
    np.testing.assert_array_equal(np.sort(tested), np.arange(n))
    for tr, te in folds:
        assert np.intersect1d(tr, te).size == 0
        # no training sample within `gap` of any test sample (scikit-learn's TimeSeriesSplit
        # gap tests check the same property)
        dist = np.abs(tr[:, None] - te[None, :]).min(axis=1)
        assert dist.min() > gap
        # and nothing else is dropped: every sample farther than gap is in training
        far = np.setdiff1d(np.arange(n), te)
        far = far[np.abs(far[:, None] - te[None, :]).min(axis=1) > gap]
        np.testing.assert_array_equal(tr, far)


@pytest.mark.parametrize(("n", "k", "gap"), [(100, 5, 0), (103, 4, 7), (57, 3, 2)])
def test_blocked_kfold(n, k, gap):
    folds = list(BlockedKFold(k, gap=gap).split(np.zeros((n, 2))))
    assert len(folds) == k
    _check_folds(folds, n, gap)
    for _, te in folds:
        assert np.all(np.diff(te) == 1)          # contiguous test blocks


def test_trial_kfold_keeps_trials_whole(rng):
    lengths = rng.integers(10, 30, size=13)
    groups = np.repeat(rng.permutation(100)[:13], lengths)
    n = groups.size
    folds = list(TrialKFold(4, gap=3).split(np.zeros(n), groups=groups))
    assert len(folds) == 4
    _check_folds(folds, n, 3)
    for tr, te in folds:
        assert np.intersect1d(groups[tr], groups[te]).size == 0
        assert set(groups[te]) == {g for g in groups if np.all(np.isin(
            np.flatnonzero(groups == g), te))}


def test_splitters_work_in_sklearn(rng):
    X = rng.normal(size=(80, 3))
    y = X @ np.array([1.0, -2.0, 0.5]) + 0.1 * rng.normal(size=80)
    scores = cross_val_score(Ridge(alpha=1.0), X, y, cv=BlockedKFold(4, gap=2))
    # planted linear model: held-out R^2 near 1 (common practice)
    assert scores.shape == (4,) and scores.min() > 0.95
    g = np.repeat(np.arange(8), 10)
    assert cross_val_score(Ridge(), X, y, cv=TrialKFold(4), groups=g).shape == (4,)


def test_gap_samples():
    assert gap_samples(rate_hz=2.0, decay_s=1.8, lag_span_s=7.0) == 18
    assert gap_samples(rate_hz=1.0, decay_s=2.0) == 2


def test_splitter_errors():
    with pytest.raises(ConfigError, match="n_splits = 1"):
        list(BlockedKFold(1).split(np.zeros(10)))
    with pytest.raises(ConfigError, match="gap = -1"):
        list(BlockedKFold(2, gap=-1).split(np.zeros(10)))
    with pytest.raises(InputError, match="at least 5 samples"):
        list(BlockedKFold(5).split(np.zeros(3)))
    with pytest.raises(InputError, match="leaves no training sample"):
        list(BlockedKFold(2, gap=20).split(np.zeros(10)))
    with pytest.raises(InputError, match="groups .* is required"):
        list(TrialKFold(2).split(np.zeros(10)))
    with pytest.raises(InputError, match="at least 3 trials"):
        list(TrialKFold(3).split(np.zeros(4), groups=[0, 0, 1, 1]))
    with pytest.raises(InputError, match=r"groups must have shape \(4,\)"):
        list(TrialKFold(2).split(np.zeros(4), groups=[0, 1]))
    with pytest.raises(InputError, match="TrialKFold: gap = 50"):
        list(TrialKFold(2, gap=50).split(np.zeros(10), groups=np.repeat([0, 1], 5)))
