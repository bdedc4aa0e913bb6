"""Bearing tuning of single cells, target by target, before and after the split.

Two views of each cell, per target and epoch:

* descriptive: an occupancy-normalised tuning curve against the target's egocentric bearing,
  the preferred bearing and selectivity of its mean resultant vector, and a von Mises fit;
* inferential: a linear model of the cell's activity on the bearing terms of *every* target
  together plus nuisance terms (:mod:`pipeline.analysis.permtest`; the stage builds the terms
  with :mod:`pipeline.analysis.regressors`): the joint test of all targets, each target's
  unique explained variance, and a permutation null (trials swapped at the split, whole
  trials re-concatenated, or circular shifts) that keeps each cell's autocorrelation,
  computed as GEMMs;
* attribution: which target a significant cell follows, from each target's alone R^2 over
  the whole session and within trials (:func:`within_trial_alone_r2`); the stage names a
  target only when the two agree and marks the cell ambiguous otherwise.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy.optimize import curve_fit

from pipeline.analysis.permtest import (
    PermutationBases,
    UniqueVariance,
    _orth,
    alone_bases,
    bearing_design,
    permutation_bases,
    unique_variance_test,
)
from pipeline.analysis.regressors import window_epochs
from pipeline.analysis.stats import bh_qvalues, binomial_interval, circular_mean, resultant_length
from pipeline.errors import InputError

__all__ = [
    "EPOCHS",
    "epoch_masks",
    "tuning_curves",
    "curve_preference",
    "VonMisesFit",
    "fit_von_mises",
    "bearing_design",
    "UniqueVariance",
    "unique_variance_test",
    "PermutationBases",
    "permutation_bases",
    "tuned_flags",
    "population_summary",
    "within_trial_alone_r2",
    "trial_indicators",
]

EPOCHS = ("pre", "between", "post")


def epoch_masks(trial_ids, splits, *, pre, post):
    """Samples of each epoch around the split(s) of every trial.

    Parameters
    ----------
    trial_ids : ndarray of shape (n_samples,)
        Trial of each sample (samples of a trial contiguous).
    splits : mapping or ndarray of shape (n_trials, n_splits)
        Split sample index per trial, keyed (mapping) or ordered (array) by the sorted unique
        trial ids; NaN or negative marks a missing split. With two splits (three targets)
        there is a ``between`` epoch.
    pre, post : int
        Samples before the first split and after the last split.

    Returns
    -------
    dict of str to ndarray of bool
        ``pre``, ``between`` (only with two splits) and ``post``; trials without a split
        contribute nothing.
    """
    trial_ids = np.asarray(trial_ids)
    trials = np.unique(trial_ids)
    if isinstance(splits, dict):
        rows = [np.atleast_1d(np.asarray(splits.get(t, np.nan), dtype=np.float64))
                for t in trials]
        width = max(r.size for r in rows)
        sp = np.full((trials.size, width), np.nan)
        for i, r in enumerate(rows):
            sp[i, : r.size] = r
    else:
        sp = np.asarray(splits, dtype=np.float64).reshape(len(splits), -1)
        if sp.shape[0] != trials.size:
            raise InputError(f"splits: expected one row per trial ({trials.size} trials), got "
                             f"{sp.shape[0]} rows")
    # the same windows as the stage's time-based labels, with sample indices as times
    label = window_epochs(np.arange(trial_ids.size, dtype=np.float64), trial_ids,
                          {t: row[np.isfinite(row) & (row >= 0)]
                           for t, row in zip(trials, sp, strict=True)},
                          pre_s=pre, post_s=post)
    epochs = EPOCHS if sp.shape[1] >= 2 else ("pre", "post")
    return {k: label == k for k in epochs}


def _bin_edges(n_bins):
    return np.linspace(-np.pi, np.pi, n_bins + 1)


def tuning_curves(activity, bearing_rad, *, n_bins=12, min_count=1):
    """Occupancy-normalised mean activity per bearing bin.

    Parameters
    ----------
    activity : ndarray of shape (n_samples, n_cells)
    bearing_rad : ndarray of shape (n_samples,)
        Egocentric bearing of one target, in (-pi, pi].
    n_bins : int, default=12
    min_count : int, default=1
        Bins with fewer samples are NaN.

    Returns
    -------
    curves : ndarray of shape (n_bins, n_cells)
    counts : ndarray of shape (n_bins,)
    centres_rad : ndarray of shape (n_bins,)
    """
    b = np.asarray(bearing_rad, dtype=np.float64)
    edges = _bin_edges(n_bins)
    which = np.clip(np.searchsorted(edges, b, side="right") - 1, 0, n_bins - 1)
    ok = np.isfinite(b)
    onehot = np.zeros((b.size, n_bins), dtype=np.float64)
    onehot[np.flatnonzero(ok), which[ok]] = 1.0
    counts = onehot.sum(axis=0)
    sums = onehot.T @ np.asarray(activity, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        curves = sums / counts[:, None]
    curves[counts < max(min_count, 1)] = np.nan
    return curves, counts, 0.5 * (edges[:-1] + edges[1:])


def curve_preference(curves, centres_rad):
    """Preferred bearing and selectivity from the curve-weighted mean resultant vector.

    Weights are each curve minus its minimum over occupied bins (so a constant offset does not
    dilute selectivity); empty bins weigh nothing.

    Returns
    -------
    preferred_rad, selectivity : ndarray of shape (n_cells,)

    References
    ----------
    Zar JH (2010). Biostatistical Analysis, 5th ed., chapter 26 (grouped data).
    """
    c = np.asarray(curves, dtype=np.float64)
    all_nan = np.all(~np.isfinite(c), axis=0)
    low = np.nanmin(np.where(all_nan[None, :], 0.0, c), axis=0)
    w = np.nan_to_num(c - low, nan=0.0)
    ang = np.broadcast_to(np.asarray(centres_rad)[:, None], w.shape)
    pref = circular_mean(ang, weights=w, axis=0)
    sel = resultant_length(ang, weights=w, axis=0)
    return np.where(all_nan, np.nan, pref), np.nan_to_num(sel, nan=0.0)


@dataclasses.dataclass
class VonMisesFit:
    """Least-squares fit of ``amplitude * exp(kappa * (cos(theta - mu) - 1)) + baseline``."""

    mu_rad: float
    kappa: float
    amplitude: float
    baseline: float
    mu_se_rad: float
    kappa_se: float
    success: bool


def _vm(theta, mu, kappa, amplitude, baseline):
    return amplitude * np.exp(kappa * (np.cos(theta - mu) - 1.0)) + baseline


def fit_von_mises(centres_rad, values, *, max_kappa=50.0):
    """Fit a von Mises-shaped tuning curve by bounded nonlinear least squares.

    The curve is written with ``exp(kappa (cos - 1))`` so ``amplitude`` is the peak above
    ``baseline`` (the same family as ``a exp(kappa cos) + b`` with ``a = amplitude e^-kappa``).
    Standard errors come from the Jacobian at the optimum (``scipy.optimize.curve_fit``).

    Parameters
    ----------
    centres_rad : ndarray of shape (n_bins,)
    values : ndarray of shape (n_bins,)
        A tuning curve (NaN bins ignored).
    max_kappa : float, default=50.0

    Returns
    -------
    VonMisesFit

    References
    ----------
    Mardia KV, Jupp PE (2000). Directional Statistics. Wiley, section 3.5.4 (von Mises).
    Swindale NV (1998). Orientation tuning curves: empirical description and estimation of
    parameters. Biol Cybern 78:45-56. doi:10.1007/s004220050411
    """
    x = np.asarray(centres_rad, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    ok = np.isfinite(v)
    x, v = x[ok], v[ok]
    if x.size < 5:
        return VonMisesFit(np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, False)
    mu0 = float(circular_mean(x, weights=v - v.min())) if np.ptp(v) > 0 else 0.0
    p0 = [mu0, 1.0, max(float(np.ptp(v)), 1e-9), float(v.min())]
    lower = [mu0 - 2 * np.pi, 0.0, 0.0, -np.inf]
    upper = [mu0 + 2 * np.pi, max_kappa, np.inf, np.inf]
    try:
        popt, pcov = curve_fit(_vm, x, v, p0=p0, bounds=(lower, upper), maxfev=5000)
    except (RuntimeError, ValueError):
        return VonMisesFit(np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, False)
    se = np.sqrt(np.clip(np.diag(pcov), 0, None)) if np.all(np.isfinite(pcov)) else \
        np.full(4, np.nan)
    mu = float(np.angle(np.exp(1j * popt[0])))
    return VonMisesFit(mu, float(popt[1]), float(popt[2]), float(popt[3]), float(se[0]),
                       float(se[1]), True)


def trial_indicators(trial):
    """One 0/1 column per trial (sorted trial ids): per-trial intercepts for a design."""
    trial = np.asarray(trial)
    return (trial[:, None] == np.unique(trial)[None, :]).astype(np.float64)


def within_trial_alone_r2(activity, columns, *, trial, nuisance=None):
    """Each target's alone R^2 beyond the nuisance and one intercept per trial.

    The same statistic as ``UniqueVariance.alone_r2`` with trial indicators added to the
    nuisance, so only covariation *within* trials counts. Targets whose bearings differ
    mostly between trials (which target was chosen, on which side it lay) explain the same
    trial-to-trial differences of a cell; within a trial their bearings still move apart,
    which is what this compares. No permutations (an attribution aid, not a test).

    Parameters
    ----------
    activity : ndarray of shape (n_samples, n_cells)
    columns : ndarray of shape (n_samples, n_targets, m)
        Target columns, as for :func:`unique_variance_test`.
    trial : ndarray of shape (n_samples,)
        Trial of each sample.
    nuisance : ndarray of shape (n_samples, q), optional

    Returns
    -------
    ndarray of shape (n_targets, n_cells)
        Explained sum of squares of target ``k``'s columns after the nuisance and the trial
        intercepts, over the activity's total sum of squares about its mean.
    """
    trial = np.asarray(trial)
    y = np.asarray(activity, dtype=np.float64)
    cols = np.asarray(columns, dtype=np.float64)
    n = trial.size
    if y.ndim != 2 or y.shape[0] != n or cols.ndim != 3 or cols.shape[0] != n:
        raise InputError(f"within_trial_alone_r2: expected activity ({n}, n_cells) and columns "
                         f"({n}, n_targets, m) for {n} trial labels, got {y.shape} and "
                         f"{cols.shape}")
    fe = trial_indicators(trial)
    z = fe if nuisance is None else np.concatenate(
        [fe, np.asarray(nuisance, dtype=np.float64).reshape(n, -1)], axis=1)
    q = _orth(z)                                  # the trial indicators span the intercept
    yc = y - y.mean(axis=0)
    sst = np.sum(yc * yc, axis=0)
    out = np.zeros((cols.shape[1], y.shape[1]))
    for k, w in enumerate(alone_bases(cols, q)):
        with np.errstate(invalid="ignore", divide="ignore"):
            out[k] = np.where(sst > 0, np.sum((w.T @ y) ** 2, axis=0) / sst, 0.0)
    return out


def tuned_flags(p, *, q=0.05):
    """BH q-values across cells (last axis) and the tuned flags ``q_value <= q``.

    Parameters
    ----------
    p : ndarray of shape (..., n_cells)
        One family per leading index (target, epoch).

    References
    ----------
    Benjamini Y, Hochberg Y (1995). J R Stat Soc B 57:289-300.
    """
    qv = bh_qvalues(p, axis=-1)
    return qv, np.isfinite(qv) & (qv <= q)


def population_summary(tuned, *, targets, epochs, confidence=0.95):
    """Fractions of tuned cells per target and epoch, and cells that switch across the split.

    Parameters
    ----------
    tuned : ndarray of bool, shape (n_targets, n_epochs, n_cells)
    targets, epochs : sequence of str

    Returns
    -------
    rows : list of dict
        ``target, epoch, n_tuned, n_cells, fraction, ci_low, ci_high`` (Wilson interval).
    switches : dict
        ``switched`` (tuned before and after, to different target sets), ``gained``, ``lost``
        and ``kept`` counts, comparing the first and the last epoch.
    """
    tuned = np.asarray(tuned, dtype=bool)
    n_cells = tuned.shape[-1]
    rows = []
    for i, t in enumerate(targets):
        for j, e in enumerate(epochs):
            k = int(tuned[i, j].sum())
            lo, hi = binomial_interval(k, n_cells, confidence=confidence)
            rows.append({"target": t, "epoch": e, "n_tuned": k, "n_cells": n_cells,
                         "fraction": k / n_cells if n_cells else np.nan,
                         "ci_low": float(lo), "ci_high": float(hi)})
    before, after = tuned[:, 0], tuned[:, -1]
    any_b, any_a = before.any(axis=0), after.any(axis=0)
    same = np.all(before == after, axis=0)
    switches = {"switched": int(np.sum(any_b & any_a & ~same)),
                "kept": int(np.sum(any_b & any_a & same)),
                "gained": int(np.sum(~any_b & any_a)), "lost": int(np.sum(any_b & ~any_a)),
                "from_epoch": epochs[0], "to_epoch": epochs[-1]}
    return rows, switches
