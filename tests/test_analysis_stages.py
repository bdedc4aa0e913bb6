"""The decode and tuning stages on a small synthetic store, against the kernels run eagerly."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pipeline.align import ClockModel
from pipeline.analysis.decode import decode_continuous, lag_samples
from pipeline.analysis.regressors import (
    baseline_columns,
    sample_columns,
    tuning_regressors,
    uniform_grid,
    window_epochs,
)
from pipeline.analysis.stages import ALIGN, run_decode
from pipeline.analysis.stats import trial_shuffle_indices
from pipeline.analysis.tuning import unique_variance_test
from pipeline.analysis.tuning_stage import _epoch_splits, run_tuning
from pipeline.compute import Compute
from pipeline.config import ComputeSettings, parse_config
from pipeline.errors import StoreError
from pipeline.session import decode_table
from pipeline.store import Store
from pipeline.volumes.traces import window_samples

RATE_HZ, N_TRIALS, TRIAL_LEN, N_PLANES = 2.0, 12, 60, 2


def _settings(tmp_path: Path, **tuning):
    table = {"session": {"output": str(tmp_path / "out")},
             "imaging": {"raw": "*.tif", "voxel_size_um": [2.0, 1.0, 1.0],
                         "volume_rate_hz": RATE_HZ, "planes_per_volume": N_PLANES},
             "decode": {"lag_min_s": -2.0, "lag_max_s": 0.0, "n_null": 5, "n_folds": 3,
                        "alphas": [1.0, 100.0], "n_null_bouts": 0},
             "tuning": {"n_permutations": 499, "pre_window_s": 15.0, "post_window_s": 15.0,
                        "min_occupancy_s": 0.0, **tuning}}
    return parse_config(table, base_dir=tmp_path, check_files=False)


def _prepare(rng, settings):
    n = N_TRIALS * TRIAL_LEN
    n_cells = 40
    trial = np.repeat(np.arange(N_TRIALS), TRIAL_LEN)
    bearing = np.angle(np.exp(1j * np.cumsum(rng.normal(0, 0.4, (n, 1, 2)), axis=0)))
    bearing = np.repeat(bearing, N_PLANES, axis=1)
    turn = np.repeat(np.convolve(rng.normal(size=n), np.ones(3) / 3, "same")[:, None],
                     N_PLANES, axis=1)
    act = rng.normal(size=(n_cells, n)).astype(np.float32)
    act[:5] += np.roll(turn[:, 0], -2)[None, :]
    act[10:15] += np.cos(bearing[:, 0, 0] - 1.0)[None, :].astype(np.float32) * 2
    base = Store(settings.session.output)
    prep = base.stage_store("prep", "x", resumable=False)
    prep.write_array("traces/dff", act)
    prep.write_array(ALIGN["turn"], turn)
    prep.write_array(ALIGN["trial"], np.repeat(trial[:, None], N_PLANES, axis=1))
    prep.write_array(ALIGN["bearing"], bearing)
    plane_times = np.arange(n)[:, None] / RATE_HZ + np.arange(N_PLANES)[None, :] * 0.01
    prep.write_array(ALIGN["plane_times"], plane_times)
    # the behaviour on the rig's samples (10 Hz here; rig clock = imaging clock)
    t_rig = np.arange(n * 5) / (5 * RATE_HZ)
    prep.write_array("align/behaviour_t_scope_s", t_rig)
    prep.write_array("behaviour/bearing_rad", np.repeat(bearing[:, 0], 5, axis=0))
    prep.write_table("behaviour.parquet", pd.DataFrame({"t_rig_s": t_rig,
                                                        "trial": np.repeat(trial, 5)}))
    prep.write_table("cells.parquet", pd.DataFrame({
        "id": np.arange(1, n_cells + 1), "plane": np.arange(n_cells) % N_PLANES,
        "z_um": 0.0, "y_um": 1.0, "x_um": 2.0}))
    splits_s = (np.arange(N_TRIALS) * TRIAL_LEN + 30) / RATE_HZ
    prep.write_table("splits.parquet", pd.DataFrame({"trial": np.arange(N_TRIALS),
                                                     "split_rig_s": splits_s}))
    onsets = np.sort(rng.choice(np.arange(10, n - 10), 48, replace=False))
    prep.write_table("bouts.parquet", pd.DataFrame({
        "onset_rig_s": onsets / RATE_HZ, "angle_rad": turn[onsets, 0],
        "direction": np.where(turn[onsets, 0] > 0, "left", "right"), "trial": trial[onsets]}))
    labels = np.zeros((N_PLANES, 8, 8), np.int32)
    labels.reshape(-1)[np.arange(n_cells) * 3] = np.arange(1, n_cells + 1)
    prep.create_labels(labels, voxel_size_um=(2.0, 1.0, 1.0))
    prep.commit()
    from pipeline.align import fit_clock

    ticks = np.arange(n) / RATE_HZ  # rig clock = imaging clock here
    base.write_record("align", {"info": {"clock": fit_clock(ticks, ticks).to_dict()}})
    return base, act, turn, trial, bearing


@pytest.mark.parametrize("out_of_core", [False, True])
def test_decode_stage_matches_kernel(rng, tmp_path, monkeypatch, out_of_core):
    if out_of_core:                    # read the activity block by block from zarr
        monkeypatch.setattr("pipeline.analysis.stages.IN_MEMORY_BYTES", 0)
    settings = _settings(tmp_path)
    base, act, turn, trial, _ = _prepare(rng, settings)
    sub = base.stage_store("decode", "h", resumable=False)
    with Compute(ComputeSettings(workers=1), quiet=True) as compute:
        run_decode(settings, sub, compute)
    sub.commit()
    doc = json.loads((base.root / "decode.json").read_text())
    ds = settings.decode
    eager = decode_continuous(act.T, turn.mean(axis=1),
                              lags=lag_samples(lag_min_s=-2.0, lag_max_s=0.0, rate_hz=RATE_HZ),
                              rate_hz=RATE_HZ, alphas=ds.alphas, n_splits=3, gap=doc["gap_samples"],
                              trial_ids=trial, n_null=5)
    np.testing.assert_allclose(doc["turn_r2"]["mean"], eager.r2.mean, atol=1e-10)
    np.testing.assert_allclose(base.read_array("decode/weights")[...], eager.weights, rtol=1e-5)
    assert doc["turn_r2"]["best_lag_s"] == -1.0            # planted lead of 2 samples
    assert doc["n_bouts"] > 0 and len(doc["bout_auc"]["mean"]) == len(doc["bout_auc"]["lags_s"])
    # the results API reads it back as one row per (decoder, lag)
    df = decode_table(doc)
    assert {"turn_r2", "turn_r", "bout_auc"} <= set(df["decoder"])
    np.testing.assert_allclose(df.query("decoder == 'turn_r2'")["mean"], eager.r2.mean)
    # weights per cell: a table with positions, and painted at each cell's label voxels
    table = pd.read_parquet(base.root / "decode_weights.parquet")
    np.testing.assert_allclose(table["turn_weight"], eager.weights, rtol=1e-5)
    painted = base.read_array("decode/weight_map")[...]
    labels = base.labels()[...]
    for cell in (1, 7):
        assert np.all(painted[labels == cell] == np.float32(table.loc[cell - 1, "turn_weight"]))
    assert np.all(np.isnan(painted[labels == 0]))


def test_tuning_stage_matches_kernel(rng, tmp_path):
    settings = _settings(tmp_path)
    base, act, turn, trial, bearing = _prepare(rng, settings)
    sub = base.stage_store("tuning", "h", resumable=False)
    with Compute(ComputeSettings(workers=1), quiet=True) as compute:
        run_tuning(settings, sub, compute)
    sub.commit()
    table = pd.read_parquet(base.root / "tuning.parquet")
    assert {"cell", "target", "epoch", "preferred_rad", "selectivity", "unique_r2", "p", "q",
            "p_joint", "q_joint", "tuned", "z_um"} <= set(table.columns)
    # the kernels run eagerly on plane 0's cells, pre epoch
    ts, im = settings.tuning, settings.imaging
    t_rig = np.arange(trial.size * 5) / (5 * RATE_HZ)
    # rig times through the same clock model as the stage (identity up to rounding)
    clock = ClockModel.from_dict(base.record("align")["info"]["clock"])
    split_t = clock.rig_to_scope((np.arange(N_TRIALS) * TRIAL_LEN + 30) / RATE_HZ)
    split_s = {t: [split_t[t]] for t in range(N_TRIALS)}
    bouts = base.read_table("bouts.parquet")
    t_rig, held = uniform_grid(t_rig, np.column_stack([np.repeat(bearing[:, 0], 5, axis=0),
                                                       np.repeat(trial, 5)]))
    reg = tuning_regressors(t_rig, held[:, :-1], held[:, -1].astype(int), split_s, rise_s=im.rise_s, decay_s=im.decay_s,
                            bouts=(clock.rig_to_scope(bouts["onset_rig_s"].to_numpy()),
                                   bouts["angle_rad"].to_numpy(), np.zeros(len(bouts))),
                            leads_s=ts.nuisance_leads_s)
    plane_t = np.arange(trial.size) / RATE_HZ + 0.0
    ep = window_epochs(plane_t, trial, split_s, pre_s=15.0, post_s=15.0)
    idx = np.flatnonzero(ep != "")
    terms = sample_columns(t_rig, reg["terms"], plane_t[idx])
    e = reg["epochs"].index("pre")
    # the dF/F baseline of the motor terms sees every sample of the plane
    motor_all = sample_columns(t_rig, reg["motor"], plane_t)
    baseline = baseline_columns(motor_all, ts.nuisance_leads_s,
                                percentile=settings.traces.baseline_percentile,
                                window=window_samples(settings.traces.baseline_window_s,
                                                      RATE_HZ))
    nuis = np.concatenate([terms[:, f].reshape(idx.size, -1) for f in range(terms.shape[1])
                           if f != e] + [sample_columns(t_rig, reg["levels"], plane_t[idx])
                                         .reshape(idx.size, -1),
                                         motor_all[idx], baseline[idx]],
                          axis=1)
    rows = np.flatnonzero(np.arange(40) % N_PLANES == 0)
    eager = unique_variance_test(act[rows].T[idx], columns=terms[:, e], nuisance=nuis,
                                 perm_index=trial_shuffle_indices(trial[idx], 499, seed=0))
    got = table.query("epoch == 'pre' and target == 't0'").set_index("cell")
    np.testing.assert_allclose(got.loc[rows + 1, "p"], eager.p[0], atol=1e-12)
    np.testing.assert_allclose(got.loc[rows + 1, "p_joint"], eager.p_joint, atol=1e-12)
    tuned_cells = set(table.query("tuned and target == 't0' and epoch == 'pre'")["cell"])
    assert set(range(11, 16)) <= tuned_cells
    # the map holds each tuned cell's preferred bearing at its label voxels
    painted = base.read_array("tuning/preferred_rad")[...]
    labels = base.labels()[...]
    t0_pre = painted[0, 0]
    for cell in (11, 12):
        assert np.all(t0_pre[labels == cell] == np.float32(got.loc[cell, "preferred_rad"]))
    assert np.all(np.isnan(t0_pre[labels == 0]))


@pytest.mark.parametrize("min_trials", [N_TRIALS, N_TRIALS + 1])
def test_tuning_stage_skips_epochs_with_too_few_trials(rng, tmp_path, min_trials):
    # every trial has one split, so "pre" and "post" each hold N_TRIALS trials: they are
    # tested at min_epoch_trials = N_TRIALS and left untested (no rows) one above
    settings = _settings(tmp_path, min_epoch_trials=min_trials)
    base, *_ = _prepare(rng, settings)
    sub = base.stage_store("tuning", "h", resumable=False)
    with Compute(ComputeSettings(workers=1), quiet=True) as compute:
        run_tuning(settings, sub, compute)
    sub.commit()
    table = pd.read_parquet(base.root / "tuning.parquet")
    expected = {"pre", "post"} if min_trials <= N_TRIALS else set()
    assert set(table["epoch"]) == expected
    # the record counts the trials showing each target, and warns when they are too few
    record = sub.record_extras()
    assert record["info"]["trials_per_target"] == {"t0": N_TRIALS, "t1": N_TRIALS}
    few = [w for w in record["warnings"] if f"is shown in {N_TRIALS} trials" in w]
    assert len(few) == (2 if min_trials > N_TRIALS else 0)


@pytest.mark.parametrize(("present", "missing"), [
    ((), "align/trial"),                                   # no trials: nothing to permute
    (("trial", "plane_times"), "align/behaviour_t_scope_s"),  # no behaviour on the rig clock
])
def test_tuning_stage_names_the_missing_input(tmp_path, present, missing):
    settings = _settings(tmp_path)
    base = Store(settings.session.output)
    prep = base.stage_store("prep", "x", resumable=False)
    prep.write_array("traces/dff", np.zeros((2, 10), np.float32))
    prep.write_array(ALIGN["bearing"], np.zeros((10, 2, 2)))
    extra = {"trial": np.zeros((10, 2), np.int32), "plane_times": np.zeros((10, 2))}
    for name in present:
        prep.write_array(ALIGN[name], extra[name])
    prep.write_table("cells.parquet", pd.DataFrame({"id": [1, 2], "plane": [0, 1]}))
    prep.commit()
    sub = base.stage_store("tuning", "h", resumable=False)
    with pytest.raises(StoreError, match=f"{missing} is missing"), \
            Compute(ComputeSettings(workers=1), quiet=True) as compute:
        run_tuning(settings, sub, compute)


def test_decode_stage_without_trials_warns_about_circular_shifts(rng, tmp_path):
    import shutil

    settings = _settings(tmp_path)
    base, *_ = _prepare(rng, settings)
    shutil.rmtree(base.array_path(ALIGN["trial"]))          # a session without trials
    sub = base.stage_store("decode", "h", resumable=False)
    with Compute(ComputeSettings(workers=1), quiet=True) as compute:
        run_decode(settings, sub, compute)
    sub.commit()
    doc = json.loads((base.root / "decode.json").read_text())
    # circular shifts overstate significance on drifting signals (Harris 2020): said in the
    # document and as a stage warning for the report
    assert doc["null_kind"] == "circular-shift"
    assert "Harris 2020" in doc["null_warning"]


@pytest.mark.parametrize(("mode", "min_trials", "merged"), [
    ("merged", 8, True), ("separate", 8, False), ("auto", 3, False), ("auto", 4, True)])
def test_between_epoch_merges_into_post(mode, min_trials, merged):
    # three trials with two splits (one written out of order, one with a NaN) and one with
    # a single split; merged, each trial keeps its first split only, so window_epochs labels
    # its between samples "post" (demo_volume/README.md: "post" is after the first split)
    splits = {0: [3.0, 6.0], 1: [14.0], 2: [27.0, 23.0], 3: [33.0, np.nan, 36.0]}
    got = _epoch_splits(splits, mode, min_trials)
    if merged:
        assert {t: list(v) for t, v in got.items()} == {0: [3.0], 1: [14.0], 2: [23.0],
                                                        3: [33.0]}
    else:
        assert got is splits
    t = np.arange(10.0)
    ep = window_epochs(t, np.zeros(10, int), {0: got[0]}, pre_s=2.0, post_s=5.0)
    expected = ["between"] * 3 + ["post"] * 2 if not merged else ["post"] * 5
    assert list(ep[1:8]) == ["pre", "pre", *expected]
