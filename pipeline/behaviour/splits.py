"""Split points: where a trajectory leaves the average direction of the remaining targets.

Method: a change-point segmentation of the heading in mean direction. While the set ``R`` of
remaining targets is followed, the heading is expected along the bisector of ``R`` (circular
mean of the directions to its targets); after a split that drops target ``j`` it is expected
along the bisector of ``R - {j}`` (with one target left: straight at it). For every order in
which targets can be dropped, and every number of splits, the split samples minimising the
von Mises-type loss ``sum (1 - cos(heading - expected direction)) * dt`` (seconds) are found
exactly by dynamic programming over prefix minima (O(n) per level; samples before the
trial's first turn carry the rig's reset heading and are left out); each split costs
``penalty_s``, and the cheapest model wins. A found split is moved back to the start of the
heading change it falls in (the bout that turns the animal away; at most ``snap_max_s``),
because the heading of a freely steering animal only changes in bouts.

The subtended angle at the split is the arc spanned by the targets of ``R`` seen from the
animal (:func:`pipeline.behaviour.geometry.target_set_geometry`). An animal moving in bouts
reveals a decision only at the bout after the angle crossed its threshold, so the angle is also
taken at the start of the movement before the split; the crossing lies between the two, and
the population median of their midpoints (``subtended_mid_rad``), with a percentile-bootstrap
confidence interval, estimates the critical angle.
"""

from __future__ import annotations

import itertools
from typing import NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.stats import bootstrap

from pipeline.behaviour.geometry import circular_mean, target_set_geometry

__all__ = ["detect_splits", "critical_angle", "trajectory_density", "TrajectoryDensity",
           "SPLIT_COLUMNS"]

SPLIT_COLUMNS = ("trial", "level", "split_index", "split_s", "x_mm", "y_mm", "subtended_rad",
                 "subtended_prev_rad", "subtended_mid_rad", "dropped", "chosen", "n_remaining")


def _turn_start(turning: NDArray[np.bool_], i: int, lo: int, n_snap: int) -> int:
    """Last sample before the heading change that holds (or just precedes) sample ``i``."""
    floor = max(lo, i - n_snap)
    j = i
    while j > floor and not turning[j]:
        j -= 1
    if not turning[j]:
        return i
    while j > floor and turning[j - 1]:
        j -= 1
    if j == floor and j > lo:
        return i                       # steering without pauses: no bout to snap to
    return max(j - 1, lo)


def _previous_move_start(moving: NDArray[np.bool_], i: int, lo: int, n_max: int) -> int:
    """Start of the last movement (run of moving samples) ending at or before sample ``i``."""
    floor = max(lo, i - n_max)
    j = i
    while j > floor and not moving[j]:
        j -= 1
    while j > floor and moving[j]:
        j -= 1
    return i if (j == floor and j > lo) else j   # moving without pauses: no bracket


def _segment_costs(direc: NDArray[np.float64], h: NDArray[np.float64], sets: list[list[int]],
                   step_s: float, weight: NDArray[np.float64]) -> list[NDArray[np.float64]]:
    """Cumulative loss (length m+1) of following the bisector of each set in ``sets``."""
    out = []
    for members in sets:
        bis = circular_mean(direc[:, members], axis=1)
        loss = np.where(np.isfinite(bis), 1.0 - np.cos(h - bis), 2.0) * step_s * weight
        out.append(np.concatenate(([0.0], np.cumsum(loss))))
    return out


def _best_segmentation(cum: list[NDArray[np.float64]]) -> tuple[float, list[int]]:
    """Least total loss of consecutive segments following ``cum[0], cum[1], ...`` in order,
    covering every sample, and the sample where each segment after the first starts."""
    m = cum[0].size - 1
    best = cum[0].copy()             # best[c]: segments 0..l cover samples [0, c)
    back: list[NDArray[np.int64]] = []
    for c_l in cum[1:]:
        a = best - c_l
        arg = np.zeros(m + 1, dtype=np.int64)
        run = np.minimum.accumulate(a)
        # index of the running minimum: the last position where the running min was set
        is_new = np.concatenate(([True], a[1:] < run[:-1]))
        arg = np.maximum.accumulate(np.where(is_new, np.arange(m + 1), 0))
        best = c_l + run
        back.append(arg)
    cuts = []
    c = m
    for arg in reversed(back):
        c = int(arg[c])
        cuts.append(c)
    return float(best[m]), cuts[::-1]


