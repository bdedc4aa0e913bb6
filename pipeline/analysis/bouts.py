"""Bout-wise decoders: each bout's direction and turn angle from activity just before it.

Features are read at exact times relative to each bout's onset, on each cell's own sample
times (a cell in plane ``z`` is sampled at plane ``z``'s times; linear interpolation between
its two neighbouring samples), so a lag means the same delay for every cell and every bout,
whatever the phase of the onset within the volume. The lag grid is the caller's (the stage
uses one volume period). By default the feature is the *rise* of each cell's activity over
the window ending at the lag, ``a(onset + lag) - a(onset + lag - window)``: a baseline-
subtracted response, as in trial-based analyses of evoked activity. With bouts about a
second apart and an indicator decaying over ~2 s, the level of a cell's activity still carries
the transients of earlier bouts; its rise over a window about as long as the indicator's rise
isolates the new transient. ``feature="mean"`` uses the mean activity over the window instead.

Measured on the demo scenario (peak cross-validated ROC AUC over lags, nested L2 logistic,
small preset seed 0 / small seed 1 / default preset): 1 s window means in whole volumes at 1 s
lag steps 0.785 / 0.862 / 0.811; the rise over 1 s on plane times at 0.5 s lag steps
0.908 / 0.911 / 0.942, peaking for the window ending 1 s before the onset in all three.
"""

from __future__ import annotations

import contextlib
import dataclasses
from typing import Any

import numpy as np
from sklearn.base import clone
from sklearn.metrics import balanced_accuracy_score, roc_auc_score
from threadpoolctl import threadpool_limits

from pipeline.analysis.classify import NestedLogistic
from pipeline.analysis.cv import BlockedKFold
from pipeline.analysis.decode import LagCurve, _curve, _null_indices, make_splitter
from pipeline.analysis.ridge import RidgePathCV, r2_columns
from pipeline.errors import InputError

__all__ = ["BoutDecode", "sample_at", "bout_features", "decode_bouts"]

_BLOCK_CELLS = 4096
#: bouts x cells up to this size are fitted with one BLAS/OpenMP thread: on small problems the
#: threads' synchronisation and spin-waiting cost more than they save (measured: a nested
#: logistic fit on 100 bouts x 196 cells took 1.2 s of CPU per 10 fits with two threads, 0.64 s
#: with one, the same wall time)
SINGLE_THREAD_SIZE = 10_000_000


@dataclasses.dataclass
class BoutDecode:
    """Result of :func:`decode_bouts`: left/right and turn-angle scores per lag."""

    auc: LagCurve
    balanced_accuracy: LagCurve
    angle_r2: LagCurve | None
    n_bouts: int
    n_left: int
    window_s: float
    feature: str
    confusion: np.ndarray
    """(2, 2) test-fold counts at the best AUC lag: rows true, columns predicted (left, right)."""
    C: np.ndarray
    """(n_folds, n_lags) inverse penalty chosen by the default classifier (NaN otherwise)."""

    def to_dict(self) -> dict[str, Any]:
        """One entry per score (each with its own ``lags_s``) plus the scalars."""
        auc = self.auc.to_dict()
        auc["C"] = [[None if not np.isfinite(c) else float(c) for c in row] for row in self.C]
        out: dict[str, Any] = {"bout_auc": auc,
                               "bout_balanced_accuracy": self.balanced_accuracy.to_dict()}
        if self.angle_r2 is not None:
            out["bout_angle_r2"] = self.angle_r2.to_dict()
        out.update({"n_bouts": self.n_bouts, "n_left": self.n_left, "window_s": self.window_s,
                    "bout_feature": self.feature})
        out["bout_confusion"] = {"lag_s": self.auc.best_lag_s, "classes": ["left", "right"],
                                 "confusion": self.confusion.tolist(),
                                 "n_bouts": int(self.confusion.sum())}
        return out


