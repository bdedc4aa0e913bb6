"""OASIS deconvolution: exact against NNLS on the same problem, planted events recovered.

The noise-constrained fit (the denoised trace) is checked against the same NNLS solution at the
penalty it reaches, and against a generic constrained solver (scipy.optimize.minimize, SLSQP).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize, nnls

from pipeline.errors import ConfigError, InputError
from pipeline.volumes.oasis import (
    ar1_gamma,
    deconvolve,
    deconvolve_constrained,
    deconvolve_many,
    denoise_many,
    noise_sigma,
    noise_sigma_psd,
)


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


def _ar1_problem(rng, n, gamma, noise, rate=0.1):
    s_true = (rng.random(n) < rate) * rng.uniform(1, 3, n)
    c_true = _kernel(n, gamma) @ s_true
    return c_true, c_true + rng.normal(0, noise, n)


@pytest.mark.parametrize("gamma", [0.5, 0.757, 0.9])
def test_constrained_equals_nnls_at_its_penalty(rng, gamma):
    for _ in range(5):
        n = 80
        _, y = _ar1_problem(rng, n, gamma, 0.4)
        sigma = 0.4
        c, s, lam = deconvolve_constrained(y, gamma=gamma, sigma=sigma)
        assert lam > 0
        # the constraint is active: residual power = noise power (Lagrangian duality)
        np.testing.assert_allclose(((y - c) ** 2).sum(), sigma**2 * n, rtol=1e-5)
        # reference: scipy.optimize.nnls on the convolution matrix at the same penalty; the
        # denoised trace is that NNLS solution's convolution K s
        c_ref, s_ref = _nnls_solution(y, gamma, lam)
        np.testing.assert_allclose(c, c_ref, atol=1e-8)
        np.testing.assert_allclose(s, s_ref, atol=1e-8)


def test_constrained_against_generic_solver(rng):
    gamma, n, sigma = 0.8, 30, 0.3
    _, y = _ar1_problem(rng, n, gamma, sigma, rate=0.15)
    c, s, _ = deconvolve_constrained(y, gamma=gamma, sigma=sigma)
    k = _kernel(n, gamma)
    # reference: scipy.optimize.minimize (SLSQP) on min sum(s), s >= 0,
    # ||y - K s||^2 <= sigma^2 n, started from the unconstrained non-negative fit
    s0, _ = nnls(k, y)
    res = minimize(lambda v: v.sum(), s0, jac=lambda v: np.ones_like(v), method="SLSQP",
                   bounds=[(0, None)] * n,
                   constraints=[{"type": "ineq",
                                 "fun": lambda v: sigma**2 * n - ((y - k @ v) ** 2).sum(),
                                 "jac": lambda v: 2 * k.T @ (y - k @ v)}],
                   options={"ftol": 1e-12, "maxiter": 500})
    assert res.success
    np.testing.assert_allclose(s.sum(), res.x.sum(), rtol=1e-4)
    np.testing.assert_allclose(c, k @ res.x, atol=1e-3)


def test_constrained_edge_cases(rng):
    y = rng.normal(0, 1.0, 200)
    # c = 0 already leaves less than the stated noise: nothing is signal
    c, s, lam = deconvolve_constrained(y, gamma=0.7, sigma=2.0)
    assert lam == np.inf and not c.any() and not s.any()
    # the unpenalised fit already leaves more than a tiny stated noise: lam = 0, same as OASIS
    c, s, lam = deconvolve_constrained(y + 5.0, gamma=0.7, sigma=1e-6)
    c0, _ = deconvolve(y + 5.0, gamma=0.7)
    assert lam == 0.0
    np.testing.assert_array_equal(c, c0)
    with pytest.raises(ConfigError, match="sigma >= 0"):
        deconvolve_constrained(y, gamma=0.7, sigma=-1.0)
    with pytest.raises(InputError, match="finite 1-d trace"):
        deconvolve_constrained(np.array([1.0, np.nan]), gamma=0.7, sigma=1.0)
    with pytest.raises(InputError, match="finite"):
        denoise_many(np.ones(10), gamma=0.7)
    with pytest.raises(InputError, match=">= 8 samples"):
        noise_sigma_psd(np.ones((2, 5)))
    with pytest.raises(ConfigError, match="noise band"):
        noise_sigma_psd(y, band=(0.3, 0.7))


def test_noise_sigma_psd_against_known_gaussian(rng):
    y = rng.normal(0, 2.0, (3, 20000))
    # reference: the standard deviation of the planted white noise (2.0); a flat one-sided
    # density 2 sigma^2 (scipy.signal.welch, fs=1) is the definition of white noise's PSD
    np.testing.assert_allclose(noise_sigma_psd(y), 2.0, rtol=0.03)


def test_noise_sigma_psd_ignores_frequent_transients(rng):
    # a cell with a transient at almost every sample: first differences carry the signal,
    # the upper half of the spectrum hardly does (the reason denoise_many reads it there)
    gamma, n = ar1_gamma(1.8, 2.0), 4000
    s_true = (rng.random((4, n)) < 0.6) * rng.lognormal(np.log(0.1), 0.3, (4, n))
    c_true = s_true @ _kernel(n, gamma).T
    c_true = np.apply_along_axis(np.convolve, 1, c_true, np.ones(3) / 3, mode="same")
    y = c_true + rng.normal(0, 0.05, (4, n))
    err_psd = np.abs(noise_sigma_psd(y) / 0.05 - 1)
    err_mad = np.abs(noise_sigma(y) / 0.05 - 1)
    assert (err_psd < err_mad).all()
    assert (err_psd < 0.25).all()


def test_denoise_many_rows_and_fidelity(rng):
    gamma, n = ar1_gamma(1.8, 2.0), 600
    rows = [_ar1_problem(rng, n, gamma, 0.3, rate=0.03) for _ in range(6)]
    c_true = np.stack([r[0] for r in rows])
    y = np.stack([r[1] for r in rows])
    c, sigma, lam = denoise_many(y, gamma=gamma)
    assert c.dtype == np.float32 and c.shape == y.shape
    np.testing.assert_allclose(sigma, noise_sigma_psd(y))
    for i in range(len(y)):
        ref, _, lam_i = deconvolve_constrained(y[i], gamma=gamma, sigma=sigma[i])
        np.testing.assert_allclose(c[i], ref, rtol=1e-5, atol=1e-6)
        assert lam[i] == pytest.approx(lam_i)
        # the denoised trace is closer to the planted calcium than the noisy one
        assert np.corrcoef(c[i], c_true[i])[0, 1] > np.corrcoef(y[i], c_true[i])[0, 1]
