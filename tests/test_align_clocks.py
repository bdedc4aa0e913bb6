"""Trigger edges, pulse matching and the clock fit, with planted offset, drift and faults."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy import stats

from pipeline.align import (
    ClockModel,
    edge_brackets,
    fit_clock,
    interval_line,
    match_pulses,
    plane_times,
    pulses_from_timestamps,
    rising_edges,
)
from pipeline.errors import AlignmentError, InputError

OFFSET_S = 12.345
DRIFT_PPM = 50.0      # typical crystal drift 10-50 ppm: common practice (Wild et al. 2024,
                      # Movement Ecology 12:71, Table 1 lists rated drifts)


def to_rig(t_scope):
    return OFFSET_S + (1 + DRIFT_PPM * 1e-6) * np.asarray(t_scope)


def test_rising_edges_debounce_and_edge_time():
    t = np.arange(20) * 0.005
    sig = np.zeros(20)
    sig[[3, 5, 12]] = 1          # 3 and 5 are 10 ms apart: bounce with a 20 ms interval
    np.testing.assert_allclose(rising_edges(sig, t, min_interval_s=0.02), t[[3, 12]])
    np.testing.assert_allclose(rising_edges(sig, t, min_interval_s=0.0), t[[3, 5, 12]])
    mid = rising_edges(sig, t, min_interval_s=0.02, edge_time="midpoint")
    np.testing.assert_allclose(mid, t[[3, 12]] - 0.0025)
    assert rising_edges(np.array([1.0, 0.0, 1.0]), min_interval_s=0).tolist() == [0.0, 2.0]


def test_pulses_from_timestamps_sorts_merges_and_checks():
    np.testing.assert_allclose(pulses_from_timestamps([2.0, 1.0, 1.0005, 3.0]), [1.0, 2.0, 3.0])
    with pytest.raises(InputError, match=r"pulses.csv: pulse time stamp 2 \(1-based\) is nan"):
        pulses_from_timestamps([1.0, np.nan], source="pulses.csv")


def test_clean_pulses_recover_offset_and_drift_like_references(rng):
    ts = np.arange(600) / 2.0
    tp = to_rig(ts) + rng.normal(0, 1e-4, ts.size)
    model = fit_clock(tp, ts)
    # reference: numpy.polyfit and scipy.stats.theilslopes on the same pairs
    slope, icpt = np.polyfit(ts, tp, 1)
    ts_slope, ts_icpt, _, _ = stats.theilslopes(tp, ts)
    for ref_slope, ref_icpt in ((slope, icpt), (ts_slope, ts_icpt)):
        assert model.drift_ppm == pytest.approx((ref_slope - 1) * 1e6, abs=0.5)
        assert model.offset_s == pytest.approx(ref_icpt, abs=1e-4)
    assert model.offset_s == pytest.approx(OFFSET_S, abs=1e-4)
    assert model.matched == 600 and model.dropped_volume_indices == ()
    assert model.residual_rms_ms == pytest.approx(0.1, rel=0.2)


def test_one_hour_sampled_trigger_with_drops_and_spurious(rng):
    """50 ppm over an hour, trigger sampled at 200 Hz, 30 drops and 10 spurious pulses."""
    ts = np.arange(7200) / 2.0
    t_rig = np.arange(0.0, to_rig(ts[-1]) + 5, 0.005)
    sig = np.zeros(t_rig.size)
    drops = np.sort(rng.choice(7200, 30, replace=False))
    keep = np.ones(7200, bool)
    keep[drops] = False
    sig[np.searchsorted(t_rig, to_rig(ts[keep]))] = 1       # first sample after the pulse
    spur = rng.choice(t_rig.size, 10, replace=False)
    sig[spur] = 1
    edges = rising_edges(sig, t_rig, edge_time="midpoint")
    model = fit_clock(edges, ts)
    assert np.array_equal(model.dropped_volume_indices, drops)
    assert len(model.spurious_pulse_indices) == 10
    # the model's error against the planted clock is < 1 ms everywhere
    err_ms = np.abs(model.scope_to_rig(ts) - to_rig(ts)) * 1e3
    assert err_ms.max() < 1.0
    # residuals are the 200 Hz quantisation: 5 ms / sqrt(12) = 1.44 ms rms (common practice)
    assert model.residual_rms_ms == pytest.approx(5 / np.sqrt(12), rel=0.1)
    assert model.residual_max_ms < 2.6


def _sampled_trigger(rng, ts, *, drift_ppm, offset_s=7.3, drops=()):
    """A 200 Hz rig with 0.3 ms interval jitter (time stamps keep it) whose trigger column is
    high for the first sample at or after each volume start (demo_volume/README.md)."""
    true = offset_s + (1 + drift_ppm * 1e-6) * ts
    n = int((true[-1] - true[0] + 6.0) * 200)
    t_rig = true[0] - 3.0 + np.cumsum(0.005 + rng.normal(0, 3e-4, n))
    sig = np.zeros(n)
    sig[np.searchsorted(t_rig, np.delete(true, list(drops)))] = 1
    return t_rig, sig, true


@pytest.mark.parametrize(("n_volumes", "rms_max_ppm"), [(280, 1.0), (960, 0.1)])
def test_interval_fit_beats_least_squares_on_bracketed_pulses(rng, n_volumes, rms_max_ppm):
    """A planted answer: 40 ppm over the small (140 s) and default (8 min) demo sessions."""
    errs_ols, errs_int = [], []
    for _ in range(10):
        ts = np.arange(n_volumes) / 2.0
        t_rig, sig, true = _sampled_trigger(rng, ts, drift_ppm=40.0, drops=(100, 200))
        mid = rising_edges(sig, t_rig, edge_time="midpoint")
        high, low = edge_brackets(sig, t_rig)
        ols = fit_clock(mid, ts)
        model = fit_clock(mid, ts, pulse_bracket_rig_s=(low, high))
        assert model.fit == "interval" and ols.fit == "least_squares"
        assert model.dropped_volume_indices == (100, 200)
        errs_ols.append(ols.drift_ppm - 40.0)
        errs_int.append(model.drift_ppm - 40.0)
        # every volume start lies inside its bracket under the fitted model (feasible data)
        on_rig = model.scope_to_rig(np.delete(ts, [100, 200]))
        assert np.all((on_rig > low - 1e-9) & (on_rig <= high + 1e-9))
    # least squares on edge midpoints: slope SE = (5 ms / sqrt(12)) / (sqrt(n) sd(t)), ~2 ppm
    # at 140 s and ~0.35 ppm at 8 min (common practice: OLS slope standard error); the
    # brackets pin the slope several times tighter (measured: 0.43 ppm rms at 140 s over 200
    # simulated sessions, max 1.45; 0.03 ppm rms at 8 min over 30)
    rms_ols = float(np.sqrt(np.mean(np.square(errs_ols))))
    rms_int = float(np.sqrt(np.mean(np.square(errs_int))))
    assert rms_int < 0.5 * rms_ols
    assert rms_int < rms_max_ppm


def test_interval_fit_one_hour_50_ppm_with_drops(rng):
    ts = np.arange(7200) / 2.0
    drops = np.sort(rng.choice(7200, 30, replace=False))
    t_rig, sig, true = _sampled_trigger(rng, ts, drift_ppm=DRIFT_PPM, offset_s=OFFSET_S,
                                        drops=drops)
    high, low = edge_brackets(sig, t_rig)
    model = fit_clock(rising_edges(sig, t_rig, edge_time="midpoint"), ts,
                      pulse_bracket_rig_s=(low, high))
    assert np.array_equal(model.dropped_volume_indices, drops)
    assert np.abs(model.scope_to_rig(ts) - true).max() * 1e3 < 1.0
    assert model.drift_ppm == pytest.approx(DRIFT_PPM, abs=0.05)
    # residuals against the midpoints stay the 200 Hz quantisation (5 ms / sqrt(12))
    assert model.residual_rms_ms == pytest.approx(5 / np.sqrt(12), rel=0.1)


def test_interval_line_with_point_brackets_is_median_regression(rng):
    """Zero-width brackets that no line can hold: least total violation = least absolute
    deviations, checked against statsmodels QuantReg at q = 0.5."""
    import statsmodels.api as sm

    x = np.sort(rng.uniform(0, 100, 200))
    y = 3.0 + 0.5 * x + rng.laplace(0, 0.2, x.size)
    y[::25] += 5.0                                   # outliers LAD shrugs off
    fit = interval_line(x, y, y)
    assert not fit.feasible and fit.margin < 0
    ref = sm.QuantReg(y, sm.add_constant(x)).fit(q=0.5)
    loss = np.abs(y - fit.intercept - fit.slope * x).sum()
    ref_loss = np.abs(y - ref.params[0] - ref.params[1] * x).sum()
    assert loss == pytest.approx(ref_loss, rel=1e-6)       # same optimum of the L1 loss
    assert fit.violation == pytest.approx(loss, rel=1e-6)
    assert fit.slope == pytest.approx(ref.params[1], abs=2e-3)
    with pytest.raises(ValueError, match="bracket 1 has low 2.0 > high 1.0"):
        interval_line([0.0, 1.0], [0.0, 2.0], [1.0, 1.0])


def test_interval_line_centres_the_feasible_band():
    # brackets [k - 1, k + 1] around y = x: the band of feasible lines is centred on y = x
    x = np.arange(10.0)
    fit = interval_line(x, x - 1, x + 1)
    assert fit.feasible and fit.violation == 0.0
    assert fit.slope == pytest.approx(1.0) and fit.intercept == pytest.approx(0.0, abs=1e-9)
    assert fit.margin == pytest.approx(1.0)


def test_per_plane_pulses_with_flyback(rng):
    pt = plane_times(40, 10, volume_rate_hz=2.0, flyback_s=0.1)   # irregular: flyback gaps
    ev = np.sort(pt.ravel())
    tp = to_rig(ev) + rng.normal(0, 1e-4, ev.size)
    lost = rng.choice(ev.size, 20, replace=False)
    model = fit_clock(np.delete(tp, lost), ev)
    assert sorted(model.dropped_volume_indices) == sorted(lost.tolist())
    assert model.drift_ppm == pytest.approx(DRIFT_PPM, abs=5)


def test_coarse_offset_from_irregular_intervals(rng):
    ts = np.cumsum(rng.uniform(0.4, 0.6, 300))       # jittery volume starts
    tp = to_rig(ts[37:])                              # the rig missed the first 37 volumes
    match = match_pulses(tp, ts)
    assert match.first_event == 37
    assert match.event_index.tolist() == list(range(37, 300))
    model = fit_clock(tp, ts, min_match_fraction=0.8)
    assert model.dropped_volume_indices == tuple(range(37))


def test_clock_reset_is_fitted_piecewise(rng):
    ts = np.arange(400) / 2.0
    tp = to_rig(ts) + rng.normal(0, 1e-4, ts.size)
    tp[250:] -= 100.0                   # rig clock reset back by 100 s
    model = fit_clock(tp, ts)
    assert len(model.segments) == 2
    assert model.segments[1].scope_start_s == pytest.approx(ts[250])
    assert model.segments[1].offset_s == pytest.approx(OFFSET_S - 100.0, abs=1e-3)
    assert "jumps by -100000.0 ms" in model.notes[0]
    assert model.matched == 400
    np.testing.assert_allclose(model.scope_to_rig(ts), tp, atol=1e-3)
    # rig times repeat after a reset: the first stretch by default, the second on request
    np.testing.assert_allclose(model.rig_to_scope(tp[:250]), ts[:250], atol=1e-3)
    np.testing.assert_allclose(model.rig_to_scope(tp[250:], segment=1), ts[250:], atol=1e-3)


def test_jump_by_whole_periods_found_from_residual_step(rng):
    ts = np.arange(400) / 2.0
    tp = to_rig(ts) + rng.normal(0, 1e-4, ts.size)
    tp[200:] += 0.05                    # +50 ms: stays on the grid, seen in the residuals
    model = fit_clock(tp, ts)
    assert len(model.segments) == 2 and "jumps by 50.0 ms" in model.notes[0]
    assert model.residual_max_ms < 1.0


def test_too_few_matches_raises(rng):
    ts = np.arange(100) / 2.0
    tp = to_rig(ts[:50])
    with pytest.raises(AlignmentError, match=r"only 50 of 100 imaging events \(50.0%\) matched "
                       r"a trigger pulse .*sync.min_match_fraction = 0.9"):
        fit_clock(tp, ts)
    with pytest.raises(AlignmentError, match="need at least 2 pulses"):
        fit_clock(tp[:1], ts)


def test_pattern_that_matches_nothing_raises(rng):
    ts = np.cumsum(rng.uniform(0.4, 0.6, 100))
    tp = np.cumsum(rng.uniform(0.05, 0.08, 100))     # plane-rate pulses against volumes
    with pytest.raises(AlignmentError, match=r"match no stretch of the 100 imaging events"):
        match_pulses(tp, ts)


def test_model_round_trip_json(rng):
    ts = np.arange(100) / 2.0
    model = fit_clock(to_rig(ts) + rng.normal(0, 1e-4, 100), ts)
    back = ClockModel.from_dict(json.loads(json.dumps(model.to_dict())))
    assert back == model
    np.testing.assert_allclose(back.rig_to_scope(back.scope_to_rig(ts)), ts, atol=1e-9)


@settings(max_examples=500, deadline=None)
# found by Hypothesis: a spurious pulse a quarter period after a volume start was once taken
# for a clock jump of one period
@example(seed=973, drop_frac=0.0, n_spur=5, offset_s=0.0, drift_ppm=0.0)
@given(seed=st.integers(0, 2**32 - 1), drop_frac=st.floats(0.0, 0.08),
       n_spur=st.integers(0, 5), offset_s=st.floats(-100, 100),
       drift_ppm=st.floats(-100, 100))
def test_property_any_drop_pattern_below_limit_recovers_clock(seed, drop_frac, n_spur,
                                                              offset_s, drift_ppm):
    """Below 8% drops (and up to 5 spurious pulses) the planted clock is always recovered."""
    rng = np.random.default_rng(seed)
    ts = np.arange(300) / 2.0
    tp = offset_s + (1 + drift_ppm * 1e-6) * ts + rng.normal(0, 2e-4, ts.size)
    keep = rng.random(ts.size) >= drop_frac
    keep[:3] = True                      # the convention: the first pulse marks volume 0
    # spurious pulses off the grid (>= 0.1 period from any volume start): one landing on an
    # empty slot within the timing noise is indistinguishable from the missing pulse
    spur = tp[0] + (rng.integers(0, ts.size - 1, n_spur) + rng.uniform(0.1, 0.9, n_spur)) * 0.5
    tp = np.sort(np.concatenate((tp[keep], spur)))
    model = fit_clock(tp, ts, min_match_fraction=0.85)
    assert model.offset_s == pytest.approx(offset_s, abs=2e-3)
    assert model.drift_ppm == pytest.approx(drift_ppm, abs=20.0)
    assert np.abs(model.scope_to_rig(ts) - (offset_s + (1 + drift_ppm * 1e-6) * ts)).max() < 2e-3
    assert set(model.dropped_volume_indices) >= set(np.flatnonzero(~keep).tolist())


@settings(max_examples=500, deadline=None)
@given(pulses=st.lists(st.floats(-1e4, 1e4, allow_nan=False), min_size=0, max_size=60),
       n_events=st.integers(0, 40))
def test_property_arbitrary_pulses_fit_or_raise_our_error(pulses, n_events):
    ts = np.arange(n_events) / 2.0
    try:
        model = fit_clock(pulses_from_timestamps(pulses), ts)
    except AlignmentError:
        return
    assert model.matched >= 0.9 * n_events
    assert np.isfinite(model.offset_s) and np.isfinite(model.drift_ppm)
