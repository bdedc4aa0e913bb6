"""Turn events from the turn command or the heading velocity."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.behaviour import detect_turns, heading_velocity

RATE_HZ = 200.0


def planted(rng: np.random.Generator):
    """A command with three planted turns (left, right, left) and small noise."""
    t = np.arange(0, 10, 1 / RATE_HZ)
    w = rng.normal(0, 0.05, t.size)
    events = [(1.0, 0.1, 4.0), (3.0, 0.15, -6.0), (6.0, 0.08, 3.0)]   # onset, dur, rate
    for on, dur, rate in events:
        w[(t >= on) & (t < on + dur - 1e-9)] = rate
    return t, w, events


def test_turn_events_from_command(rng):
    t, w, events = planted(rng)
    df = detect_turns(t, w, vigor=np.ones_like(t), trial=np.zeros(t.size, int))
    assert len(df) == 3
    for (on, dur, rate), row in zip(events, df.itertuples(), strict=True):
        assert row.onset_s == pytest.approx(on, abs=1 / RATE_HZ)
        assert row.duration_s == pytest.approx(dur - 1 / RATE_HZ, abs=1 / RATE_HZ)
        # integral of a constant rate over its duration (rectangle rule, exact here)
        assert row.angle_rad == pytest.approx(rate * dur, rel=0.02)
        assert row.peak_rad_s == pytest.approx(rate)
        assert row.direction == ("left" if rate > 0 else "right")
        assert row.vigor == pytest.approx(1.0)


def test_turn_events_from_heading_when_no_command(rng):
    t, w, events = planted(rng)
    heading = np.cumsum(w) / RATE_HZ + 3.0          # crosses +pi: unwrap must handle it
    heading = np.angle(np.exp(1j * heading))
    # reference: numpy.gradient of the unwrapped heading recovers the rate
    np.testing.assert_allclose(heading_velocity(t, heading)[50:60], w[50:60], atol=0.2)
    df = detect_turns(t, None, heading_rad=heading)
    assert len(df) == 3
    np.testing.assert_allclose(df["angle_rad"], [r * d for _, d, r in events], rtol=0.1)


def test_merge_and_minimum_duration():
    t = np.arange(0, 2, 1 / RATE_HZ)
    w = np.zeros(t.size)
    w[(t >= 0.5) & (t < 0.6)] = 2.0
    w[(t >= 0.62) & (t < 0.7)] = 2.0   # 20 ms gap < 50 ms: merged
    w[(t >= 1.5) & (t < 1.51)] = 2.0   # 10 ms: shorter than 20 ms, dropped
    df = detect_turns(t, w)
    assert len(df) == 1
    assert df.onset_s[0] == pytest.approx(0.5) and df.offset_s[0] == pytest.approx(0.695)


def test_nested_opposite_sign_blip_keeps_its_own_peak():
    t = np.arange(0, 1, 1 / RATE_HZ)
    w = np.zeros(t.size)
    w[40:60] = 2.0
    w[62:70] = -9.0        # a right blip inside a gap of the left event
    w[72:90] = 2.0
    df = detect_turns(t, w, min_gap_s=0.1)
    assert df["direction"].tolist() == ["left", "right"]
    assert df["peak_rad_s"].tolist() == [2.0, -9.0]


def test_needs_command_or_heading():
    with pytest.raises(ValueError, match="needs turn_rad_s"):
        detect_turns(np.arange(3.0), np.array([np.nan, 0, 0]))


def test_sin2_turn_integral_recovered_with_hysteresis():
    """A sin^2 rate profile whose forward-step sum equals the planted angle (demo rig rule)."""
    t = np.arange(0, 3, 1 / RATE_HZ)
    w = np.zeros(t.size)
    on, n = 200, 60                                  # 0.3 s bout
    prof = np.sin(np.pi * (np.arange(n) + 0.5) / n) ** 2
    angle = np.deg2rad(-25.0)
    w[on:on + n] = angle * prof / (prof.sum() / RATE_HZ)
    df = detect_turns(t, w)
    assert len(df) == 1
    # reference: the planted angle, sum(turn[i] * (t[i+1] - t[i])) over the bout
    assert df.angle_rad[0] == pytest.approx(angle, rel=1e-3)
    # the first and last samples of sin^2 lie below the release level: within 15 ms
    assert df.onset_index[0] <= on + 3 and df.offset_index[0] >= on + n - 4
    assert df.direction[0] == "right"


def test_bout_flag_defines_events_when_logged():
    t = np.arange(0, 2, 1 / RATE_HZ)
    w = np.zeros(t.size)
    flag = np.zeros(t.size)
    flag[100:150] = 1                                 # a straight swim: no turn at all
    flag[300:340] = 1
    w[300:340] = 0.5
    df = detect_turns(t, w, bout=flag)
    assert df.onset_index.tolist() == [100, 300]
    assert df.angle_rad.tolist() == pytest.approx([0.0, 0.5 * 40 / RATE_HZ])
    assert df.direction.tolist() == ["left", "left"]


def test_no_events():
    df = detect_turns(np.arange(10.0), np.zeros(10))
    assert df.empty and list(df.columns)[:2] == ["onset_s", "offset_s"]
