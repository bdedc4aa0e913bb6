"""Turn decoders: ridge path against scikit-learn, planted premotor lead, chance on nulls."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.decomposition import PCA
from sklearn.linear_model import LogisticRegression, Ridge, RidgeCV
from sklearn.model_selection import cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils.estimator_checks import parametrize_with_checks

from pipeline.analysis.bouts import bout_features, decode_bouts, sample_at
from pipeline.analysis.classify import NestedLogistic
from pipeline.analysis.cv import BlockedKFold
from pipeline.analysis.decode import decode_continuous, lag_samples, lagged_targets
from pipeline.analysis.ridge import RidgeBasis, RidgePathCV, path_scores
from pipeline.errors import ConfigError, InputError

RATE_HZ = 2.0
LEAD = 4                       # samples by which the premotor units lead the turn


def _session(rng, n=600, n_cells=80, n_premotor=20, planted=True):
    """Sparse signed turns, smoothed; premotor cells carry the turn LEAD samples early."""
    onsets = np.sort(rng.choice(np.arange(20, n - 20), 60, replace=False))
    amp = rng.choice([-1.0, 1.0], 60) * rng.uniform(0.5, 1.5, 60)
    turn = np.zeros(n)
    turn[onsets] = amp
    turn = np.convolve(turn, [1.0, 0.6, 0.3])[:n]
    X = rng.normal(size=(n, n_cells))
    if planted:
        X[:, :n_premotor] += np.roll(turn, -LEAD)[:, None] * rng.normal(size=n_premotor)
    trials = np.repeat(np.arange(10), n // 10)
    return X.astype(np.float32), turn, onsets, amp, trials


@parametrize_with_checks([RidgePathCV(alphas=(0.1, 10.0)), NestedLogistic(Cs=(0.1, 1.0))])
def test_sklearn_compatible_estimator(estimator, check):
    check(estimator)


@pytest.mark.parametrize("n_cells", [15, 200])          # primal and dual (cells > samples)
@pytest.mark.parametrize("standardize", [False, True])
def test_ridge_path_equals_sklearn_cross_val_score(rng, n_cells, standardize):
    X = rng.normal(size=(120, n_cells)) * rng.uniform(0.5, 3, n_cells)
    y = X[:, :3].sum(axis=1) + rng.normal(size=120)
    folds = list(BlockedKFold(4, gap=3).split(X))
    alphas = [0.01, 1.0, 100.0, 1e4]
    ours = np.array([path_scores(X, y[:, None], tr, te, alphas=alphas,
                                 standardize=standardize)[0][:, 0] for tr, te in folds])
    for i, alpha in enumerate(alphas):
        est = make_pipeline(StandardScaler(), Ridge(alpha=alpha)) if standardize else \
            Ridge(alpha=alpha)
        # reference: sklearn.model_selection.cross_val_score with the same folds
        ref = cross_val_score(est, X, y, cv=folds)
        np.testing.assert_allclose(ours[:, i], ref, atol=1e-8)


def test_truncated_spectrum_equals_pca_then_ridge(rng):
    X = rng.normal(size=(90, 30))
    y = X[:, 0] - X[:, 1] + rng.normal(size=90)
    folds = list(BlockedKFold(3).split(X))
    ours = np.array([path_scores(X, y[:, None], tr, te, alphas=[3.0], n_components=5)[0][0, 0]
                     for tr, te in folds])
    # reference: scikit-learn Pipeline(StandardScaler, PCA(5), Ridge) fitted within each fold
    ref = cross_val_score(make_pipeline(StandardScaler(), PCA(5), Ridge(alpha=3.0)), X, y,
                          cv=folds)
    np.testing.assert_allclose(ours, ref, atol=1e-8)


def test_ridgepathcv_chooses_like_ridgecv(rng):
    X = rng.normal(size=(150, 12))
    y = X @ rng.normal(size=12) + 2.0 * rng.normal(size=150)
    alphas = (0.1, 3.0, 30.0, 300.0)
    ours = RidgePathCV(alphas=alphas, cv=BlockedKFold(5), standardize=False).fit(X, y)
    # reference: sklearn.linear_model.RidgeCV with the same splitter (mean fold R^2)
    ref = RidgeCV(alphas=alphas, cv=BlockedKFold(5)).fit(X, y)
    assert ours.alpha_ == ref.alpha_
    np.testing.assert_allclose(ours.coef_, ref.coef_, atol=1e-8)
    assert ours.intercept_ == pytest.approx(ref.intercept_, abs=1e-8)


def test_ridgepathcv_errors(rng):
    with pytest.raises(ConfigError, match="positive penalties"):
        RidgePathCV(alphas=(0.0, 1.0)).fit(rng.normal(size=(20, 2)), rng.normal(size=20))
    with pytest.raises(InputError, match="too few for 5 inner folds"):
        RidgePathCV().fit(rng.normal(size=(6, 2)), rng.normal(size=6))


def test_lagged_targets_and_lag_samples():
    lags = lag_samples(lag_min_s=-1.0, lag_max_s=0.5, rate_hz=RATE_HZ)
    np.testing.assert_array_equal(lags, [-2, -1, 0, 1])
    y = np.arange(10.0)
    Y, valid = lagged_targets(y, lags)
    t = np.flatnonzero(valid)
    np.testing.assert_array_equal(t, np.arange(1, 8))
    for j, lag in enumerate(lags):
        np.testing.assert_array_equal(Y[t, j], y[t - lag])
    with pytest.raises(InputError, match="holds no sample"):
        lag_samples(lag_min_s=0.1, lag_max_s=0.2, rate_hz=RATE_HZ)


def _plane_times(n, n_planes, rate_hz=RATE_HZ):
    """Volume starts at k / rate; plane z sampled z / (n_planes * rate) later."""
    return np.arange(n)[:, None] / rate_hz + np.arange(n_planes)[None, :] / (n_planes * rate_hz)


def test_sample_at_each_cells_own_plane_times(rng):
    times = _plane_times(40, 4)
    plane = rng.integers(0, 4, size=9)
    a, b = rng.normal(size=9), rng.normal(size=9)
    X = a + b * times[:, plane]            # each cell linear in its own sample time
    q = rng.uniform(1.0, 18.0, size=25)
    # linear interpolation reproduces a linear signal exactly at any time (common practice)
    np.testing.assert_allclose(sample_at(X, q, times_s=times, plane=plane),
                               a + b * q[:, None], rtol=1e-5, atol=1e-5)
    Xr = rng.normal(size=(40, 9))
    ours = sample_at(Xr, q, times_s=times, plane=plane)
    for c in range(9):
        # reference: numpy.interp on the cell's own plane times
        np.testing.assert_allclose(ours[:, c], np.interp(q, times[:, plane[c]], Xr[:, c]),
                                   rtol=1e-5, atol=1e-6)
    with pytest.raises(InputError, match="the plane of each cell is required"):
        sample_at(Xr, q, times_s=times)
    with pytest.raises(InputError, match=r"cell planes: expected 9 values in 0..3"):
        sample_at(Xr, q, times_s=times, plane=plane + 4)


def test_bout_features_rise_and_mean(rng):
    from scipy.integrate import trapezoid

    times = _plane_times(50, 2)
    plane = np.array([0, 1, 1])
    X = rng.normal(size=(50, 3))
    onset = np.array([6.3, 11.9])
    rise = bout_features(X, onset, -1.0, times_s=times, plane=plane, window_s=1.5)
    mean = bout_features(X, onset, -1.0, times_s=times, plane=plane, window_s=1.5,
                         feature="mean")
    for c in range(3):
        t = times[:, plane[c]]
        at = lambda q, c=c, t=t: np.interp(q, t, X[:, c])  # noqa: E731
        np.testing.assert_allclose(rise[:, c], at(onset - 1.0) - at(onset - 2.5), atol=1e-5)
        # reference: scipy.integrate.trapezoid over the window at the sample period (0.5 s)
        grid = np.linspace(-2.5, -1.0, 4)
        ref = [trapezoid(at(o + grid), grid) / 1.5 for o in onset]
        np.testing.assert_allclose(mean[:, c], ref, atol=1e-5)
    with pytest.raises(InputError, match="expected 'rise' or 'mean'"):
        bout_features(X, onset, 0.0, times_s=times, plane=plane, window_s=1.0, feature="max")


def test_planted_lead_recovered(rng):
    X, turn, _, _, trials = _session(rng)
    lags = lag_samples(lag_min_s=-5, lag_max_s=2, rate_hz=RATE_HZ)
    res = decode_continuous(X, turn, lags=lags, rate_hz=RATE_HZ, n_null=40, gap=6,
                            trial_ids=trials, seed=1)
    # planted lead of LEAD samples: peak within one sample
    assert abs(res.r2.best_lag_s * RATE_HZ + LEAD) <= 1
    assert res.r2.mean.max() > 0.3
    assert res.null_kind == "trial-shuffle"
    assert res.r2.earliest_lag_s is not None and res.r2.earliest_lag_s <= res.r2.best_lag_s
    assert res.r2.p[np.argmax(res.r2.mean)] == pytest.approx(1 / 41)
    # the weights single out the premotor units
    assert np.abs(res.weights[:20]).mean() > 4 * np.abs(res.weights[20:]).mean()
    json.dumps(res.to_dict(), allow_nan=False)


def test_shuffled_targets_score_at_chance(rng):
    X, turn, _, _, _ = _session(rng, n=400, planted=False)
    lags = np.array([-4, 0])
    res = decode_continuous(X, turn, lags=lags, rate_hz=RATE_HZ, n_null=20, gap=6,
                            min_shift=40)
    # no planted signal: cross-validated R^2 is at most zero (common practice)
    assert np.all(res.r2.mean <= 0.0)
    assert res.null_kind == "circular-shift"


def test_bouts_planted_and_chance(rng):
    X, _, onsets, amp, trials = _session(rng)
    times = np.arange(len(X)) / RATE_HZ
    onset_s = onsets / RATE_HZ
    kw = {"times_s": times, "window_s": 1.0, "trial_of_bout": trials[onsets]}
    res = decode_bouts(X, onset_s, amp > 0, lags_s=np.array([-2.0, 1.0]), angle=amp, **kw)
    # premotor units carry the turn LEAD = 4 samples (2 s) early: their rise over
    # [onset - 3 s, onset - 2 s] separates the directions (AUC > 0.8), and 1 s after the
    # onset nothing is left to read (AUC near 0.5)
    assert res.auc.mean[0] > 0.8 and abs(res.auc.mean[1] - 0.5) < 0.2
    assert res.angle_r2 is not None and res.angle_r2.mean[0] > 0.3
    assert res.auc.best_lag_s == -2.0 and np.all(np.isfinite(res.C))
    json.dumps(res.to_dict(), allow_nan=False)
    mean = decode_bouts(X, onset_s, amp > 0, lags_s=np.array([-1.5]), feature="mean", **kw)
    assert mean.auc.mean[0] > 0.8 and mean.feature == "mean"
    fast = LogisticRegression(C=0.1, max_iter=1000)
    with_null = decode_bouts(X, onset_s, amp > 0, lags_s=np.array([-2.0]), classifier=fast,
                             n_null=9, **kw)
    # planted signal beats every one of 9 trial shuffles: p = 1 / (9 + 1) (Phipson & Smyth)
    assert with_null.auc.p[0] == pytest.approx(0.1)
    assert np.all(np.isnan(with_null.C))           # C is reported for NestedLogistic only
    aucs = []
    gen = np.random.default_rng(7)
    for _ in range(12):
        labels = gen.permutation(amp > 0)
        aucs.append(decode_bouts(X, onset_s, labels, lags_s=np.array([-2.0]), times_s=times,
                                 window_s=1.0, classifier=fast).auc.mean[0])
    # shuffled labels: AUC at chance, 0.5 +- 0.05 over repeats (common practice)
    assert abs(np.mean(aucs) - 0.5) < 0.05


def test_decode_errors(rng):
    X = rng.normal(size=(30, 3))
    with pytest.raises(InputError, match=r"expected X \(n_samples, n_cells\)"):
        decode_continuous(X, np.zeros(29), lags=np.array([0]), rate_hz=1.0, n_null=0)
    with pytest.raises(InputError, match="samples remain after trimming"):
        decode_continuous(X, np.zeros(30), lags=np.array([-12, 12]), rate_hz=1.0, n_null=0)
    times = np.arange(30.0)
    with pytest.raises(InputError, match="3 usable bouts"):
        decode_bouts(X, np.array([5.0, 10.0, 15.0]), np.array([1, 0, 1]), times_s=times,
                     lags_s=np.array([0.0]), window_s=2.0)
    with pytest.raises(InputError, match="3 onsets but 2 labels"):
        decode_bouts(X, np.array([5.0, 10.0, 15.0]), np.array([1, 0]), times_s=times,
                     lags_s=np.array([0.0]), window_s=2.0)
    with pytest.raises(InputError, match="positive length in s, got 0"):
        decode_bouts(X, np.array([5.0, 10.0, 15.0]), np.array([1, 0, 1]), times_s=times,
                     lags_s=np.array([0.0]), window_s=0)


def test_without_null_p_is_missing(rng):
    X = rng.normal(size=(200, 10))
    res = decode_continuous(X, rng.normal(size=200), lags=np.array([-2, 0]), rate_hz=1.0,
                            n_null=0)
    assert res.null_kind == "none" and np.all(np.isnan(res.r2.p))
    assert res.r2.earliest_lag_s is None
    json.dumps(res.to_dict(), allow_nan=False)


def test_nested_logistic_matches_grid_search_choice(rng):
    # reference: sklearn GridSearchCV over the same C grid and blocked folds, ROC AUC scoring
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import GridSearchCV

    X = rng.normal(size=(120, 30))
    y = (X[:, :3].sum(axis=1) + rng.normal(scale=2.0, size=120)) > 0
    ours = NestedLogistic(Cs=(1e-3, 1e-2, 1e-1, 1.0), cv=3, tol=1e-8, max_iter=5000).fit(X, y)
    Z = (X - X.mean(0)) / X.std(0)
    ref = GridSearchCV(LogisticRegression(tol=1e-8, max_iter=5000),
                       {"C": [1e-3, 1e-2, 1e-1, 1.0]}, cv=BlockedKFold(3),
                       scoring="roc_auc").fit(Z, y)
    assert ours.C_ == ref.best_params_["C"]
    np.testing.assert_allclose(ours.decision_function(X), ref.decision_function(Z), atol=1e-5)


def test_nested_logistic_wide_equals_plain_logistic(rng):
    # more features than samples: the fit runs in the row space of the training data
    X = rng.normal(size=(60, 400))
    y = (X[:, :5].sum(axis=1) + rng.normal(size=60)) > 0
    ours = NestedLogistic(Cs=(0.01, 0.1), tol=1e-10, max_iter=10000).fit(X, y)
    Z = (X - X.mean(0)) / X.std(0)
    # reference: sklearn LogisticRegression on all 400 standardised features, same C
    # (the L2 solution lies in the span of the training rows; Hastie et al. 2009, 18.3.5)
    ref = LogisticRegression(C=ours.C_, tol=1e-10, max_iter=10000).fit(Z, y)
    np.testing.assert_allclose(ours.coef_, ref.coef_, atol=1e-5)
    np.testing.assert_allclose(ours.decision_function(X), ref.decision_function(Z), atol=1e-4)
    np.testing.assert_allclose(ours.predict_proba(X), ref.predict_proba(Z), atol=1e-5)


def test_wide_problems_never_form_cells_by_cells(rng):
    import tracemalloc

    n, n_cells = 80, 6000
    X = rng.normal(size=(n, n_cells)).astype(np.float32)
    y = X[:, 0] + rng.normal(size=n)
    tracemalloc.start()
    basis = RidgeBasis(X, np.arange(60))
    basis.project_rows(np.arange(60, 80))
    basis.coef(basis.project_targets(y[:60, None]))
    NestedLogistic(Cs=(0.1,)).fit(X, y > 0)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    # the dual path decomposes the 60 x 60 kernel; a cells x cells float64 matrix would take
    # 288 MB, the whole run stays below a tenth of that (a few float64 copies of X: 4 MB each)
    assert basis.dual and basis.vec.shape[0] == 60
    assert peak < n_cells * n_cells * 8 / 10


def test_earliest_lag_is_the_unbroken_run_above_null_and_chance():
    from pipeline.analysis.decode import _curve

    lags_s = np.array([-3.0, -2.5, -2.0, -1.5, -1.0])
    folds = np.array([[0.30, -0.01, 0.20, 0.25, 0.50],
                      [0.30, -0.01, 0.20, 0.25, 0.50]])
    null = np.full((19, 5), -0.05)          # shuffled-target refits score below zero
    curve = _curve("r2", lags_s, folds, null)
    # every lag beats all 19 nulls: p = 1 / (19 + 1) (Phipson & Smyth 2010) ...
    np.testing.assert_allclose(curve.p, 0.05)
    assert curve.earliest_lag_s is None                     # p must be below 0.05
    curve = _curve("r2", lags_s, folds, np.full((39, 5), -0.05))
    # ... with 39 nulls p = 0.025 < 0.05; -2.5 s beats the null but not chance (R^2 < 0), so
    # the run above null and chance that reaches the best lag (-1.0 s) starts at -2.0 s
    assert curve.best_lag_s == -1.0 and curve.earliest_lag_s == -2.0
    # a mean just above chance whose folds straddle it (R^2 +0.03 and -0.01: the t interval
    # across folds, scipy.stats.t, includes 0) is not counted as decodable: run starts at -1.5 s
    folds[:, 2] = [0.03, -0.01]
    curve = _curve("r2", lags_s, folds, np.full((39, 5), -0.05))
    assert curve.mean[2] > 0 and curve.ci_low[2] < 0
    assert curve.earliest_lag_s == -1.5


def test_activation_pattern_is_the_covariance_with_the_output(rng):
    from pipeline.analysis.ridge import activation_pattern

    X = rng.normal(size=(300, 7)) @ rng.normal(size=(7, 7))
    w = rng.normal(size=7)
    rows = np.arange(20, 300)
    got = activation_pattern(X, rows, w)
    y_hat = X[rows] @ w
    # reference: numpy.cov of each cell with the decoder output, over its variance
    c = np.cov(np.column_stack([X[rows], y_hat]), rowvar=False)
    np.testing.assert_allclose(got, c[:-1, -1] / c[-1, -1], rtol=1e-10)
    assert np.all(activation_pattern(X, rows, np.zeros(7)) == 0)


def test_activation_pattern_ignores_a_noise_cancelling_cell(rng):
    from pipeline.analysis.ridge import activation_pattern

    # the two-channel distractor example of Haufe et al. (2014, NeuroImage 87:96; from memory): cell 0
    # carries the signal plus noise, cell 1 the noise alone; the best decoder subtracts cell 1
    # (a large weight on a cell that does not carry the signal), the pattern does not
    n = 4000
    signal, noise = rng.normal(size=n), rng.normal(size=n)
    X = np.column_stack([signal + noise, noise])
    w = np.linalg.lstsq(X, signal, rcond=None)[0]
    np.testing.assert_allclose(w, [1.0, -1.0], atol=1e-9)
    pattern = activation_pattern(X, np.arange(n), w)
    np.testing.assert_allclose(pattern, [1.0, 0.0], atol=0.05)
