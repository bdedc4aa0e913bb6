"""Split points: where a trajectory leaves the average direction of the remaining targets.

Method: a change-point segmentation of steering, one observation per movement. An animal that
moves in bouts changes heading only during its movements (runs of samples whose heading or
position changes; a movement longer than ``step_max_s``, as of an animal steering without
pauses, is cut into ``resample_s`` windows). Each movement turns the heading by ``turn``; under
a proportional steering model (common practice) it corrects a part ``gain`` of the heading
error to the goal direction seen at its start, ``turn = gain * wrap(goal - heading) + noise``.
While the set ``R`` of remaining targets is followed the goal is the bisector of ``R``
(circular mean of the directions to its targets); after a split that drops target ``j`` it is
the bisector of ``R - {j}`` (with one target left: straight at it). For every order in which
targets can be dropped and every number of splits, the first movement of each new goal (the
*committing* movement) is found exactly by dynamic programming over prefix minima (O(m) per
level for m movements), minimising the von Mises-type loss ``sum (1 - cos(turn - gain *
wrap(goal - heading)))``; each split costs ``penalty``, and the cheapest model wins. The gain
is fitted by least squares on the movements under their assigned goals, alternating with the
segmentation (starting from 1, i.e. the heading after each movement compared with the goal).

When was the decision taken? The committing movement shows it, but it starts after a pause:
the view of static targets changes only while the animal moves, so the geometry that
triggered the decision was reached during the *previous* movement. The split is placed in
the middle of that movement (``split_s``; its onset and the committing movement's onset
bracket the decision, ``commit_s`` keeps the latter). The subtended angle (the arc spanned by
the targets of ``R`` seen from the animal, :func:`pipeline.behaviour.geometry.
target_set_geometry`) is read off at the start of the previous movement
(``subtended_prev_rad``) and at the committing movement's onset (``subtended_post_rad``).
The crossing lies between the two; the population critical angle is the angle inside the
most of these brackets (:func:`critical_angle_brackets`, with a paired percentile bootstrap),
which a split dated a movement off cannot pull the way it pulls the median of the midpoints
(``subtended_mid_rad``, kept in the table; :func:`critical_angle` is that simpler estimator).

Two passes (empirical Bayes). The steering alone dates a split only as well as one
movement's turn tells the two goals apart: while the targets are far the old and new
bisectors differ by 15-25 degrees, about one turn-noise sd, so a few noisy turns can move a
change point by several movements. The first pass uses the trajectory alone and gives the
critical angle. The second (:func:`crossing_prior`, ``prior=`` here) adds to each change
point the log-probability that a common threshold ``theta ~ N(centre, sd)`` -- centre the
first pass's critical angle, sd the spread of its bracket midpoints -- is first passed by
the subtended angle between the starts of the movement before and the committing movement
(the largest angle over every sample in between, so a moving target that swings the angle
up and back is seen), and that a set left unsplit never passed it; a uniform part ``eps``
keeps a split the angle does not explain. The log-probability enters the von Mises loss
divided by the residuals' concentration ``kappa`` (the loss is ``-log L / kappa``), so the
steering and the angle are weighed by their own measured noise, and a population whose
decisions scatter widely in angle gets a weak prior. The critical angle is still taken from
the first pass: the second leans on it, and its brackets would only echo it. The second
pass's ``subtended_*`` columns are therefore shrunk towards the population value by design.
"""

from __future__ import annotations

import itertools
from typing import NamedTuple

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy.stats import bootstrap, norm, vonmises

from pipeline.behaviour.geometry import circular_mean, target_set_geometry, wrap_angle

__all__ = ["detect_splits", "crossing_prior", "CrossingPrior", "critical_angle",
           "critical_angle_brackets", "SPLIT_COLUMNS"]

SPLIT_COLUMNS = ("trial", "level", "split_index", "split_s", "commit_s", "x_mm", "y_mm",
                 "subtended_rad", "subtended_prev_rad", "subtended_post_rad",
                 "subtended_mid_rad", "dropped", "chosen", "n_remaining")


