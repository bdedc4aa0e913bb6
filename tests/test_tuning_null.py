"""The split-aligned trial swap, the tuning stage's default null.

Checks: the swap's mechanics (each trial gets another trial of its kind, aligned at the
split), the permutation test fed with precomputed columns equals the row-reordering one, and
calibration on sparse, autocorrelated activity (calcium events with no tuning) in a session of
trials of unequal length, judged against the binomial distribution (scipy.stats.binom).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from scipy.signal import fftconvolve

from pipeline.analysis.permtest import unique_variance_test
from pipeline.analysis.regressors import (
    sample_columns,
    trial_anchors,
    tuning_regressors,
    window_epochs,
)
from pipeline.analysis.stats import split_aligned_swap_times, trial_shuffle_indices
from pipeline.analysis.tuning import tuned_flags
from pipeline.errors import InputError


def test_swap_times_align_trials_of_one_kind(rng):
    # trials: (split, start, end); kinds 1 (targets 0) and 3 (targets 0 and 1)
    anchors = {0: (10.0, 0.0, 20.0), 1: (35.0, 25.0, 40.0), 2: (60.0, 45.0, 80.0),
               3: (95.0, 85.0, 99.0), 4: (110.0, 100.0, 130.0)}
    kinds = {0: 1, 1: 1, 2: 1, 3: 3, 4: 3}
    t = np.concatenate([np.arange(a[1], a[2], 0.5) for a in anchors.values()])
    trial = np.concatenate([np.full(np.arange(a[1], a[2], 0.5).size, k)
                            for k, a in anchors.items()])
    src = split_aligned_swap_times(t, trial, anchors, n_permutations=200, kinds=kinds, seed=3)
    assert src.shape == (200, t.size)
    spans = np.array([[a[1], a[2]] for a in anchors.values()])
    for row in src:
        moved = False
        for k, (split, _, _) in anchors.items():
            on = trial == k
            # every sample of trial k reads one trial, of the same kind
            owner = np.flatnonzero((row[on][:, None] >= spans[:, 0]) &
                                   (row[on][:, None] <= spans[:, 1]))
            donors = {int(np.flatnonzero((spans[:, 0] <= v) & (v <= spans[:, 1]))[0])
                      for v in row[on]}
            assert owner.size and len(donors) == 1
            d = donors.pop()
            assert kinds[d] == kinds[k]
            moved |= d != k
            # at the same time from the split, clipped to the donor's span
            expect = np.clip(anchors[d][0] + (t[on] - split), anchors[d][1], anchors[d][2])
            np.testing.assert_allclose(row[on], expect)
        assert moved  # never the identity
    with pytest.raises(InputError, match="trial 9 has no split"):
        split_aligned_swap_times(np.zeros(3), np.array([0, 0, 9]), anchors, n_permutations=2)
    with pytest.raises(InputError, match="no two trials of one kind"):
        split_aligned_swap_times(t[trial < 2], trial[trial < 2], anchors, n_permutations=2,
                                 kinds={0: 1, 1: 2})


def test_trial_anchors_kinds():
    t = np.arange(0, 30, 0.5)
    trial = np.where(t < 10, 0, np.where(t < 12, -1, 1))
    bearing = np.full((t.size, 2), np.nan)
    bearing[trial == 0, 0] = 0.1
    bearing[trial == 1] = 0.2
    anchors, kinds = trial_anchors(t, trial, bearing, {0: [4.0], 1: [20.0, 25.0], 2: [np.nan]})
    assert anchors == {0: (4.0, 0.0, 9.5), 1: (20.0, 12.0, 29.5)}
    assert kinds == {0: 1, 1: 3}


def test_precomputed_columns_equal_row_reordering(rng):
    n = 300
    cols = rng.normal(size=(n, 2, 2))
    y = rng.normal(size=(n, 40))
    perms = trial_shuffle_indices(np.repeat(np.arange(10), 30), 99, seed=1)
    a = unique_variance_test(y, columns=cols, perm_index=perms)
    b = unique_variance_test(y, columns=cols, perm_columns=cols[perms])
    np.testing.assert_array_equal(a.p_joint, b.p_joint)
    np.testing.assert_array_equal(a.p, b.p)
    with pytest.raises(InputError, match="perm_columns: expected shape"):
        unique_variance_test(y, columns=cols, perm_columns=cols[perms][:, :-1])
    with pytest.raises(InputError, match="give perm_index or perm_columns"):
        unique_variance_test(y, columns=cols)


def _session(rng, n_trials=30, dt=0.05):
    """Trials of 25-60 s with a split at 30-80 % of each and gaps between them; two targets
    ahead and converging before the split, one at ~0 and the other drifting aside after."""
    t_parts, tr_parts, b_parts, split = [], [], [], {}
    t0 = 0.0
    for i in range(n_trials):
        dur = rng.uniform(25.0, 60.0)
        tt = t0 + np.arange(int(dur / dt)) * dt
        s = t0 + rng.uniform(0.3, 0.8) * dur
        side = rng.choice([-1.0, 1.0])
        ahead = 0.5 * (1.0 - (tt - t0) / (s - t0 + 5.0))
        b0 = np.where(tt < s, ahead, 0.1 * np.exp(-(tt - s) / 3.0))
        b1 = np.where(tt < s, -ahead, side * (0.6 + 0.05 * (tt - s)))
        walk = 0.05 * np.sqrt(dt) * rng.normal(size=(tt.size, 2)).cumsum(axis=0)
        b = side * np.column_stack([b0, b1]) + walk
        gap = t0 + dur + np.arange(int(rng.uniform(3.0, 8.0) / dt)) * dt
        t_parts += [tt, gap]
        tr_parts += [np.full(tt.size, i), np.full(gap.size, -1)]
        b_parts += [b, np.full((gap.size, 2), np.nan)]
        split[i] = [s]
        t0 = gap[-1] + dt
    return (np.concatenate(t_parts), np.concatenate(tr_parts), np.concatenate(b_parts),
            split)


def test_aligned_swap_is_calibrated_on_sparse_events(rng):
    # untuned cells: spontaneous events (0.03 / s, peak ~0.6, the GCaMP6s-like kernel of
    # the demo) plus white noise, sampled at 2 Hz; no cell is tuned, so the share of
    # p <= 0.05 must be binomial(n, 0.05) and BH at q = 0.05 should flag about nothing
    t, trial, bearing, split = _session(rng)
    reg = tuning_regressors(t, np.nan_to_num(bearing), trial, split, rise_s=0.18,
                            decay_s=1.8)
    plane_t = t[::10] + 0.013
    tz = trial[np.clip(np.searchsorted(t, plane_t), 0, t.size - 1)]
    ep = window_epochs(plane_t, tz, split, pre_s=30.0, post_s=30.0)
    keep = np.flatnonzero(ep != "")
    n_cells, dt = 500, t[1] - t[0]
    spikes = (rng.random((t.size, n_cells)) < 0.03 * dt) * rng.lognormal(np.log(0.6), 0.3,
                                                                         (t.size, n_cells))
    kt = np.arange(0.0, 18.0, dt)
    calcium = fftconvolve(spikes, (np.exp(-kt / 1.8) - np.exp(-kt / 0.18))[:, None])[: t.size]
    y = calcium[np.searchsorted(t, plane_t)][keep] + rng.normal(0, 0.08, (keep.size, n_cells))
    terms = sample_columns(t, reg["terms"], plane_t[keep])
    levels = sample_columns(t, reg["levels"], plane_t[keep])
    anchors, kinds = trial_anchors(t, trial, bearing, split)
    src = split_aligned_swap_times(plane_t[keep], tz[keep], anchors, n_permutations=299,
                                   kinds=kinds, seed=1)
    swapped = sample_columns(t, reg["terms"], src.ravel()).reshape(299, keep.size,
                                                                   *terms.shape[1:])
    bound = scipy.stats.binom.ppf(0.999, n_cells, 0.05) / n_cells   # one-sided, 0.1 %
    for e, name in enumerate(reg["epochs"]):
        if not np.any(ep[keep] == name):
            continue
        others = [terms[:, f].reshape(keep.size, -1) for f in range(terms.shape[1]) if f != e]
        nuis = np.concatenate(others + [levels.reshape(keep.size, -1)], axis=1)
        res = unique_variance_test(y, columns=terms[:, e], nuisance=nuis,
                                   perm_columns=swapped[:, :, e])
        assert np.mean(res.p_joint <= 0.05) <= bound, name
        assert tuned_flags(res.p_joint, q=0.05)[1].mean() <= 0.05, name
        # and not conservative to the point of uselessness (measured 0.03-0.07)
        assert np.mean(res.p_joint <= 0.2) >= 0.1, name
