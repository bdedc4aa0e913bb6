"""Decoding turn commands from population activity, across lags, with honest nulls.

Lags shift the *target*, never the features: at lag ``L`` (samples) row ``t`` of the target is
``y[t - L]``, so a negative lag asks whether activity at ``t`` predicts the turn ``|L|`` samples
later (activity before the turn). One feature matrix then serves every lag, and every lag,
penalty and null target is solved from the same per-fold decomposition
(:class:`~pipeline.analysis.ridge.RidgeBasis`). Null targets are the turn series permuted by
whole trials (or circularly shifted when there are no trials) and lagged in the same way; they
go through the identical nested cross-validation, penalty selection included.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
from scipy import stats as _sps

from pipeline.analysis.cv import BlockedKFold, TrialKFold
from pipeline.analysis.ridge import (
    RidgeBasis,
    activation_pattern,
    path_scores,
    pearson_columns,
    r2_columns,
)
from pipeline.analysis.stats import (
    circular_shift_indices,
    permutation_pvalue,
    trial_shuffle_indices,
)
from pipeline.errors import InputError

__all__ = [
    "LagCurve",
    "ContinuousDecode",
    "lag_samples",
    "lagged_targets",
    "make_splitter",
    "decode_continuous",
]


def _jsonable(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, float | np.floating):
        return None if not math.isfinite(float(obj)) else float(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


@dataclasses.dataclass
class LagCurve:
    """One score across lags: per fold, mean with a 95% interval across folds, and its null.

    ``p`` uses the +1 correction (Phipson & Smyth 2010). A lag *exceeds the null* when its
    mean is above the null's 95th percentile with ``p < 0.05`` and the lower end of its 95%
    interval across folds is above chance (R^2 and r above 0, ROC AUC and balanced accuracy
    above 0.5): shuffled-target refits often score below chance, so beating them alone does
    not make a lag decodable, and a mean a hair above chance (R^2 = 0.0005 with folds on both
    sides of 0) is not a readout either; ``earliest_lag_s`` is the
    earliest lag of the unbroken run of such lags that reaches the best lag, i.e. how long
    before the peak the score is continuously above the null (an isolated early lag, one of
    many tested at 5 %, does not count). None when the best lag itself does not exceed the
    null, or without a null.
    """

    metric: str
    lags_s: np.ndarray
    folds: np.ndarray
    mean: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    null: np.ndarray
    null_p95: np.ndarray
    p: np.ndarray
    best_lag_s: float
    earliest_lag_s: float | None

    def to_dict(self) -> dict[str, Any]:
        out = _jsonable(self)
        out.pop("null")
        out["null_mean"] = _jsonable(np.nanmean(self.null, axis=0)) if self.null.size else None
        out["n_null"] = int(self.null.shape[0])
        return out


#: chance level of each score (held-out predictions no better than the training mean or a coin)
_CHANCE = {"r2": 0.0, "pearson_r": 0.0, "roc_auc": 0.5, "balanced_accuracy": 0.5}


def _curve(metric, lags_s, folds, null=None, *, level=0.95, alpha_p=0.05):
    folds = np.asarray(folds, dtype=np.float64)
    k = np.sum(np.isfinite(folds), axis=0)
    mean = np.nanmean(folds, axis=0)
    sd = np.nanstd(folds, axis=0, ddof=1) if folds.shape[0] > 1 else np.zeros(folds.shape[1])
    tq = _sps.t.ppf(0.5 + level / 2, np.maximum(k - 1, 1))
    half = tq * sd / np.sqrt(np.maximum(k, 1))
    null = np.zeros((0, folds.shape[1])) if null is None else np.asarray(null, dtype=np.float64)
    if null.shape[0]:
        p = permutation_pvalue(mean, null)
        p95 = np.quantile(null, 0.95, axis=0)
        above = (mean > p95) & (p < alpha_p) & (mean - half > _CHANCE.get(metric, -np.inf))
        earliest = None
        if np.any(np.isfinite(mean)) and above[int(np.nanargmax(mean))]:
            j = int(np.nanargmax(mean))
            while j > 0 and above[j - 1]:
                j -= 1
            earliest = float(lags_s[j])
    else:
        p = np.full(mean.shape, np.nan)
        p95 = np.full(mean.shape, np.nan)
        earliest = None
    best = float(lags_s[int(np.nanargmax(mean))]) if np.any(np.isfinite(mean)) else math.nan
    return LagCurve(metric, np.asarray(lags_s, dtype=np.float64), folds, mean, mean - half,
                    mean + half, null, p95, p, best, earliest)


@dataclasses.dataclass
class ContinuousDecode:
    """Result of :func:`decode_continuous` (written to decode.json by the stage)."""

    r2: LagCurve
    r: LagCurve
    alpha: np.ndarray            # (n_folds, n_lags) penalty chosen by nested CV
    weights: np.ndarray          # (n_cells,) refit on all rows at the best lag
    pattern: np.ndarray          # (n_cells,) activation pattern of those weights (Haufe 2014)
    weights_alpha: float
    weights_lag_s: float
    null_kind: str
    n_samples: int

    def to_dict(self) -> dict[str, Any]:
        """One entry per score (each with its own ``lags_s``) plus the scalars."""
        r2 = self.r2.to_dict()
        r2["alpha"] = _jsonable(self.alpha)
        return {"turn_r2": r2, "turn_r": self.r.to_dict(),
                "weights_alpha": self.weights_alpha, "weights_lag_s": self.weights_lag_s,
                "null_kind": self.null_kind, "n_samples": self.n_samples}


def lag_samples(*, lag_min_s, lag_max_s, rate_hz):
    """Integer lags (samples) covering ``[lag_min_s, lag_max_s]`` at ``rate_hz``."""
    lo = math.ceil(lag_min_s * rate_hz - 1e-9)
    hi = math.floor(lag_max_s * rate_hz + 1e-9)
    if hi < lo:
        raise InputError(f"lags: [{lag_min_s}, {lag_max_s}] s holds no sample at {rate_hz} Hz")
    return np.arange(lo, hi + 1)


def lagged_targets(y, lags):
    """Target matrix ``Y[t, j] = y[t - lags[j]]`` and the rows valid at every lag.

    Parameters
    ----------
    y : ndarray of shape (n_samples,) or (n_samples, n_series)
        One or several series (extra series, e.g. null permutations, give extra columns,
        series-major: column ``s * n_lags + j``).
    lags : ndarray of int

    Returns
    -------
    Y : ndarray of shape (n_samples, n_series * n_lags)
    valid : ndarray of bool, shape (n_samples,)
    """
    y = np.asarray(y, dtype=np.float64)
    y2 = y.reshape(len(y), -1)
    n = len(y2)
    lags = np.asarray(lags, dtype=np.int64)
    src = np.arange(n)[:, None] - lags[None, :]                 # (n, n_lags)
    inside = (src >= 0) & (src < n)
    valid = inside.all(axis=1)
    vals = y2[np.clip(src, 0, n - 1)]                           # (n, n_lags, n_series)
    Y = np.moveaxis(vals, 2, 1).reshape(n, -1)
    valid &= np.all(np.isfinite(Y), axis=1)
    return Y, valid


def make_splitter(n_splits, *, gap, groups=None):
    """Whole-trial folds when ``groups`` holds at least ``n_splits`` trials, else blocks."""
    if groups is not None and np.unique(groups).size >= n_splits:
        return TrialKFold(n_splits, gap=gap)
    return BlockedKFold(n_splits, gap=gap)


def _null_indices(n, n_null, *, trial_ids, min_shift, seed):
    if n_null == 0:
        return np.zeros((0, n), dtype=np.int64), "none"
    if trial_ids is not None and np.unique(trial_ids).size >= 2:
        return trial_shuffle_indices(trial_ids, n_null, seed=seed), "trial-shuffle"
    return circular_shift_indices(n, n_null, min_shift=min_shift, seed=seed), "circular-shift"


def decode_continuous(X, y, *, lags, rate_hz, alphas=(0.1, 1.0, 10.0, 100.0, 1e3, 1e4, 1e5),
                      n_splits=5, gap=0, trial_ids=None, n_null=200, min_shift=None,
                      standardize=True, n_components=0, seed=0):
    """Cross-validated ridge decoding of a continuous turn command at every lag.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_cells)
        Activity (each cell sampled at its plane's time).
    y : ndarray of shape (n_samples,)
        Signed turn command per sample (positive = leftward).
    lags : ndarray of int
        Lags in samples (:func:`lag_samples`); negative = activity before the turn.
    rate_hz : float
        Sampling rate, to report lags in seconds.
    alphas : sequence of float
        Ridge penalties; chosen per fold and lag by inner CV inside the training rows.
    n_splits : int, default=5
        Outer folds (inner CV uses the same splitter class and gap).
    gap : int, default=0
        Samples removed from training on each side of a test fold (:func:`gap_samples`).
    trial_ids : ndarray of shape (n_samples,), optional
        Trial of each sample: whole-trial folds and a trial-shuffle null.
    n_null : int, default=200
        Null targets (trial shuffles, else circular shifts).
    min_shift : int, optional
        Minimum circular shift in samples; default a tenth of the samples.
    standardize, n_components
        See :class:`~pipeline.analysis.ridge.RidgeBasis`.
    seed : int, default=0

    Returns
    -------
    ContinuousDecode

    References
    ----------
    Hoerl AE, Kennard RW (1970). Technometrics 12:55-67.
    Roberts DR et al. (2017). Ecography 40:913-929 (blocked cross-validation).
    Phipson B, Smyth GK (2010). Stat Appl Genet Mol Biol 9:39 (permutation p-values).
    Harris KD (2020). Nonsense correlations in neuroscience. bioRxiv
    doi:10.1101/2020.11.29.402719 (circular shifts overstate significance on drifting signals).
    """
    y = np.asarray(y, dtype=np.float64)
    if X.ndim != 2 or y.shape != (X.shape[0],):
        raise InputError(f"decode: expected X (n_samples, n_cells) and y (n_samples,), got "
                         f"{X.shape} and {y.shape}")
    n = len(y)
    lags = np.asarray(lags, dtype=np.int64)
    if min_shift is None:
        min_shift = max(1, n // 10)
    perms, null_kind = _null_indices(n, n_null, trial_ids=trial_ids, min_shift=min_shift,
                                     seed=seed)
    series = np.column_stack([y] + [y[p] for p in perms])
    Y, valid = lagged_targets(series, lags)
    rows = np.flatnonzero(valid)
    if rows.size < 2 * n_splits:
        raise InputError(f"decode: {rows.size} samples remain after trimming the lag span "
                         f"{lags.min()}..{lags.max()}; need at least {2 * n_splits}")
    Yv = Y[rows]
    groups = None if trial_ids is None else np.asarray(trial_ids)[rows]
    outer = make_splitter(n_splits, gap=gap, groups=groups)
    alphas = np.asarray(alphas, dtype=np.float64)
    n_lags, n_series = lags.size, series.shape[1]
    r2 = np.full((n_splits, n_series * n_lags), np.nan)
    rr = np.full_like(r2, np.nan)
    chosen = np.zeros((n_splits, n_series * n_lags))
    for f, (tr, te) in enumerate(outer.split(rows, groups=groups)):
        g_tr = None if groups is None else groups[tr]
        inner = make_splitter(n_splits, gap=gap, groups=g_tr)
        total = np.zeros((alphas.size, Y.shape[1]))
        for itr, ite in inner.split(tr, groups=g_tr):
            total += path_scores(X, _Rows(Yv, rows), rows[tr[itr]], rows[tr[ite]],
                                 alphas=alphas, standardize=standardize,
                                 n_components=n_components, pearson=False)[0]
        best = np.argmax(total, axis=0)
        chosen[f] = alphas[best]
        basis = RidgeBasis(X, rows[tr], standardize=standardize, n_components=n_components)
        a_proj = basis.project_targets(Yv[tr])
        z = basis.project_rows(rows[te])
        pred = np.empty((te.size, Y.shape[1]))
        for i, alpha in enumerate(alphas):
            cols = np.flatnonzero(best == i)
            if cols.size:
                pred[:, cols] = z @ (a_proj[:, cols] / (basis.s2 + alpha)[:, None])
        pred += Yv[tr].mean(axis=0)
        r2[f] = r2_columns(Yv[te], pred)
        rr[f] = pearson_columns(Yv[te], pred)
    lags_s = lags / float(rate_hz)
    r2 = r2.reshape(n_splits, n_series, n_lags)
    rr = rr.reshape(n_splits, n_series, n_lags)
    r2_curve = _curve("r2", lags_s, r2[:, 0], np.nanmean(r2[:, 1:], axis=0))
    r_curve = _curve("pearson_r", lags_s, rr[:, 0], np.nanmean(rr[:, 1:], axis=0))
    j = int(np.nanargmax(r2_curve.mean))
    w_alpha = float(np.exp(np.median(np.log(chosen[:, j]))))
    basis = RidgeBasis(X, rows, standardize=standardize, n_components=n_components)
    a_proj = basis.project_targets(Yv[:, [j]])
    weights = basis.coef(a_proj / (basis.s2 + w_alpha)[:, None])[:, 0]
    pattern = activation_pattern(X, rows, weights)
    return ContinuousDecode(r2_curve, r_curve, chosen[:, :n_lags], weights, pattern, w_alpha,
                            float(lags_s[j]), null_kind, int(rows.size))


class _Rows:
    """Index absolute rows into a matrix holding only the valid rows (no copy of Y)."""

    def __init__(self, values, rows):
        self.values = values
        self.pos = np.full(int(rows.max()) + 1, -1)
        self.pos[rows] = np.arange(rows.size)
        self.shape = values.shape

    def __getitem__(self, idx):
        return self.values[self.pos[idx]]