def _plane_columns(times_s, n_cells, plane):
    times_s = np.asarray(times_s, dtype=np.float64)
    if times_s.ndim == 1:
        times_s = times_s[:, None]
    if plane is None:
        if times_s.shape[1] != 1:
            raise InputError(f"sample times have {times_s.shape[1]} planes: the plane of each "
                             "cell is required")
        plane = np.zeros(n_cells, dtype=np.int64)
    plane = np.asarray(plane, dtype=np.int64)
    if plane.shape != (n_cells,) or plane.min(initial=0) < 0 or \
            plane.max(initial=0) >= times_s.shape[1]:
        raise InputError(f"cell planes: expected {n_cells} values in 0..{times_s.shape[1] - 1}, "
                         f"got shape {plane.shape} and range "
                         f"{plane.min(initial=0)}..{plane.max(initial=0)}")
    return times_s, plane


def sample_at(X, query_s, *, times_s, plane=None):
    """Each cell's activity at the query times, interpolated on its own sample times.

    Parameters
    ----------
    X : array of shape (n_samples, n_cells)
        Activity; any object indexable as ``X[rows, cols]`` (read in blocks of cells).
    query_s : ndarray of shape (n_query,)
        Times (s) on the clock of ``times_s``.
    times_s : ndarray of shape (n_samples,) or (n_samples, n_planes)
        Sample times of every cell, or of each plane (increasing down the rows).
    plane : ndarray of int, shape (n_cells,), optional
        Column of ``times_s`` holding each cell's sample times.

    Returns
    -------
    ndarray of shape (n_query, n_cells), float32
        Linear interpolation between the two samples around each query; a query outside a
        cell's sampled span takes the nearest sample's value.
    """
    n, n_cells = X.shape
    times_s, plane = _plane_columns(times_s, n_cells, plane)
    query_s = np.asarray(query_s, dtype=np.float64)
    out = np.empty((query_s.size, n_cells), dtype=np.float32)
    for z in np.unique(plane):
        t = times_s[:, z]
        j = np.clip(np.searchsorted(t, query_s, side="right") - 1, 0, n - 2)
        w = np.clip((query_s - t[j]) / (t[j + 1] - t[j]), 0.0, 1.0)[:, None]
        rows, inv = np.unique(np.concatenate([j, j + 1]), return_inverse=True)
        cells = np.flatnonzero(plane == z)
        for a in range(0, cells.size, _BLOCK_CELLS):
            cols = cells[a: a + _BLOCK_CELLS]
            block = np.asarray(X[rows, cols] if not isinstance(X, np.ndarray)
                               else X[np.ix_(rows, cols)], dtype=np.float64)
            lo, hi = block[inv[: j.size]], block[inv[j.size:]]
            out[:, cols] = lo + w * (hi - lo)
    return out


def bout_features(X, onset_s, lag_s, *, times_s, window_s, plane=None, feature="rise"):
    """Features of every bout at one lag: activity rise (or mean) over the window ending there.

    Parameters
    ----------
    X : array of shape (n_samples, n_cells)
    onset_s : ndarray of shape (n_bouts,)
        Bout onsets on the clock of ``times_s``.
    lag_s : float
        The window ends at ``onset + lag`` (negative = before the bout).
    times_s, plane
        Sample times, see :func:`sample_at`.
    window_s : float
        Window length (s).
    feature : {"rise", "mean"}, default="rise"
        ``"rise"``: ``a(end) - a(end - window)``; ``"mean"``: trapezoidal mean of ``a`` over the
        window, sampled at the median sample period.

    Returns
    -------
    ndarray of shape (n_bouts, n_cells), float32
    """
    onset_s = np.asarray(onset_s, dtype=np.float64)
    end = onset_s + float(lag_s)
    if feature == "rise":
        return (sample_at(X, end, times_s=times_s, plane=plane)
                - sample_at(X, end - window_s, times_s=times_s, plane=plane))
    if feature != "mean":
        raise InputError(f"bout feature = {feature!r}: expected 'rise' or 'mean'")
    t = np.asarray(times_s, dtype=np.float64).reshape(len(times_s), -1)[:, 0]
    dt = float(np.median(np.diff(t)))
    m = max(1, round(window_s / dt))
    offsets = np.linspace(-window_s, 0.0, m + 1)
    weights = np.full(m + 1, 1.0 / m)
    weights[[0, -1]] /= 2.0
    out = np.zeros((onset_s.size, X.shape[1]), dtype=np.float32)
    for off, wt in zip(offsets, weights, strict=True):
        out += wt * sample_at(X, end + off, times_s=times_s, plane=plane)
    return out