def detect_splits(t_s: ArrayLike, x_mm: ArrayLike, y_mm: ArrayLike, heading_rad: ArrayLike,
                  target_x_mm: ArrayLike, target_y_mm: ArrayLike, trial: ArrayLike, *,
                  target_names: tuple[str, ...] | None = None, resample_s: float = 0.1,
                  penalty_s: float = 0.1, snap_max_s: float = 0.5, bracket_max_s: float = 5.0,
                  still_rad: float = 1e-6, still_mm: float = 1e-6) -> pd.DataFrame:
    """Detect the split sequence of every trial (method in the module notes).

    Parameters
    ----------
    t_s, x_mm, y_mm, heading_rad, trial : array_like of shape (n,)
        Behaviour samples (trial -1 between trials).
    target_x_mm, target_y_mm : array_like of shape (n, n_targets)
        Target positions, NaN while absent. The targets present at a trial's first sample
        (or, if none, at any of its samples) are that trial's targets.
    target_names : tuple of str, optional
        Names for the ``dropped``/``chosen`` columns; default the column index as a string.
    resample_s : float, default=0.1
        The segmentation runs on one sample per ``resample_s`` (bouts last 0.2-0.35 s).
    penalty_s : float, default=0.1
        Loss a split must save, in seconds of full (90 degree) disagreement: about 0.75 s of
        heading 30 degrees away from the model without the split.
    snap_max_s : float, default=0.5
        Longest move back to the start of the heading change holding the split.
    bracket_max_s : float, default=5.0
        How far back the bracket's lower end (start of the animal's previous movement) may lie.
    still_rad, still_mm : float, default=1e-6
        Heading / position steps at most this large count as "not turning" / "not moving".

    Returns
    -------
    pandas.DataFrame
        One row per split (``SPLIT_COLUMNS``): trial, level (1 = first split), sample index and
        time, position, subtended angle of the remaining targets at the split, at the start of
        the movement before it (the crossing happened between the two: an animal that moves
        in bouts shows a decision only at the next bout) and their mean, the dropped
        target, the chosen target (set when one target is left, else empty) and the number of
        targets remaining before the split. Trials without a split have no row.

    References
    ----------
    Hinkley, D. V. (1970). Inference about the change-point in a sequence of random variables.
    Biometrika 57(1), 1-17. DOI:10.1093/biomet/57.1.1.
    Lombard, F. (1986). The change-point problem for angular data: a nonparametric approach.
    Technometrics 28(4), 391-397. DOI:10.1080/00401706.1986.10488161.
    Jackson, B. et al. (2005). An algorithm for optimal partitioning of data on an interval.
    IEEE Signal Processing Letters 12(2), 105-108 (penalised optimal segmentation by dynamic
    programming). DOI:10.1109/LSP.2001.838216.
    """
    t = np.asarray(t_s, dtype=np.float64)
    x, y = np.asarray(x_mm, dtype=np.float64), np.asarray(y_mm, dtype=np.float64)
    h = np.asarray(heading_rad, dtype=np.float64)
    tx = np.atleast_2d(np.asarray(target_x_mm, dtype=np.float64).T).T
    ty = np.atleast_2d(np.asarray(target_y_mm, dtype=np.float64).T).T
    tr = np.asarray(trial)
    k = tx.shape[1]
    names = target_names or tuple(str(i) for i in range(k))
    rows: list[dict[str, object]] = []
    dt = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    step = max(1, int(round(resample_s / dt)))
    n_snap = int(round(snap_max_s / dt))
    turning = np.abs(np.diff(np.unwrap(h), prepend=h[:1])) > still_rad
    moving = np.hypot(np.diff(x, prepend=x[:1]), np.diff(y, prepend=y[:1])) > still_mm
    n_bracket = int(round(bracket_max_s / dt))
    for tid in np.unique(tr[tr >= 0]):
        idx = np.flatnonzero(tr == tid)
        sub = idx[::step]
        direc = np.arctan2(ty[sub] - y[sub, None], tx[sub] - x[sub, None])   # world frame
        vis = np.isfinite(direc)
        first = vis[0] if vis[0].any() else vis.any(axis=0)
        r0 = [int(j) for j in np.flatnonzero(first)]
        # before its first turn the heading is the trial's reset heading, not a choice
        steered = np.flatnonzero(turning[idx[1:]]) + 1       # (the first sample is the reset)
        weight = (sub >= (idx[steered[0]] if steered.size else idx[-1] + 1)).astype(np.float64)
        best: tuple[float, list[int], list[int]] = (_best_segmentation(
            _segment_costs(direc, h[sub], [r0], step * dt, weight))[0], [], [])
        for order in itertools.permutations(r0, max(len(r0) - 1, 0)):
            sets = [r0]
            for j in order:
                sets.append([m for m in sets[-1] if m != j])
            costs = _segment_costs(direc, h[sub], sets, step * dt, weight)
            for n_lv in range(1, len(order) + 1):
                loss, cuts = _best_segmentation(costs[:n_lv + 1])
                loss += penalty_s * n_lv
                if loss < best[0] - 1e-12:
                    best = (loss, cuts, list(order[:n_lv]))
        _, cuts, dropped = best
        remaining = list(r0)
        for level, (c, j) in enumerate(zip(cuts, dropped, strict=True), start=1):
            c = max(c, int(np.argmax(weight > 0)))     # ties in the unweighted start
            i = _turn_start(turning, int(sub[min(c, sub.size - 1)]), int(idx[0]), n_snap)
            i_prev = _previous_move_start(moving, i, int(idx[0]), n_bracket)
            at = np.array([i, i_prev])
            d_i = np.arctan2(ty[at] - y[at, None], tx[at] - x[at, None])
            keep = np.zeros((2, k), dtype=bool)
            keep[:, remaining] = True
            sub_rad = target_set_geometry(d_i, present=keep).subtended_rad
            left = [m for m in remaining if m != j]
            rows.append({"trial": int(tid), "level": level, "split_index": i,
                         "split_s": float(t[i]), "x_mm": float(x[i]), "y_mm": float(y[i]),
                         "subtended_rad": float(sub_rad[0]),
                         "subtended_prev_rad": float(sub_rad[1]),
                         "subtended_mid_rad": float(0.5 * (sub_rad[0] + sub_rad[1])),
                         "dropped": names[j],
                         "chosen": names[left[0]] if len(left) == 1 else "",
                         "n_remaining": len(remaining)})
            remaining = left
    return pd.DataFrame(rows, columns=list(SPLIT_COLUMNS))


