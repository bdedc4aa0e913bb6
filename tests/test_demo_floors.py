"""The issues' floors on the demo as ``make demo`` runs it: default preset, ``configs/demo.toml``.

The small preset (``test_end_to_end.py``) keeps the suite quick and checks every output; this
module runs the full demo config once (about 1.5 min of pipeline on 2 cores) and checks the
recovery floors that the issues state "on the demo". Floors not reached are strict xfails with
the measured figure in the reason, so they turn into failures the day they are reached.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from demo_session import demo_config
from demo_truth import (
    bout_interval_s,
    corr_rows,
    match_cells,
    shift_rms_vox,
    split_errors_s,
    tuning_recovery,
)

from pipeline.cli import main
from pipeline.session import Session

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def run(demo_default_data: Path, tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("floors")
    cfg = demo_config(demo_default_data, folder / "out", folder)   # configs/demo.toml as is
    assert main(["--quiet", "run", str(cfg)]) == 0
    truth = demo_default_data / "truth"
    return {"out": folder / "out", "truth": truth, "session": Session.open(folder / "out"),
            "clock": json.loads((truth / "clock.json").read_text())}


# ---- imaging (issue 4) ----------------------------------------------------------------------
def test_motion_and_cells(run):
    store, truth = run["session"].store, run["truth"]
    assert shift_rms_vox(store, truth) < 0.1            # floor < 0.1 voxel; measured 0.038
    planted, cells, ok, idx, _ = match_cells(store, truth)
    assert len(set(idx[ok])) / len(planted) > 0.95      # floor > 95 %; measured 98.8 %
    assert (~ok).mean() < 0.05                          # floor < 5 % false; measured 0.09 %


def test_denoised_trace_correlation(run):
    store, truth = run["session"].store, run["truth"]
    _, _, ok, idx, _ = match_cells(store, truth)
    activity = np.load(truth / "activity.npy")[idx[ok]].astype(np.float64)
    den = np.asarray(store.read_array("traces/denoised")[...], np.float64)[ok]
    dff = np.asarray(store.read_array("traces/dff")[...], np.float64)[ok]
    # floor > 0.9 for the median cell; measured 0.950 denoised, 0.840 for dF/F itself
    assert np.median(corr_rows(den, activity)) > 0.9
    assert np.median(corr_rows(dff, activity)) > 0.8


# ---- clock and behaviour (issue 5) ----------------------------------------------------------
def test_clock(run):
    clock, truth = run["session"].clock, run["clock"]
    assert abs(clock["drift_ppm"] - truth["drift_ppm"]) < 1.0     # floor 1 ppm; measured 0.09
    assert abs(clock["offset_s"] - truth["offset_s"]) < 5e-3       # one rig sample (5 ms)
    assert sorted(clock["dropped_volume_indices"]) == sorted(truth["dropped_trigger_volumes"])


def test_critical_angle(run):
    crit = run["session"].critical_angle
    # planted 100 deg (demo_volume/README.md), floor within 5 deg; measured 100.0 (99.7-104.0)
    assert abs(np.degrees(crit["estimate_rad"]) - 100.0) < 5.0
    assert crit["ci_low_rad"] <= np.radians(100.0) <= crit["ci_high_rad"]


def test_splits_within_one_bout_interval(run):
    # floor 90% (issue 5). Measured 97% of the 32 planted splits (96% of 26 when the demo
    # showed three targets in 30 % of trials, and there 85% with the steering alone,
    # before the critical-angle prior); seeds 1 and 2 88% and 94% (then 94% and 88%)
    assert np.mean(split_errors_s(run) <= bout_interval_s(run["truth"])) >= 0.9


# ---- decoding (issue 6) ---------------------------------------------------------------------
def test_decoders(run):
    doc = run["session"].decoding_summary
    cells = pd.read_parquet(run["truth"] / "cells.parquet")
    lead_s = float(cells.loc[cells["cell_class"] == "premotor", "lead_s"].median())
    # planted premotor lead recovered within one volume; measured best lag -1.5 s
    assert abs(doc["turn_r2"]["best_lag_s"] + lead_s) <= 1.0 / doc["rate_hz"] + 1e-9
    assert max(doc["bout_auc"]["mean"]) > 0.8                   # floor 0.8; measured 0.931


# ---- tuning (issue 7) -----------------------------------------------------------------------
def test_tuning_floors(run):
    r = tuning_recovery(run)
    # measured (1,000 permutations; split-aligned trial swap within trials showing the same
    # targets; dF/F baseline without the samples of activity; epochs cut at each trial's
    # first split; a target named only when the evidence over the session and within trials
    # agrees; splits re-timed with the critical-angle prior; dF/F baseline terms in the
    # motor nuisance): sensitivity 0.971, false discovery proportion 0.035, median error
    # 8 deg, 95 % of found keys within 20 deg (seeds 1-4: 0.977 / 0.039, 0.977 / 0.069,
    # 0.963 / 0.031, 0.955 / 0.040; seed 2 is above 0.05). Floors of issue 7: sensitivity
    # 0.9 at a false-discovery rate of 0.05, preferred bearing within 20 deg
    assert r["sensitivity"] >= 0.9 and r["fdr"] <= 0.05
    assert r["median_err_deg"] <= 20.0
    assert r["within_20"] >= 0.8


def test_tuning_null_calibrated_on_planted_activity(run, demo_default_data: Path,
                                                    tmp_path_factory: pytest.TempPathFactory):
    # The demo's own design (its trials, splits, bearings and bouts, the stage's model and
    # null) with the dF/F of every detected cell replaced by its planted activity plus white
    # noise of sd 0.08 (the demo's residual noise, demo_volume/README.md), so no trace
    # artefact is left: the untuned cells carry no bearing tuning, and the stage's
    # p-values for them must be uniform. Judged against binomial(n, alpha) at its 99.9th
    # percentile (scipy.stats.binom), and Benjamini-Hochberg at q = 0.05 (Benjamini &
    # Hochberg 1995) should flag at most 5 % of them. Measured in this setting with another
    # noise draw (seed 0, split-aligned swap, share of p <= 0.05 / 0.01): post 0.039 / 0.006,
    # pre 0.048 / 0.008 (seeds 1-4: 0.037-0.063 / 0.003-0.011 and 0.035-0.063 / 0.005-0.027);
    # on the demo before stop 14 the re-concatenation null gave 0.058 / 0.019 and 0.056 /
    # 0.011 on this seed (within these bounds) and up to 0.088 / 0.035 on others
    # (DEVELOPERS.md).
    import shutil

    import scipy.stats
    import zarr
    from scipy.spatial import cKDTree

    folder = tmp_path_factory.mktemp("planted")
    out = folder / "out"
    shutil.copytree(run["out"], out)
    cells = Session.open(out).cells
    truth = pd.read_parquet(run["truth"] / "cells.parquet")
    pos = ["z_um", "y_um", "x_um"]
    dist, idx = cKDTree(truth[pos].to_numpy()).query(cells[pos].to_numpy())
    matched = dist < 3.0
    activity = np.load(run["truth"] / "activity.npy")
    rng = np.random.default_rng(7)
    planted = np.where(matched[:, None], activity[idx], 0.0)
    planted = planted + rng.normal(0.0, 0.08, planted.shape)
    dff = zarr.open_array(str(out / "session.zarr" / "traces" / "dff"), mode="r+")
    dff[...] = planted.astype(np.float32)
    cfg = demo_config(demo_default_data, out, folder)
    assert main(["--quiet", "run", str(cfg), "--only", "tuning", "--force"]) == 0
    tun = Session.open(out).tuning
    untuned = set(cells["id"].to_numpy()[matched & (truth["cell_class"].to_numpy()[idx]
                                                    == "untuned")])
    per_cell = tun[tun["cell"].isin(untuned)].drop_duplicates(["cell", "epoch"])
    assert len(per_cell) > 500
    for epoch, g in per_cell.groupby("epoch"):
        n = len(g)
        for alpha in (0.05, 0.01):
            bound = scipy.stats.binom.ppf(0.999, n, alpha) / n
            assert np.mean(g["p_joint"] <= alpha) <= bound, (epoch, alpha)
    flagged = tun[tun["cell"].isin(untuned) & (tun["tuned"] | tun["ambiguous"])]
    assert flagged[["cell", "epoch"]].drop_duplicates().shape[0] <= 0.05 * len(per_cell)