def _usable(onset_s, lags_s, window_s, times_s):
    t = np.asarray(times_s, dtype=np.float64).reshape(len(times_s), -1)
    lo, hi = t[0].max(), t[-1].min()
    return (onset_s + np.min(lags_s) - window_s >= lo) & (onset_s + np.max(lags_s) <= hi)


def _default_classifier(gap):
    return NestedLogistic(Cs=(1e-3, 1e-2, 1e-1, 1.0), cv=3, gap=gap)


def decode_bouts(X, onset_s, left, *, times_s, lags_s, window_s, plane=None, feature="rise",
                 angle=None, n_splits=5, gap=0, classifier=None, regressor=None, n_null=0,
                 trial_of_bout=None, seed=0):
    """Decode each bout's direction (and turn angle) from activity around a lag before it.

    Parameters
    ----------
    X : array of shape (n_samples, n_cells)
    onset_s : ndarray of shape (n_bouts,)
        Bout onsets (s) on the clock of ``times_s``.
    left : ndarray of bool, shape (n_bouts,)
        True for a leftward bout.
    times_s : ndarray of shape (n_samples,) or (n_samples, n_planes)
        Sample times (s) of every cell or of each plane.
    lags_s : ndarray of float
        Window ends relative to onset (s); negative = before the bout.
    window_s : float
        Window length (s); about the indicator's rise time.
    plane : ndarray of int, shape (n_cells,), optional
        Each cell's column of ``times_s``.
    feature : {"rise", "mean"}, default="rise"
        See :func:`bout_features`.
    angle : ndarray of shape (n_bouts,), optional
        Signed turn angle per bout (radians); decoded with ``regressor``.
    n_splits : int, default=5
        Outer folds over bouts in time order (whole trials when ``trial_of_bout`` is given).
    gap : int, default=0
        Bouts removed from training on each side of a test fold.
    classifier : sklearn classifier, optional
        Default: :class:`~pipeline.analysis.classify.NestedLogistic`, L2 logistic regression
        after standardisation inside the training fold, with C chosen by ROC AUC over blocked
        inner folds of the training bouts.
    regressor : sklearn regressor, optional
        Default :class:`~pipeline.analysis.ridge.RidgePathCV`.
    n_null : int, default=0
        Label permutations (by whole trial when ``trial_of_bout`` is given), each refitted
        through the same folds and nested choice; p-values with the +1 correction.
    trial_of_bout : ndarray of shape (n_bouts,), optional
    seed : int, default=0

    Returns
    -------
    BoutDecode

    References
    ----------
    Cox DR (1958). The regression analysis of binary sequences. J R Stat Soc B 20:215-242.
    Hanley JA, McNeil BJ (1982). The meaning and use of the area under a receiver operating
    characteristic (ROC) curve. Radiology 143:29-36. doi:10.1148/radiology.143.1.7063747
    Phipson B, Smyth GK (2010). Stat Appl Genet Mol Biol 9:39 (permutation p-values).
    """
    left = np.asarray(left).astype(bool)
    onset_s = np.asarray(onset_s, dtype=np.float64)
    lags_s = np.asarray(lags_s, dtype=np.float64).ravel()
    if onset_s.shape != left.shape:
        raise InputError(f"decode_bouts: {onset_s.size} onsets but {left.size} labels")
    if not window_s > 0:
        raise InputError(f"bout window: expected a positive length in s, got {window_s}")
    keep = np.flatnonzero(_usable(onset_s, lags_s, window_s, times_s))
    if keep.size < 2 * n_splits or np.unique(left[keep]).size < 2:
        raise InputError(f"decode_bouts: {keep.size} usable bouts "
                         f"({int(left[keep].sum())} left); need at least {2 * n_splits} with "
                         f"both directions")
    yl = left[keep]
    groups = None if trial_of_bout is None else np.asarray(trial_of_bout)[keep]
    clf = _default_classifier(gap) if classifier is None else classifier
    folds = list(make_splitter(n_splits, gap=gap, groups=groups).split(yl, groups=groups))
    perms, _ = _null_indices(yl.size, n_null, trial_ids=groups, min_shift=1, seed=seed)
    if groups is None and n_null:
        gen = np.random.default_rng(seed)
        perms = np.array([gen.permutation(yl.size) for _ in range(n_null)])
    reg = None
    if angle is not None:
        reg = RidgePathCV(cv=BlockedKFold(3, gap=gap)) if regressor is None else regressor
        ya = np.asarray(angle, dtype=np.float64)[keep]

    n_lags, n_folds = lags_s.size, len(folds)
    auc = np.full((n_folds, n_lags), np.nan)
    bacc = np.full_like(auc, np.nan)
    chosen_c = np.full_like(auc, np.nan)
    null_auc = np.empty((perms.shape[0], n_lags))
    null_bacc = np.empty_like(null_auc)
    confusion = np.zeros((n_lags, 2, 2), dtype=np.int64)
    r2 = np.full((n_folds, n_lags), np.nan)
    small = keep.size * X.shape[1] <= SINGLE_THREAD_SIZE
    with threadpool_limits(limits=1) if small else contextlib.nullcontext():
        for j, lag in enumerate(lags_s):
            F = bout_features(X, onset_s[keep], lag, times_s=times_s, window_s=window_s,
                              plane=plane, feature=feature)
            for f, (tr, te) in enumerate(folds):
                fit = _fit_score(clf, F, yl, tr, te)
                if fit is None:
                    continue
                auc[f, j], bacc[f, j], pred, chosen_c[f, j] = fit
                # rows true, columns predicted; left first
                np.add.at(confusion[j], (1 - yl[te].astype(int), 1 - pred.astype(int)), 1)
            for i, p in enumerate(perms):
                scores = [_fit_score(clf, F, yl[p], tr, te) for tr, te in folds]
                null_auc[i, j] = np.nanmean([s[0] if s else np.nan for s in scores])
                null_bacc[i, j] = np.nanmean([s[1] if s else np.nan for s in scores])
            if reg is not None:
                for f, (tr, te) in enumerate(folds):
                    pred_a = clone(reg).fit(F[tr], ya[tr]).predict(F[te])
                    r2[f, j] = r2_columns(ya[te, None], pred_a[:, None])[0]
    angle_curve = None if reg is None else _curve("r2", lags_s, r2)
    angle_curve = None if reg is None else _curve("r2", lags_s, r2)
    auc_curve = _curve("roc_auc", lags_s, auc, null_auc if n_null else None)
    best = int(np.argmin(np.abs(lags_s - auc_curve.best_lag_s)))
    return BoutDecode(auc_curve,
                      _curve("balanced_accuracy", lags_s, bacc, null_bacc if n_null else None),
                      angle_curve, int(keep.size), int(yl.sum()), float(window_s), feature,
                      confusion[best], chosen_c)


def _fit_score(clf, F, labels, tr, te):
    """ROC AUC, balanced accuracy, predictions and chosen C of one fold (None: a class is
    missing from the training or test bouts)."""
    if np.unique(labels[tr]).size < 2 or np.unique(labels[te]).size < 2:
        return None
    model = clone(clf).fit(F[tr], labels[tr])
    s = (model.decision_function(F[te]) if hasattr(model, "decision_function")
         else model.predict_proba(F[te])[:, 1])
    pred = np.asarray(model.predict(F[te]))
    return (roc_auc_score(labels[te], s), balanced_accuracy_score(labels[te], pred), pred,
            float(getattr(model, "C_", np.nan)))