class _Steps(NamedTuple):
    """The movements of one trial (sample indices into the log)."""

    start: NDArray[np.int64]      # last sample before the movement (its heading and position)
    end: NDArray[np.int64]        # last sample of the movement
    turn: NDArray[np.float64]     # heading change over the movement (rad)
    heading: NDArray[np.float64]  # heading at ``start``
    direc: NDArray[np.float64]    # (m, k) world direction to each target at ``start``
    r0: list[int]                 # the trial's targets
    direc_all: NDArray[np.float64]   # (n, k) direction to each target at every trial sample
    start_pos: NDArray[np.int64]     # position of each ``start`` among the trial's samples


def _movements(changing: NDArray[np.bool_], t: NDArray[np.float64], idx: NDArray[np.int64],
               step_max_s: float, resample_s: float
               ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """(start, end) sample indices of the movements of one trial; long ones cut into windows."""
    ch = changing[idx].copy()
    ch[0] = False                                     # the first sample is the trial's reset
    edge = np.diff(np.concatenate(([0], ch.view(np.int8), [0])))
    on, off = np.flatnonzero(edge == 1), np.flatnonzero(edge == -1) - 1
    starts, ends = [], []
    for a, b in zip(on, off, strict=True):            # a >= 1: the sample before is still
        if t[idx[b]] - t[idx[a - 1]] <= step_max_s:
            starts.append(a - 1)
            ends.append(b)
            continue
        cuts = np.searchsorted(t[idx[a - 1:b + 1]], t[idx[a - 1]] + np.arange(
            resample_s, t[idx[b]] - t[idx[a - 1]], resample_s)) + a - 1
        bounds = np.unique(np.concatenate(([a - 1], cuts, [b])))
        starts.extend(bounds[:-1].tolist())
        ends.extend(bounds[1:].tolist())
    return idx[np.asarray(starts, dtype=np.int64)], idx[np.asarray(ends, dtype=np.int64)]


def _trial_steps(idx: NDArray[np.int64], t: NDArray[np.float64], x: NDArray[np.float64],
                 y: NDArray[np.float64], h_unwrapped: NDArray[np.float64],
                 tx: NDArray[np.float64], ty: NDArray[np.float64],
                 changing: NDArray[np.bool_], step_max_s: float, resample_s: float) -> _Steps:
    start, end = _movements(changing, t, idx, step_max_s, resample_s)
    direc = np.arctan2(ty[start] - y[start, None], tx[start] - x[start, None])
    at0 = np.arctan2(ty[idx] - y[idx, None], tx[idx] - x[idx, None])
    vis = np.isfinite(at0)
    first = vis[0] if vis[0].any() else vis.any(axis=0)
    return _Steps(start, end, h_unwrapped[end] - h_unwrapped[start],
                  wrap_angle(h_unwrapped[start]), direc,
                  [int(j) for j in np.flatnonzero(first)], at0,
                  np.searchsorted(idx, start))


def _goal_errors(st: _Steps, sets: list[list[int]]) -> list[NDArray[np.float64]]:
    """Heading error to the bisector of each target set at every movement's start."""
    out = []
    for members in sets:
        bis = circular_mean(st.direc[:, members], axis=1)
        out.append(np.where(np.isfinite(bis), wrap_angle(bis - st.heading), np.nan))
    return out


def _best_segmentation(cum: list[NDArray[np.float64]],
                       start_cost: list[NDArray[np.float64]] | None = None
                       ) -> tuple[float, list[int]]:
    """Least total loss of consecutive segments following ``cum[0], cum[1], ...`` in order,
    covering every step, and the step where each segment after the first starts
    (``start_cost[l - 1][c]``: added when segment ``l`` starts at step ``c``)."""
    m = cum[0].size - 1
    best = cum[0].copy()             # best[c]: segments 0..l cover steps [0, c)
    back: list[NDArray[np.int64]] = []
    for lv, c_l in enumerate(cum[1:]):
        a = best - c_l
        if start_cost is not None:
            a = a + start_cost[lv]
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


class CrossingPrior(NamedTuple):
    """Prior on where a split falls (see :func:`crossing_prior`)."""

    centre_rad: float
    """Population critical angle: the subtended angle at which a set is split."""
    sd_rad: float
    """Spread of the per-split threshold around ``centre_rad``."""
    kappa: float
    """Von Mises concentration of the steering residuals (converts log-probabilities into
    loss units: ``loss = sum(1 - cos(residual))`` is ``-log L / kappa`` up to a constant)."""
    eps: float
    """Weight of a uniform component over the outcomes (a split not set by the angle)."""


def _crossing_cost(st: _Steps, members: list[int], prior: CrossingPrior) -> NDArray[np.float64]:
    """Loss-unit cost ``-log p / kappa`` of each outcome for the target set ``members``.

    Under a threshold ``theta ~ N(centre, sd)`` the committing movement is ``c`` when the
    subtended angle of the set first passes ``theta`` between the starts of movements ``c - 1``
    and ``c``: with ``M[c]`` the largest subtended angle of the trial's samples up to the
    start of movement ``c`` (``M[m]``: up to the trial's last sample),
    ``p(c) = Phi(M[c]) - Phi(M[c - 1])`` for ``c = 0..m``, and the set is never split with
    ``p = 1 - Phi(M[m])`` (the last element). Mixed with a uniform ``eps`` over the outcomes.
    """
    keep = np.zeros(st.direc_all.shape, dtype=bool)
    keep[:, members] = True
    sub = target_set_geometry(st.direc_all, present=keep).subtended_rad
    run = np.fmax.accumulate(np.where(np.isfinite(sub), sub, -np.inf))
    run = np.append(run[st.start_pos], run[-1])
    cdf = norm.cdf((run - prior.centre_rad) / prior.sd_rad)
    q = np.diff(np.concatenate(([0.0], cdf, [1.0])))
    p = (1.0 - prior.eps) * q + prior.eps / q.size
    return -np.log(p) / prior.kappa


def _segment(st: _Steps, gain: float, penalty: float, prior: CrossingPrior | None = None
             ) -> tuple[float, list[int], list[int], list[list[int]]]:
    """Cheapest drop order and change points of one trial: (loss, cuts, dropped, sets)."""
    r0 = st.r0

    def cum_loss(err: NDArray[np.float64]) -> NDArray[np.float64]:
        loss = np.where(np.isfinite(err), 1.0 - np.cos(st.turn - gain * err), 2.0)
        return np.concatenate(([0.0], np.cumsum(loss)))

    crossing: dict[tuple[int, ...], NDArray[np.float64]] = {}

    def cost(members: list[int]) -> NDArray[np.float64]:   # once per set: sets recur
        key = tuple(sorted(members))                         # across drop orders
        if key not in crossing:
            assert prior is not None
            crossing[key] = _crossing_cost(st, members, prior)
        return crossing[key]

    def never(members: list[int]) -> float:    # prior cost of no further split
        if prior is None or len(members) < 2:
            return 0.0
        return float(cost(members)[-1])

    base = cum_loss(_goal_errors(st, [r0])[0])
    best: tuple[float, list[int], list[int], list[list[int]]] = (
        float(base[-1]) + never(r0), [], [], [r0])
    for order in itertools.permutations(r0, max(len(r0) - 1, 0)):
        sets = [r0]
        for j in order:
            sets.append([m for m in sets[-1] if m != j])
        cums = [cum_loss(e) for e in _goal_errors(st, sets)]
        costs = None if prior is None else [cost(s_)[:-1] for s_ in sets[:-1]]
        for n_lv in range(1, len(order) + 1):
            loss, cuts = _best_segmentation(cums[:n_lv + 1],
                                            None if costs is None else costs[:n_lv])
            loss += penalty * n_lv + never(sets[n_lv])
            if loss < best[0] - 1e-12:
                best = (loss, cuts, list(order[:n_lv]), sets[:n_lv + 1])
    return best


def detect_splits(t_s: ArrayLike, x_mm: ArrayLike, y_mm: ArrayLike, heading_rad: ArrayLike,
                  target_x_mm: ArrayLike, target_y_mm: ArrayLike, trial: ArrayLike, *,
                  target_names: tuple[str, ...] | None = None, resample_s: float = 0.1,
                  penalty: float = 0.12, step_max_s: float = 0.6, n_gain_iter: int = 3,
                  still_rad: float = 1e-6, still_mm: float = 1e-6,
                  prior: CrossingPrior | None = None) -> pd.DataFrame:
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
        Window length into which a movement longer than ``step_max_s`` is cut.
    penalty : float, default=0.12
        Loss a split must save, in movements of full (90 degree) disagreement with the
        steering model: e.g. one movement 28 degrees off, or five 13 degrees off.
    step_max_s : float, default=0.6
        Longest movement taken as one step (bouts last 0.2-0.35 s).
    n_gain_iter : int, default=3
        Alternations of the segmentation and the steering gain's least-squares fit.
    still_rad, still_mm : float, default=1e-6
        Heading / position steps at most this large count as "not turning" / "not moving".
    prior : CrossingPrior, optional
        Second pass: weigh each change point by the probability that the subtended angle
        crossed the population threshold there (:func:`crossing_prior`); default none, the
        steering alone.

    Returns
    -------
    pandas.DataFrame
        One row per split (``SPLIT_COLUMNS``): trial, level (1 = first split), sample index and
        time of the split (the middle of the movement before the committing one), onset of the
        committing movement (``commit_s``), position at the split, subtended angle of the
        remaining targets at the split, at the start of the movement before the committing
        one and at the committing movement's onset (the crossing lies between the two) and
        their mean, the dropped target, the chosen target (set when one target is left, else
        empty) and the number of targets remaining before the split. Trials without a split
        have no row. ``attrs``: ``steering_gain``, ``steering_kappa`` (von Mises concentration
        of the steering residuals) and ``crossing_prior`` (the prior used, as a dict, or None).

    References
    ----------
    Hinkley, D. V. (1970). Inference about the change-point in a sequence of random variables.
    Biometrika 57(1), 1-17. DOI:10.1093/biomet/57.1.1.
    Lombard, F. (1986). The change-point problem for angular data: a nonparametric approach.
    Technometrics 28(4), 391-397. DOI:10.1080/00401706.1986.10488161.
    Jackson, B. et al. (2005). An algorithm for optimal partitioning of data on an interval.
    IEEE Signal Processing Letters 12(2), 105-108 (penalised optimal segmentation by dynamic
    programming). DOI:10.1109/LSP.2001.838216.
    Robbins, H. (1956). An empirical Bayes approach to statistics. Proc. Third Berkeley Symp.
    Math. Statist. Prob. 1, 157-163 (the second pass's prior, estimated from the first pass).
    """
    t = np.asarray(t_s, dtype=np.float64)
    x, y = np.asarray(x_mm, dtype=np.float64), np.asarray(y_mm, dtype=np.float64)
    h = np.asarray(heading_rad, dtype=np.float64)
    tx = np.atleast_2d(np.asarray(target_x_mm, dtype=np.float64).T).T
    ty = np.atleast_2d(np.asarray(target_y_mm, dtype=np.float64).T).T
    tr = np.asarray(trial)
    k = tx.shape[1]
    names = target_names or tuple(str(i) for i in range(k))
    hu = np.unwrap(h) if h.size else h
    turning = np.abs(np.diff(hu, prepend=hu[:1])) > still_rad
    moving = np.hypot(np.diff(x, prepend=x[:1]), np.diff(y, prepend=y[:1])) > still_mm
    trials = [(int(tid), np.flatnonzero(tr == tid)) for tid in np.unique(tr[tr >= 0])]
    steps = [(tid, idx, _trial_steps(idx, t, x, y, hu, tx, ty, turning | moving, step_max_s,
                                     resample_s)) for tid, idx in trials]
    fits, gain, res = _fit(steps, penalty, n_gain_iter, prior)
    out = _table(steps, fits, t, x, y, tx, ty, names)
    out.attrs["steering_gain"] = gain
    out.attrs["steering_kappa"] = (float(vonmises.fit(res, floc=0.0, fscale=1.0)[0])
                                   if res.size >= 2 else np.nan)
    out.attrs["crossing_prior"] = None if prior is None else prior._asdict()
    return out


_MAD_TO_SD = 1.4826   # median absolute deviation -> sd of a normal (common practice)
_Fit = tuple[float, list[int], list[int], list[list[int]]]


def _fit(steps: list[tuple[int, NDArray[np.int64], _Steps]], penalty: float, n_gain_iter: int,
         prior: CrossingPrior | None) -> tuple[list[_Fit], float, NDArray[np.float64]]:
    """Segment every trial, alternating with the gain's least-squares fit; also return the
    steering residuals (turn minus predicted turn) under the final segmentation."""
    fits: list[_Fit] = []
    res: list[NDArray[np.float64]] = []
    gain = 1.0
    for it in range(max(n_gain_iter, 1)):
        fits = [_segment(st, gain, penalty, prior) for _, _, st in steps]
        num = den = 0.0
        res = []
        for (_, _, st), (_, cuts, _, sets) in zip(steps, fits, strict=True):
            bounds = [0, *cuts, st.turn.size]
            errs = _goal_errors(st, sets)
            for lv in range(len(sets)):
                e = errs[lv][bounds[lv]:bounds[lv + 1]]
                tu = st.turn[bounds[lv]:bounds[lv + 1]]
                ok = np.isfinite(e)
                num += float(np.sum(tu[ok] * e[ok]))
                den += float(np.sum(e[ok] ** 2))
                res.append(wrap_angle(tu[ok] - gain * e[ok]))
        if it == n_gain_iter - 1:
            break
        gain = float(np.clip(num / den, 0.1, 2.0)) if den > 0 else 1.0
    return fits, gain, np.concatenate(res) if res else np.empty(0)


def crossing_prior(splits: pd.DataFrame, *, eps: float = 0.05) -> CrossingPrior | None:
    """Empirical-Bayes prior on the split angle from steering-only splits.

    A population of decisions taken when the subtended angle passes a common threshold
    ``theta ~ N(centre, sd)``: ``centre`` is the angle inside the most crossing brackets
    (:func:`critical_angle_brackets`), ``sd`` the normal-consistent median absolute deviation
    of the bracket midpoints about it (an upper bound: it includes half a bracket's width and
    the splits dated a movement off), ``kappa`` the steering residuals' concentration found
    by :func:`detect_splits` (``attrs["steering_kappa"]``).

    Parameters
    ----------
    splits : pandas.DataFrame
        Output of :func:`detect_splits` without a prior.
    eps : float, default=0.05
        Weight of a uniform component over a trial's outcomes, so that a split the angle does
        not explain (one in twenty) is still found where the steering shows it.

    Returns
    -------
    CrossingPrior or None
        None with fewer than two brackets, a zero spread or no residual concentration.

    References
    ----------
    Robbins, H. (1956). An empirical Bayes approach to statistics. Proc. Third Berkeley Symp.
    Math. Statist. Prob. 1, 157-163 (a prior estimated from the population of cases).
    Mardia, K. V. & Jupp, P. E. (2000). *Directional Statistics*. Wiley, section 5.3 (from
    memory; von Mises concentration by maximum likelihood, computed with
    :func:`scipy.stats.vonmises` ``fit``).
    """
    lo = splits["subtended_prev_rad"].to_numpy(np.float64)
    hi = splits["subtended_post_rad"].to_numpy(np.float64)
    ok = np.isfinite(lo) & np.isfinite(hi)
    kappa = float(splits.attrs.get("steering_kappa", np.nan))
    if ok.sum() < 2 or not kappa > 0:
        return None
    lo, hi = np.minimum(lo[ok], hi[ok]), np.maximum(lo[ok], hi[ok])
    centre = float(_max_coverage_centre(lo, hi))
    sd = float(_MAD_TO_SD * np.median(np.abs(0.5 * (lo + hi) - centre)))
    if not sd > 0:
        return None
    return CrossingPrior(centre, sd, kappa, float(eps))


def _table(steps: list[tuple[int, NDArray[np.int64], _Steps]], fits: list[_Fit],
           t: NDArray[np.float64], x: NDArray[np.float64], y: NDArray[np.float64],
           tx: NDArray[np.float64], ty: NDArray[np.float64], names: tuple[str, ...]
           ) -> pd.DataFrame:
    """The split table (``SPLIT_COLUMNS``) of the segmentations ``fits``."""
    k = tx.shape[1]
    rows: list[dict[str, object]] = []
    for (tid, idx, st), (_, cuts, dropped, _) in zip(steps, fits, strict=True):
        remaining = list(st.r0)
        for level, (c, j) in enumerate(zip(cuts, dropped, strict=True), start=1):
            commit = int(st.start[c]) if c < st.start.size else int(idx[-1])
            if c >= 1:                       # the movement before the committing one
                lo, hi = int(st.start[c - 1]), int(st.end[c - 1])
                i = int(np.searchsorted(t, 0.5 * (t[lo] + t[hi])))
            else:                            # committed from the first movement on
                lo, i = int(idx[0]), commit
            at = np.array([i, lo, commit])
            d_i = np.arctan2(ty[at] - y[at, None], tx[at] - x[at, None])
            keep = np.zeros((3, k), dtype=bool)
            keep[:, remaining] = True
            sub_rad = target_set_geometry(d_i, present=keep).subtended_rad
            left = [m for m in remaining if m != j]
            rows.append({"trial": tid, "level": level, "split_index": i,
                         "split_s": float(t[i]), "commit_s": float(t[commit]),
                         "x_mm": float(x[i]), "y_mm": float(y[i]),
                         "subtended_rad": float(sub_rad[0]),
                         "subtended_prev_rad": float(sub_rad[1]),
                         "subtended_post_rad": float(sub_rad[2]),
                         "subtended_mid_rad": float(0.5 * (sub_rad[1] + sub_rad[2])),
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


def _max_coverage_centre(low: NDArray[np.float64], high: NDArray[np.float64],
                         axis: int = -1) -> NDArray[np.float64]:
    """Middle of the values lying inside the most brackets ``[low, high]`` (along ``axis``)."""
    lo, hi = np.moveaxis(np.asarray(low), axis, -1), np.moveaxis(np.asarray(high), axis, -1)
    ends = np.concatenate((lo, hi), axis=-1)                       # (..., 2n) candidates
    cov = np.sum((lo[..., None, :] <= ends[..., :, None])
                 & (ends[..., :, None] <= hi[..., None, :]), axis=-1)
    best = cov == cov.max(axis=-1, keepdims=True)
    a = np.where(best, ends, np.inf).min(axis=-1)
    b = np.where(best, ends, -np.inf).max(axis=-1)
    return 0.5 * (a + b)


def critical_angle_brackets(low_rad: ArrayLike, high_rad: ArrayLike, *, n_resamples: int = 2000,
                            confidence_level: float = 0.95, seed: int = 0
                            ) -> dict[str, float | int | str]:
    """Critical angle from bracketed crossings: the angle inside the most brackets.

    Each split brackets the crossing of the critical angle between the subtended angle at the
    start of the movement before the committing one and at the committing movement's onset.
    With one critical angle and a minority of wrong brackets (a split dated a bout early or
    late), the angle lying inside the most brackets is the maximum-likelihood estimate (the
    innermost interval of largest overlap; its middle is reported), and a few wrong brackets
    do not pull it, unlike the median of the bracket midpoints (:func:`critical_angle`).

    Parameters
    ----------
    low_rad, high_rad : array_like of shape (n_splits,)
        Bracket ends (swapped where ``low > high``; NaN pairs ignored).
    n_resamples, confidence_level, seed
        As in :func:`critical_angle` (splits resampled in pairs).

    Returns
    -------
    dict
        ``estimate_rad``, ``ci_low_rad``, ``ci_high_rad``, ``n``, ``method``.

    References
    ----------
    Turnbull, B. W. (1976). The empirical distribution function with arbitrarily grouped,
    censored and truncated data. JRSS B 38(3), 290-295 (innermost intervals of overlapping
    brackets; from memory). DOI:10.1111/j.2517-6161.1976.tb01597.x. Percentile interval:
    :func:`scipy.stats.bootstrap` (Efron & Tibshirani 1993, chapter 13).
    """
    lo, hi = np.asarray(low_rad, dtype=np.float64), np.asarray(high_rad, dtype=np.float64)
    ok = np.isfinite(lo) & np.isfinite(hi)
    lo, hi = np.minimum(lo[ok], hi[ok]), np.maximum(lo[ok], hi[ok])
    out: dict[str, float | int | str] = {"estimate_rad": np.nan, "ci_low_rad": np.nan,
                                         "ci_high_rad": np.nan, "n": int(lo.size),
                                         "method": "max_bracket_coverage"}
    if lo.size == 0:
        return out
    out["estimate_rad"] = float(_max_coverage_centre(lo, hi))
    if lo.size < 2:
        return out
    res = bootstrap((lo, hi), _max_coverage_centre, paired=True, vectorized=True,
                    n_resamples=n_resamples, method="percentile",
                    confidence_level=confidence_level, rng=np.random.default_rng(seed))
    low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
    if not (np.isfinite(low) and np.isfinite(high)):     # a degenerate (constant) statistic
        low = high = float(out["estimate_rad"])
    out["ci_low_rad"], out["ci_high_rad"] = low, high
    return out
