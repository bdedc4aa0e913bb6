"""The Python results API on a synthetic store with planted values."""

from __future__ import annotations

import doctest

import dask.array as da
import numpy as np
import pytest
from test_report_synthetic import TRUTH, build_synthetic_store

import pipeline.session as session_mod
from pipeline.errors import StoreError
from pipeline.session import LabelledArray, Session, decode_table


@pytest.fixture
def sess(tmp_path, rng):
    build_synthetic_store(tmp_path / "out", rng)
    return Session.open(tmp_path / "out")


def test_traces_are_lazy_and_labelled(sess):
    dff = sess.traces("dff")
    assert isinstance(dff, LabelledArray)
    assert isinstance(dff.data, da.Array)
    assert dff.shape == (TRUTH["n_cells"], TRUTH["n_t"])
    np.testing.assert_array_equal(dff.cells, sess.cells["id"].to_numpy())
    # volume k starts at k / rate (plane 0 is sampled first in the synthetic plane times)
    np.testing.assert_allclose(dff.time_s, np.arange(TRUTH["n_t"]) / TRUTH["rate_hz"])
    raw = np.asarray(__import__("zarr").open_array(
        str(sess.root / "session.zarr/traces/dff"), mode="r")[:])
    np.testing.assert_array_equal(dff.compute(), raw)
    np.testing.assert_array_equal(dff.cell(3), raw[2])


def test_denoised_traces_round_trip(sess):
    den = sess.traces("denoised")
    assert den.name == "denoised" and den.shape == (TRUTH["n_cells"], TRUTH["n_t"])
    stored = np.asarray(__import__("zarr").open_array(
        str(sess.root / "session.zarr/traces/denoised"), mode="r")[:])
    np.testing.assert_array_equal(den.compute(), stored)


def test_behaviour_on_imaging_clock_recovers_planted_clock(sess):
    beh = sess.behaviour
    # planted: t_rig = offset + (1 + drift) t_scope with t_scope on a 20 Hz grid from 0
    t_scope = np.arange(len(beh)) / TRUTH["rig_rate_hz"]
    np.testing.assert_allclose(beh["t_s"].to_numpy(), t_scope, atol=1e-9)
    bouts = sess.bouts
    np.testing.assert_allclose(bouts["onset_s"], t_scope[[20, 200]], atol=1e-9)
    np.testing.assert_allclose(bouts["duration_s"], [0.25, 0.5])  # durations untouched
    assert sess.target_names() == ["t0", "t1"]


def test_clock_model_inverts_the_documented_model(sess):
    t = np.array([0.0, 10.0, 1000.0])
    # DEVELOPERS.md clock model: t_rig = offset_s + (1 + drift_ppm * 1e-6) * t_scope
    t_rig = TRUTH["offset_s"] + (1 + TRUTH["drift_ppm"] * 1e-6) * t
    np.testing.assert_allclose(sess.clock_model.rig_to_scope(t_rig), t, atol=1e-9)
    assert sess.clock["dropped_volume_indices"] == [7]
    splits = sess.splits
    assert {"split_s", "split_rig_s"} <= set(splits.columns)
    np.testing.assert_allclose(splits["split_s"], np.array([100, 330]) / TRUTH["rig_rate_hz"],
                               atol=1e-9)


def test_clock_and_critical_angle_errors(tmp_path, rng):
    from test_report_synthetic import _stage, build_synthetic_store

    store = build_synthetic_store(tmp_path / "out", rng, skip=("align", "behaviour"))
    _stage(store, "align", lambda s: None, info={"matched": 3})
    _stage(store, "behaviour", lambda s: None, info={})
    s = Session.open(tmp_path / "out")
    with pytest.raises(StoreError, match="stages.align.info has no 'clock'"):
        _ = s.clock_model
    with pytest.raises(StoreError, match="stages.behaviour.info has no 'critical_angle'"):
        _ = s.critical_angle


def test_tables_and_volumes(sess):
    assert len(sess.tuning) == TRUTH["n_cells"] * 4
    dec = sess.decoding
    assert dec["lag_s"].size == 14 and {"mean", "null_p95", "decoder"} <= set(dec.columns)
    assert [c for c in dec.columns if c.startswith("folds_")] == [f"folds_{i}" for i in range(5)]
    assert dec.attrs["turn_r2"]["earliest_lag_s"] == -1.5
    assert dec.attrs["null_kind"] == "trial-shuffle"
    assert dec.attrs["bout_confusion"]["confusion"] == [[10, 2], [3, 9]]
    assert sess.volumes.shape == (TRUTH["n_t"], *TRUTH["shape_zyx"])
    assert sess.labels.max() == TRUTH["n_cells"]
    assert sess.motion["flagged"].sum() == 2
    assert "align" in sess.manifest["stages"]
    assert sess.critical_angle["estimate_rad"] == 1.0
    counts, xe, ye = sess.density
    assert counts.shape == (ye.size - 1, xe.size - 1)
    assert "stages done" in repr(sess)


def test_decode_table_nested_and_missing():
    nested = {"turn": {"lags_s": [0.0, 1.0], "score": [0.1, 0.2]},
              "bout": {"lags_s": [0.0], "score": [0.3]}, "feature": "dff"}
    df = decode_table(nested)
    assert list(df["decoder"]) == ["turn", "turn", "bout"]
    assert df.attrs["feature"] == "dff"
    with pytest.raises(StoreError, match="no list of lags found"):
        decode_table({"score": [1.0]})


def test_missing_outputs_name_the_stage(tmp_path, rng):
    build_synthetic_store(tmp_path / "out", rng, skip=("tuning", "traces", "align"))
    s = Session.open(tmp_path / "out")
    with pytest.raises(StoreError, match=r"tuning is missing .*stage 'tuning'"):
        _ = s.tuning
    with pytest.raises(StoreError, match=r"traces/dff is missing; run .*stage 'traces'"):
        s.traces("dff")
    with pytest.raises(StoreError, match="kind 'dF'"):
        s.traces("dF")
    with pytest.raises(StoreError, match="stage 'align' has not run"):
        _ = s.behaviour
    with pytest.raises(StoreError, match="does not exist"):
        Session.open(tmp_path / "nowhere")


def test_readme_example_runs(tmp_path, rng, monkeypatch):
    build_synthetic_store(tmp_path / "out", rng)
    monkeypatch.chdir(tmp_path)
    test = doctest.DocTestParser().get_doctest(session_mod.README_EXAMPLE, {}, "README",
                                                None, 0)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    runner.run(test)
    assert runner.failures == 0 and runner.tries > 5