def critical_angle(subtended_rad: ArrayLike, *, n_resamples: int = 2000,
                   confidence_level: float = 0.95, seed: int = 0) -> dict[str, float]:
    """Population critical angle: median subtended angle at the splits, with a bootstrap CI.

    Parameters
    ----------
    subtended_rad : array_like of shape (n_splits,)
        Subtended angle at each split (NaN ignored).
    n_resamples : int, default=2000
    confidence_level : float, default=0.95
    seed : int, default=0
        Seed of the :func:`numpy.random.default_rng` used for resampling.

    Returns
    -------
    dict
        ``estimate_rad``, ``ci_low_rad``, ``ci_high_rad``, ``n`` (NaN CI with fewer than 2).

    References
    ----------
    Efron, B. & Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*. Chapman & Hall,
    chapter 13 (percentile interval). DOI:10.1201/9780429246593. Computed with
    :func:`scipy.stats.bootstrap` (``method="percentile"``).
    """
    a = np.asarray(subtended_rad, dtype=np.float64)
    a = a[np.isfinite(a)]
    if a.size == 0:
        return {"estimate_rad": np.nan, "ci_low_rad": np.nan, "ci_high_rad": np.nan, "n": 0}
    est = float(np.median(a))
    if a.size < 2 or np.all(a == a[0]):
        return {"estimate_rad": est, "ci_low_rad": est if a.size > 1 else np.nan,
                "ci_high_rad": est if a.size > 1 else np.nan, "n": int(a.size)}
    res = bootstrap((a,), np.median, n_resamples=n_resamples, method="percentile",
                    confidence_level=confidence_level, rng=np.random.default_rng(seed))
    return {"estimate_rad": est, "ci_low_rad": float(res.confidence_interval.low),
            "ci_high_rad": float(res.confidence_interval.high), "n": int(a.size)}


