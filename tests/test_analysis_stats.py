"""Circular statistics, FDR, permutation p-values and null index generators."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from astropy.stats import circmean as astropy_circmean
from astropy.stats import circvar as astropy_circvar
from astropy.stats import rayleightest
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportion_confint

from pipeline.analysis.stats import (
    bh_qvalues,
    bh_reject,
    binomial_interval,
    circular_mean,
    circular_shift_indices,
    permutation_pvalue,
    rayleigh_test,
    resultant_length,
    trial_shuffle_indices,
)
from pipeline.errors import ConfigError, InputError


def test_circular_mean_matches_references(rng):
    a = rng.vonmises(2.5, 2.0, size=(40, 3))
    # reference: scipy.stats.circmean (range -pi..pi)
    ref = scipy.stats.circmean(a, high=np.pi, low=-np.pi, axis=0)
    np.testing.assert_allclose(circular_mean(a, axis=0), ref, atol=1e-12)
    w = rng.uniform(0, 3, size=40)
    # reference: astropy.stats.circmean with weights
    ref_w = astropy_circmean(a[:, 0], weights=w)
    assert np.angle(np.exp(1j * (circular_mean(a[:, 0], weights=w) - ref_w))) == \
        pytest.approx(0, abs=1e-12)


def test_resultant_length_matches_astropy(rng):
    a = rng.vonmises(-1.0, 1.0, size=200)
    w = rng.uniform(0, 1, size=200)
    # reference: astropy.stats.circvar = 1 - mean resultant length
    assert resultant_length(a) == pytest.approx(1 - astropy_circvar(a), abs=1e-12)
    assert resultant_length(a, weights=w) == pytest.approx(1 - astropy_circvar(a, weights=w),
                                                           abs=1e-12)


def test_rayleigh_matches_astropy_small_samples(rng):
    for n in (10, 20, 40):
        for _ in range(5):
            a = rng.vonmises(0.3, 0.4, size=n)
            _, p = rayleigh_test(a)
            # reference: astropy.stats.rayleightest (series approximation, n < 50)
            ref = rayleightest(a)
            if ref > 0.01:
                assert p == pytest.approx(ref, abs=2e-3)


def test_rayleigh_matches_monte_carlo_null(rng):
    # reference: the exact null by simulation of uniform angles (Monte Carlo, 200k draws)
    n = 10
    sims = rng.uniform(-np.pi, np.pi, size=(200_000, n))
    r_null = np.abs(np.exp(1j * sims).mean(axis=1))
    a = rng.vonmises(0.0, 0.9, size=n)
    while not 0.02 < rayleigh_test(a)[1] < 0.2:
        a = rng.vonmises(0.0, 0.9, size=n)
    r_obs = resultant_length(a)
    p_mc = np.mean(r_null >= r_obs)
    assert rayleigh_test(a)[1] == pytest.approx(p_mc, abs=0.01)


def test_rayleigh_clustered_example():
    # angles typed from memory after Zar (2010) Example 27.1 (n = 10 clustered directions);
    # the book rejects uniformity with P < 0.001 (from memory)
    a = np.radians([66, 75, 86, 88, 88, 93, 97, 101, 118, 130.0])
    z, p = rayleigh_test(a)
    assert z == pytest.approx(10 * resultant_length(a) ** 2)
    assert p < 0.001


def test_rayleigh_grouped_weights_equal_repeated_angles(rng):
    centres = np.linspace(-np.pi, np.pi, 12, endpoint=False)
    counts = rng.integers(0, 9, size=12)
    z_w, p_w = rayleigh_test(centres, weights=counts)
    z_r, p_r = rayleigh_test(np.repeat(centres, counts))
    assert (z_w, p_w) == pytest.approx((z_r, p_r))


def test_negative_weights_raise():
    with pytest.raises(InputError, match="non-negative"):
        circular_mean([0.0, 1.0], weights=[1.0, -1.0])


def test_bh_matches_scipy_and_statsmodels(rng):
    p = np.concatenate([rng.uniform(size=300), rng.uniform(0, 0.002, size=40)])
    q = bh_qvalues(p)
    # reference: scipy.stats.false_discovery_control(method="bh")
    np.testing.assert_allclose(q, scipy.stats.false_discovery_control(p, method="bh"),
                               atol=1e-12)
    # reference: statsmodels multipletests(method="fdr_bh")
    rej, q_sm, _, _ = multipletests(p, alpha=0.05, method="fdr_bh")
    np.testing.assert_allclose(q, q_sm, atol=1e-12)
    np.testing.assert_array_equal(bh_reject(p, q=0.05), rej)


def test_bh_paper_example():
    # the 15 p-values of Benjamini & Hochberg (1995), section 4 worked example (from memory);
    # the paper rejects the 4 smallest at q = 0.05
    p = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459,
                  0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000])
    rej = bh_reject(p, q=0.05)
    assert rej.sum() == 4
    assert rej[:4].all()


def test_bh_ignores_nan_and_works_per_row(rng):
    p = rng.uniform(size=(3, 50))
    p[1, 10] = np.nan
    q = bh_qvalues(p, axis=1)
    assert np.isnan(q[1, 10])
    finite = np.delete(p[1], 10)
    # reference: scipy.stats.false_discovery_control on the finite values alone
    np.testing.assert_allclose(np.delete(q[1], 10), scipy.stats.false_discovery_control(finite))
    np.testing.assert_allclose(q[0], scipy.stats.false_discovery_control(p[0]))


def test_bh_errors():
    with pytest.raises(InputError, match=r"expected values in \[0, 1\]"):
        bh_qvalues([0.1, 1.5])
    with pytest.raises(ConfigError, match="fdr_q = 1.2"):
        bh_reject([0.1], q=1.2)


def test_permutation_pvalue_plus_one(rng):
    obs = np.array([5.0, 0.0, -3.0])
    null = rng.normal(size=(99, 3))
    p = permutation_pvalue(obs, null)
    # common practice (Phipson & Smyth 2010): p = (1 + #exceed) / (n + 1), never zero
    assert p[0] == pytest.approx(1 / 100)
    assert p[1] == pytest.approx((1 + np.sum(null[:, 1] >= 0)) / 100)
    assert permutation_pvalue(obs, null, alternative="less")[2] == pytest.approx(1 / 100)
    assert permutation_pvalue(obs, null, alternative="two-sided")[0] == pytest.approx(1 / 100)


def test_permutation_pvalue_is_calibrated(rng):
    # under exchangeability P(p <= a) <= a (Phipson & Smyth 2010)
    obs = rng.normal(size=4000)
    null = rng.normal(size=(199, 4000))
    p = permutation_pvalue(obs, null)
    assert abs(np.mean(p <= 0.05) - 0.05) < 0.012


def test_permutation_pvalue_errors():
    with pytest.raises(InputError, match="expected shape"):
        permutation_pvalue(np.zeros(3), np.zeros((10, 4)))
    with pytest.raises(ConfigError, match="alternative = 'up'"):
        permutation_pvalue(np.zeros(3), np.zeros((10, 3)), alternative="up")


@pytest.mark.parametrize(("method", "sm_method"), [("wilson", "wilson"),
                                                   ("clopper-pearson", "beta")])
def test_binomial_interval_matches_statsmodels(method, sm_method):
    k = np.array([0, 1, 7, 50, 99, 100])
    n = np.full(6, 100)
    lo, hi = binomial_interval(k, n, method=method)
    # reference: statsmodels.stats.proportion.proportion_confint
    ref_lo, ref_hi = proportion_confint(k, n, alpha=0.05, method=sm_method)
    np.testing.assert_allclose(lo, ref_lo, atol=1e-10)
    np.testing.assert_allclose(hi, ref_hi, atol=1e-10)


def test_binomial_interval_errors_and_empty():
    lo, hi = binomial_interval(0, 0)
    assert np.isnan(lo) and np.isnan(hi)
    with pytest.raises(ConfigError, match="method = 'exact'"):
        binomial_interval(1, 2, method="exact")


def test_circular_shift_indices():
    idx = circular_shift_indices(100, 500, min_shift=20, seed=3)
    y = np.arange(100)
    offsets = (y[None, :] - y[idx])[:, 0] % 100
    assert offsets.min() >= 20 and offsets.max() <= 80
    np.testing.assert_array_equal(np.sort(idx, axis=1), np.tile(y, (500, 1)))
    np.testing.assert_array_equal(idx, circular_shift_indices(100, 500, min_shift=20, seed=3))
    with pytest.raises(ConfigError, match="min_shift = 60"):
        circular_shift_indices(100, 5, min_shift=60)


def test_trial_shuffle_indices_keeps_trials_whole():
    trials = np.repeat([4, 1, 7, 2], [5, 3, 6, 4])
    idx = trial_shuffle_indices(trials, 50, seed=1)
    for row in idx:
        assert sorted(row) == list(range(trials.size))
        shuffled = trials[row]
        # each trial's samples stay contiguous and in their original order
        for t in np.unique(trials):
            pos = row[shuffled == t]
            assert np.all(np.diff(pos) == 1)
        assert not np.array_equal(row, np.arange(trials.size))


def test_trial_shuffle_errors():
    with pytest.raises(InputError, match="trial 1 is not contiguous"):
        trial_shuffle_indices([1, 1, 2, 1], 3)
    with pytest.raises(InputError, match="at least 2 trials"):
        trial_shuffle_indices([3, 3, 3], 3)
    with pytest.raises(InputError, match="non-empty 1-D"):
        trial_shuffle_indices(np.zeros((2, 2)), 3)
