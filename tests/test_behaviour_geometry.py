"""Target geometry: bearings, distances, subtended angle and bisector on the unit circle."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from pipeline.behaviour import (
    circular_mean,
    egocentric_bearing,
    target_distance,
    target_set_geometry,
    wrap_angle,
)


def test_wrap_angle_half_open_interval():
    a = wrap_angle(np.array([np.pi, -np.pi, 3 * np.pi, 0.0, -0.1, 2 * np.pi + 0.1]))
    np.testing.assert_allclose(a, [np.pi, np.pi, np.pi, 0.0, -0.1, 0.1], atol=1e-12)


def test_bearing_sign_left_is_positive():
    # animal at origin facing +y (heading pi/2); a target at (-1, 1) is ahead-left
    b = egocentric_bearing([0.0], [0.0], [np.pi / 2], [[-1.0, 1.0]], [[1.0, 1.0]])
    np.testing.assert_allclose(b, [[np.pi / 4, -np.pi / 4]])
    np.testing.assert_allclose(target_distance([0.0], [0.0], [[-1.0, 3.0]], [[1.0, 4.0]]),
                               [[np.sqrt(2), 5.0]])


def test_bearing_matches_complex_reference(rng):
    n = 200
    x, y, h = rng.normal(size=n), rng.normal(size=n), rng.uniform(-10, 10, n)
    tx, ty = rng.normal(size=(n, 3)), rng.normal(size=(n, 3))
    b = egocentric_bearing(x, y, h, tx, ty)
    # reference: numpy.angle of the target vector rotated by -heading (complex arithmetic)
    ref = np.angle(((tx - x[:, None]) + 1j * (ty - y[:, None])) * np.exp(-1j * h[:, None]))
    np.testing.assert_allclose(b, ref, atol=1e-12)
    assert b.min() > -np.pi and b.max() <= np.pi


def test_circular_mean_matches_scipy(rng):
    a = rng.vonmises(1.0, 2.0, size=(50, 7))
    # reference: scipy.stats.circmean (range (-pi, pi])
    np.testing.assert_allclose(circular_mean(a, axis=1),
                               stats.circmean(a, high=np.pi, low=-np.pi, axis=1), atol=1e-12)
    assert np.isnan(circular_mean(np.array([0.0, np.pi])))


def test_subtended_two_and_three_targets():
    d = np.array([[0.3, -0.2, np.nan],          # two targets: 0.5 apart
                  [3.0, -3.0, np.nan],          # across +-pi: 2*pi - 6 apart
                  [0.4, 0.0, -0.5],             # three: outermost 0.4 and -0.5
                  [0.1, np.nan, np.nan],        # one target: 0
                  [np.nan, np.nan, np.nan]])
    g = target_set_geometry(d)
    np.testing.assert_allclose(g.subtended_rad[:4], [0.5, 2 * np.pi - 6.0, 0.9, 0.0])
    assert np.isnan(g.subtended_rad[4])
    assert g.outer_left.tolist() == [0, 1, 0, 0, -1]     # most counter-clockwise
    assert g.outer_right.tolist() == [1, 0, 2, 0, -1]
    np.testing.assert_allclose(g.bisector_rad[:2], [0.05, np.pi], atol=1e-12)
    assert g.n_present.tolist() == [2, 2, 3, 1, 0]


def test_subtended_is_circular_range_brute_force(rng):
    d = rng.uniform(-np.pi, np.pi, size=(300, 3))
    d[rng.random((300, 3)) < 0.2] = np.nan
    g = target_set_geometry(d)
    for row, sub in zip(d, g.subtended_rad, strict=True):
        ok = row[np.isfinite(row)]
        if ok.size == 0:
            assert np.isnan(sub)
            continue
        # reference: brute force, smallest arc starting at some target covering all (common
        # practice definition of circular range, Mardia & Jupp 2000 section 2.3.3)
        arcs = [np.max(np.mod(ok - s, 2 * np.pi)) for s in ok]
        assert sub == pytest.approx(min(arcs), abs=1e-12)


def test_present_mask_restricts_set():
    d = np.array([[0.4, 0.0, -0.5]])
    g = target_set_geometry(d, present=np.array([[True, True, False]]))
    assert g.subtended_rad[0] == pytest.approx(0.4)
    assert g.bisector_rad[0] == pytest.approx(0.2)


def test_bad_shape():
    with pytest.raises(ValueError, match=r"must be \(n, n_targets\); got shape \(3,\)"):
        target_set_geometry(np.zeros(3))
