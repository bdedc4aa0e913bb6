"""Per-plane sample times from plane order, plane period, flyback or time stamps."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.align import acquisition_rank, plane_period, plane_times
from pipeline.errors import ConfigError, InputError


def test_plane_period_formula():
    # (1/volume_rate - flyback) / n_planes, worked by hand: (0.5 - 0.1) / 40 = 0.01 s
    assert plane_period(2.0, 40, flyback_s=0.1) == pytest.approx(0.01)
    with pytest.raises(ConfigError, match=r"imaging.flyback_s = 0.6: expected 0 <= flyback_s <"
                       r" the volume period 0.5 s"):
        plane_period(2.0, 40, flyback_s=0.6)


def test_orders():
    asc = plane_times(2, 4, volume_rate_hz=1.0)
    np.testing.assert_allclose(asc, [[0, 0.25, 0.5, 0.75], [1, 1.25, 1.5, 1.75]])
    desc = plane_times(2, 4, volume_rate_hz=1.0, plane_order="descending")
    np.testing.assert_allclose(desc[0], [0.75, 0.5, 0.25, 0.0])
    alt = plane_times(3, 4, volume_rate_hz=1.0, flyback_s=0.2, plane_order="alternating")
    np.testing.assert_allclose(alt[0], [0, 0.2, 0.4, 0.6])
    np.testing.assert_allclose(alt[1], [1.6, 1.4, 1.2, 1.0])
    np.testing.assert_allclose(alt[2], [2, 2.2, 2.4, 2.6])
    assert acquisition_rank(2, 3, plane_order="alternating").tolist() == [[0, 1, 2], [2, 1, 0]]
    with pytest.raises(ConfigError, match=r"imaging.plane_order = 'spiral'"):
        acquisition_rank(2, 3, plane_order="spiral")  # type: ignore[arg-type]


def test_volume_starts_and_explicit_period(rng):
    starts = np.cumsum(rng.uniform(0.49, 0.51, 10))
    pt = plane_times(10, 5, volume_start_s=starts)
    np.testing.assert_allclose(pt[:, 0], starts)
    # plane period from the median volume interval (no flyback)
    np.testing.assert_allclose(np.diff(pt, axis=1), np.median(np.diff(starts)) / 5)
    pt2 = plane_times(10, 5, volume_start_s=starts, plane_period_s=0.01)
    np.testing.assert_allclose(pt2[:, 4] - pt2[:, 0], 0.04)


def test_timestamps_in_acquisition_order_are_reordered_to_z():
    acq = np.array([[0.0, 0.1, 0.2], [1.0, 1.1, 1.2]])
    out = plane_times(2, 3, plane_timestamps_s=acq, plane_order="descending")
    np.testing.assert_allclose(out, [[0.2, 0.1, 0.0], [1.2, 1.1, 1.0]])


def test_bad_timestamps():
    with pytest.raises(InputError, match=r"t.csv: 5 time stamps; expected n_volumes x n_planes"
                       r" = 2 x 3 = 6"):
        plane_times(2, 3, plane_timestamps_s=np.arange(5.0), source="t.csv")
    with pytest.raises(InputError, match=r"time stamp 3 \(1-based\) is nan"):
        plane_times(1, 3, plane_timestamps_s=[0.0, 1.0, np.nan])
    with pytest.raises(InputError, match=r"time stamp 3 \(1-based, 0.5 s\) does not follow 1.0 s"):
        plane_times(1, 3, plane_timestamps_s=[0.0, 1.0, 0.5])
    with pytest.raises(InputError, match=r"3 volume start times; expected 2"):
        plane_times(2, 3, volume_start_s=[0.0, 1.0, 2.0])
    with pytest.raises(ConfigError, match=r"a volume rate or volume start times are needed"):
        plane_times(2, 3)
    with pytest.raises(ConfigError, match=r"cannot derive the plane period from a single"):
        plane_times(1, 3, volume_start_s=[0.0])
