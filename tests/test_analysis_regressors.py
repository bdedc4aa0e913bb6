"""Regressors of the tuning model: indicator filter, epochs, motor impulses."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage
import scipy.signal

from pipeline.analysis.regressors import (
    baseline_columns,
    fine_epoch_gates,
    indicator_filter,
    motor_columns,
    sample_columns,
    uniform_grid,
    window_epochs,
)
from pipeline.errors import InputError


def test_indicator_filter_equals_convolution_with_the_kernel(rng):
    dt, rise, decay = 0.01, 0.18, 1.8
    x = rng.normal(size=(3000, 2))
    got = indicator_filter(x, dt_s=dt, rise_s=rise, decay_s=decay)
    # reference: scipy.signal.convolve with the sampled difference of exponentials,
    # exp(-t/decay) - exp(-t/rise) (indicator kernel; Chen et al. 2013), scaled to peak 1
    t = np.arange(0, 20 * decay, dt)
    k = np.exp(-t / decay) - np.exp(-t / rise)
    t_peak = np.log(decay / rise) * decay * rise / (decay - rise)
    k = k / (np.exp(-t_peak / decay) - np.exp(-t_peak / rise)) * dt
    ref = np.stack([scipy.signal.convolve(x[:, j], k)[: x.shape[0]] for j in range(2)], 1)
    np.testing.assert_allclose(got, ref, atol=1e-9)
    # the continuous kernel peaks at t_peak with value 1 (impulse of area 1)
    imp = np.zeros(1000)
    imp[0] = 1.0 / dt
    resp = indicator_filter(imp, dt_s=dt, rise_s=rise, decay_s=decay)
    assert resp.max() == pytest.approx(1.0, abs=1e-3)
    assert np.argmax(resp) * dt == pytest.approx(t_peak, abs=dt)
    with pytest.raises(InputError, match="expected 0 < rise_s < decay_s"):
        indicator_filter(x, dt_s=dt, rise_s=2.0, decay_s=1.0)


def test_epochs_from_split_times():
    t = np.arange(20.0)
    trial = np.r_[np.zeros(10, int), np.ones(8, int), -np.ones(2, int)]
    gates = fine_epoch_gates(t, trial, {0: [3.0, 6.0], 1: [14.0]})
    np.testing.assert_array_equal(np.flatnonzero(gates["pre"]), [0, 1, 2, 10, 11, 12, 13])
    np.testing.assert_array_equal(np.flatnonzero(gates["between"]), [3, 4, 5])
    np.testing.assert_array_equal(np.flatnonzero(gates["post"]), [6, 7, 8, 9, 14, 15, 16, 17])
    ep = window_epochs(t, trial, {0: [3.0, 6.0], 1: [14.0]}, pre_s=2.0, post_s=3.0)
    assert list(ep[:10]) == ["", "pre", "pre", "between", "between", "between", "post",
                             "post", "post", ""]
    guarded = window_epochs(t, trial, {0: [3.0, 6.0]}, pre_s=2.0, post_s=3.0, guard_s=1.0)
    assert list(guarded[:10]) == ["", "pre", "pre", "", "between", "between", "", "post",
                                  "post", ""]


def test_motor_columns_place_weighted_impulses_at_each_lead():
    t = np.arange(0, 10, 0.1)
    out = motor_columns(t, np.array([5.0, 7.0]), np.array([0.5, -0.2]), np.array([1.2, 0.8]),
                        leads_s=(0.0, 1.5))
    assert out.shape == (t.size, 10)
    cols = out.reshape(t.size, 2, 5)
    # lead 0: left |turn| and turn^2 at 5 s, right at 7 s, vigor at both
    assert cols[50, 0, 0] == pytest.approx(0.5) and cols[50, 0, 1] == pytest.approx(0.25)
    assert cols[70, 0, 2] == pytest.approx(0.2) and cols[70, 0, 3] == pytest.approx(0.04)
    assert cols[[50, 70], 0, 4] == pytest.approx([1.2, 0.8])
    # lead 1.5 s: the same impulses 1.5 s earlier
    assert cols[35, 1, 0] == pytest.approx(0.5) and cols[55, 1, 2] == pytest.approx(0.2)
    assert np.count_nonzero(out) == 12


def test_baseline_columns_are_the_running_percentile_of_the_lead_nearest_0(rng):
    # reference: scipy.ndimage.percentile_filter, the definition the dF/F baseline follows
    motor = rng.random((300, 15))
    got = baseline_columns(motor, (-0.5, 0.25, 1.5), percentile=20.0, window=41)
    want = scipy.ndimage.percentile_filter(motor[:, 5:10], 20.0, size=(41, 1), mode="reflect")
    np.testing.assert_allclose(got, want)
    # a positive multiple of a term has that multiple of its baseline (what makes it a column)
    np.testing.assert_allclose(baseline_columns(3.0 * motor, (-0.5, 0.25, 1.5),
                                                percentile=20.0, window=41), 3.0 * want)
    with pytest.raises(InputError, match="expected 5 columns per lead"):
        baseline_columns(motor[:, :14], (0.0, 1.5, 2.0), percentile=20.0, window=41)


def test_uniform_grid_and_sampling():
    t = np.array([0.0, 0.1, 0.2, 0.31, 0.4])
    grid, held = uniform_grid(t, np.arange(5.0))
    np.testing.assert_allclose(grid, [0.0, 0.1, 0.2, 0.3, 0.4])
    np.testing.assert_array_equal(held, [0, 1, 2, 2, 4])       # zero-order hold
    # linear interpolation (reference: numpy.interp)
    cols = np.column_stack([grid, grid**2])
    got = sample_columns(grid, cols, np.array([0.05, 0.25]))
    np.testing.assert_allclose(got[:, 1], np.interp([0.05, 0.25], grid, grid**2))
    with pytest.raises(InputError, match="expected at least 2 increasing samples"):
        uniform_grid(np.array([0.0, 0.0, 1.0]), np.zeros(3))
