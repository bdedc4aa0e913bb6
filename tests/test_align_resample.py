"""Behaviour resampled onto plane sample times."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.stats import circmean as astropy_circmean
from scipy import stats
from scipy.integrate import quad

from pipeline.align import (
    ClockModel,
    ClockSegment,
    count_in_windows,
    nearest_value,
    plane_times,
    resample_behaviour,
    window_circmean,
    window_mean,
)
from pipeline.errors import AlignmentError


def clock(offset_s: float = 5.0, drift_ppm: float = 30.0) -> ClockModel:
    seg = ClockSegment(0.0, 100.0, offset_s, drift_ppm, 10)
    return ClockModel(offset_s, drift_ppm, (seg,), 0.0, 0.0, 10, (), ())


def test_window_mean_is_exact_integral_of_interpolant(rng):
    t = np.sort(rng.uniform(0, 10, 200))
    v = rng.normal(size=200)
    a = rng.uniform(0.5, 9.0, 30)
    b = a + rng.uniform(0.01, 0.8, 30)
    got = window_mean(t, v, a, b)
    # reference: scipy.integrate.quad of numpy.interp over each window
    ref = [quad(lambda s: np.interp(s, t, v), lo, hi, limit=400, points=t[(t > lo) & (t < hi)]
                )[0] / (hi - lo) for lo, hi in zip(a[:8], b[:8], strict=True)]
    np.testing.assert_allclose(got[:8], ref, rtol=1e-6, atol=1e-9)
    two = window_mean(t, np.column_stack((v, 2 * v)), a, b)
    np.testing.assert_allclose(two[:, 1], 2 * got)
    np.testing.assert_allclose(window_mean(t, v, a, a), np.interp(a, t, v))


def test_nan_poisons_only_touching_windows():
    t = np.arange(10.0)
    v = np.arange(10.0)
    v[5] = np.nan
    out = window_mean(t, v, np.array([0.5, 4.5, 5.5, 7.0]), np.array([2.0, 4.9, 6.0, 8.0]))
    assert np.isnan(out[1]) and np.isnan(out[2])
    np.testing.assert_allclose(out[[0, 3]], [1.25, 7.5])


def test_window_circmean_agrees_with_scipy_and_astropy(rng):
    t = np.arange(0, 4, 0.005)
    ang = np.angle(np.exp(1j * (3.0 + rng.vonmises(0, 4, t.size))))   # wraps around +-pi
    a = np.arange(0.5, 3.0, 0.25)
    b = a + 0.1
    got = window_circmean(t, ang, a, b)
    for lo, hi, g in zip(a, b, got, strict=True):
        inside = ang[(t > lo + 1e-9) & (t < hi - 1e-9)]
        # reference: scipy.stats.circmean and astropy.stats.circmean of the samples inside
        # (the interpolant's window weights differ only at the two edges)
        ref_s = stats.circmean(inside, high=np.pi, low=-np.pi)
        ref_a = float(astropy_circmean(inside))
        assert np.angle(np.exp(1j * (g - ref_s))) == pytest.approx(0, abs=0.05)
        assert np.angle(np.exp(1j * (g - ref_a))) == pytest.approx(0, abs=0.05)


def test_counts_and_nearest():
    assert count_in_windows([1.0, 1.5, 3.0], [0.0, 1.5, 2.0], [1.5, 3.0, 3.5]).tolist() == [1, 1, 1]
    assert nearest_value([0.0, 1.0, 2.0], np.array([7, 8, 9]), [0.4, 0.5, 1.6]).tolist() == [7, 7, 9]


def test_resample_behaviour_applies_clock_and_shapes(rng):
    model = clock()
    t_rig = np.arange(0, 30, 0.005) + 4.0
    x = 0.1 * t_rig                       # a ramp: the window mean is the ramp at the centre
    pt = plane_times(10, 5, volume_rate_hz=2.0)
    exp_s = 0.1
    heading = np.full(t_rig.size, 3.1)
    out = resample_behaviour(t_rig, pt, clock=model, exposure_s=exp_s,
                             continuous={"x_mm": x, "pair": np.column_stack((x, -x))},
                             angles={"heading_rad": heading},
                             labels={"trial": np.arange(t_rig.size) // 1000},
                             events_rig_s={"bout_onsets": model.scope_to_rig(pt[:, 2] + 0.01)})
    centre_rig = model.scope_to_rig(pt + exp_s / 2)
    np.testing.assert_allclose(out["x_mm"], 0.1 * centre_rig, atol=1e-9)
    assert out["pair"].shape == (10, 5, 2)
    np.testing.assert_allclose(out["heading_rad"], 3.1)
    assert out["bout_onsets"][:, 2].tolist() == [1] * 10 and out["bout_onsets"].sum() == 10
    assert out["trial"].shape == (10, 5)


def test_log_shorter_than_session_names_both_spans():
    model = clock(offset_s=0.0, drift_ppm=0.0)
    pt = plane_times(100, 2, volume_rate_hz=2.0)
    with pytest.raises(AlignmentError, match=r"covers microscope time 0.000 to 20.000 s .* but "
                       r"the imaging session spans 0.000 to 50.000 s"):
        resample_behaviour(np.linspace(0, 20, 100), pt, clock=model, exposure_s=0.25,
                           continuous={"x": np.zeros(100)})
