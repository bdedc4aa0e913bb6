"""OASIS deconvolution: exact against NNLS on the same problem, planted events recovered."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import nnls

from pipeline.errors import ConfigError, InputError
from pipeline.volumes.oasis import ar1_gamma, deconvolve, deconvolve_many, noise_sigma


def _kernel(n, gamma):
    t = np.arange(n)
    lag = t[:, None] - t[None, :]
    return np.where(lag >= 0, gamma ** np.clip(lag, 0, None), 0.0)


def _nnls_solution(y, gamma, lam):
    """min 1/2 ||y - K s||^2 + lam * sum(s), s >= 0, as an NNLS problem.

    1/2 ||y - K s||^2 + lam 1's = 1/2 ||K s - (y - lam K^-T 1)||^2 + const, because
    (K^-T 1)' K s = 1' s.
    """
    k = _kernel(len(y), gamma)
    b = y - lam * np.linalg.solve(k.T, np.ones(len(y)))
    s, _ = nnls(k, b, maxiter=50 * len(y))
    return k @ s, s


@pytest.mark.parametrize("lam", [0.0, 0.3, 2.0])
@pytest.mark.parametrize("gamma", [0.5, 0.9])
def test_oasis_equals_nnls(rng, gamma, lam):
    for _ in range(5):
        n = 60
        s_true = (rng.random(n) < 0.1) * rng.uniform(1, 3, n)
        y = _kernel(n, gamma) @ s_true + rng.normal(0, 0.4, n)
        c, s = deconvolve(y, gamma=gamma, lam=lam)
        # reference: scipy.optimize.nnls on the convolution matrix, same objective
        c_ref, s_ref = _nnls_solution(y, gamma, lam)
        np.testing.assert_allclose(c, c_ref, atol=1e-8)
        np.testing.assert_allclose(s, s_ref, atol=1e-8)
        assert (s >= 0).all()


def test_planted_events_recovered(rng):
    rate_hz, decay_s = 5.0, 1.5
    gamma = ar1_gamma(decay_s, rate_hz)
    assert np.isclose(gamma, np.exp(-0.2 / 1.5))  # common practice: gamma = exp(-dt / tau)
    n_cells, n_t = 20, 600
    s_true = np.zeros((n_cells, n_t))
    times = rng.choice(np.arange(10, n_t - 10, 25), size=(n_cells, 6), replace=True)
    np.put_along_axis(s_true, times, 1.0, axis=1)
    k = _kernel(n_t, gamma)
    y = s_true @ k.T + rng.normal(0, 0.05, (n_cells, n_t))
    c, s, sigma = deconvolve_many(y, gamma=gamma, s_min_sigma=3.0)
    assert c.dtype == np.float32 and s.shape == y.shape
    # planted noise level; MAD of 600 differences scatters ~7 %, decays bias it up a little
    np.testing.assert_allclose(sigma, 0.05, rtol=0.25)
    for i in range(n_cells):
        found = np.flatnonzero(s[i] > 0.5)
        planted = np.unique(times[i])
        assert len(found) == len(planted)
        assert np.abs(found - planted).max() <= 1
    assert np.corrcoef(c.ravel(), (s_true @ k.T).ravel())[0, 1] > 0.99


def test_noise_sigma_against_known_gaussian(rng):
    y = rng.normal(0, 2.0, (3, 20000))
    # reference: the standard deviation of the planted white noise (2.0)
    np.testing.assert_allclose(noise_sigma(y), 2.0, rtol=0.03)


def test_oasis_errors():
    with pytest.raises(ConfigError, match="traces.decay_s"):
        ar1_gamma(0.0, 5.0)
    with pytest.raises(ConfigError, match="gamma"):
        deconvolve(np.ones(5), gamma=1.0)
    with pytest.raises(ConfigError, match="lam and s_min"):
        deconvolve(np.ones(5), gamma=0.5, lam=-1.0)
    with pytest.raises(InputError, match="finite 1-d trace"):
        deconvolve(np.array([1.0, np.inf]), gamma=0.5)
    with pytest.raises(InputError, match="finite"):
        deconvolve_many(np.ones(5), gamma=0.5)