class TrajectoryDensity(NamedTuple):
    """Folded, rotated trajectory histogram (see :func:`trajectory_density`)."""

    counts: NDArray[np.float64]
    """(n_y_bins, n_x_bins) fraction of samples per bin (rows = y, for image display)."""
    x_edges_mm: NDArray[np.float64]
    """lateral |x| bin edges (mm), from 0."""
    y_edges_mm: NDArray[np.float64]
    """forward bin edges (mm); the targets' centre of mass lies on +y."""
    n_trials: int


def trajectory_density(x_mm: ArrayLike, y_mm: ArrayLike, target_x_mm: ArrayLike,
                       target_y_mm: ArrayLike, trial: ArrayLike, *, bin_mm: float = 0.5,
                       extent_mm: tuple[float, float, float] | None = None
                       ) -> TrajectoryDensity:
    """2-D histogram of trajectories in a common frame, folded about the midline.

    Each trial is translated so it starts at the origin and rotated so the centre of mass of
    the targets present at its first sample lies ahead on +y; then ``x -> |x|`` folds left and
    right choices together.

    Parameters
    ----------
    x_mm, y_mm, trial : array_like of shape (n,)
    target_x_mm, target_y_mm : array_like of shape (n, n_targets)
    bin_mm : float, default=0.5
    extent_mm : (x_max, y_min, y_max), optional
        Histogram extent; default from the data.

    Returns
    -------
    TrajectoryDensity
    """
    x, y = np.asarray(x_mm, dtype=np.float64), np.asarray(y_mm, dtype=np.float64)
    tx = np.atleast_2d(np.asarray(target_x_mm, dtype=np.float64).T).T
    ty = np.atleast_2d(np.asarray(target_y_mm, dtype=np.float64).T).T
    tr = np.asarray(trial)
    valid = tr >= 0
    ids, inverse = np.unique(tr[valid], return_inverse=True)
    sel = np.flatnonzero(valid)
    _, first_pos = np.unique(inverse, return_index=True)
    first = sel[first_pos]
    cx = np.nanmean(tx[first], axis=1)
    cy = np.nanmean(ty[first], axis=1) if tx.shape[1] else np.zeros(ids.size)
    ang = np.arctan2(cy - y[first], cx - x[first])
    rot = np.pi / 2 - ang[inverse]
    dx, dy = x[sel] - x[first][inverse], y[sel] - y[first][inverse]
    c, s = np.cos(rot), np.sin(rot)
    fx = np.abs(c * dx - s * dy)
    fy = s * dx + c * dy
    if extent_mm is None:
        x_max = max(float(fx.max(initial=0.0)), bin_mm)
        y_min, y_max = float(fy.min(initial=0.0)), max(float(fy.max(initial=0.0)), bin_mm)
    else:
        x_max, y_min, y_max = extent_mm
    x_edges = np.arange(0.0, x_max + bin_mm, bin_mm)
    y_edges = np.arange(np.floor(y_min / bin_mm) * bin_mm, y_max + bin_mm, bin_mm)
    counts, _, _ = np.histogram2d(fx, fy, bins=(x_edges, y_edges))
    total = counts.sum()
    return TrajectoryDensity((counts / total if total else counts).T, x_edges, y_edges,
                             int(ids.size))
