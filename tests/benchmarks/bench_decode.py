"""Benchmark: all penalties x folds x lags from one decomposition per fold, against
``GridSearchCV(Ridge)`` run lag by lag on the same folds.

Both compute the mean test R^2 of every (lag, penalty) over the same blocked folds; the row
records the largest difference between the two score tables in its note.
"""

from __future__ import annotations

import time

import numpy as np
from sklearn.linear_model import Ridge
from sklearn.model_selection import GridSearchCV

from pipeline.analysis.cv import BlockedKFold
from pipeline.analysis.decode import lagged_targets
from pipeline.analysis.ridge import path_scores


def _ours(X, Y, folds, alphas):
    total = np.zeros((len(alphas), Y.shape[1]))
    for tr, te in folds:
        total += path_scores(X, Y, tr, te, alphas=alphas, standardize=False)[0]
    return total / len(folds)                                   # (n_alphas, n_lags)


def _baseline(X, Y, folds, alphas):
    out = np.empty((len(alphas), Y.shape[1]))
    for j in range(Y.shape[1]):
        gs = GridSearchCV(Ridge(), {"alpha": list(alphas)}, cv=folds, refit=False)
        gs.fit(X, Y[:, j])
        out[:, j] = gs.cv_results_["mean_test_score"]
    return out


def run(quick: bool) -> list[dict]:
    rng = np.random.default_rng(0)
    n, n_cells = (400, 200) if quick else (1500, 1000)
    X = rng.normal(size=(n, n_cells))
    turn = np.convolve(rng.normal(size=n), np.ones(5) / 5, mode="same")
    X[:, :50] += np.roll(turn, -3)[:, None]
    lags = np.arange(-8, 3)                                      # 11 lags
    Y, valid = lagged_targets(turn, lags)
    X, Y = X[valid], Y[valid]
    alphas = np.logspace(-1, 5, 10)                              # 10 penalties
    folds = list(BlockedKFold(5, gap=10).split(X))               # 5 folds
    ours = _ours(X, Y, folds, alphas)                            # warm up BLAS threads
    ours_s = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        ours = _ours(X, Y, folds, alphas)
        ours_s = min(ours_s, time.perf_counter() - t0)
    t0 = time.perf_counter()
    base = _baseline(X, Y, folds, alphas)
    base_s = time.perf_counter() - t0
    diff = float(np.abs(ours - base).max())
    ratio = base_s / ours_s
    return [{"name": "decode: ridge 10 alphas x 5 folds x 11 lags", "figure": ours_s,
             "baseline": base_s, "ratio": ratio, "goal": 50.0,
             "passed": bool(ratio >= 50.0 and diff < 1e-8), "unit": "s",
             "note": f"{n} samples x {n_cells} cells; GridSearchCV(Ridge) per lag, same folds; "
                     f"max |score difference| = {diff:.1e}"}]
