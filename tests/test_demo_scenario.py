"""The demo scenario generator: determinism, file layout, and that the planted truth holds.

Files are read with tifffile and pandas directly (not with forkmap's readers), so these tests
check the generator against outside tools.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
from skimage.registration import phase_cross_correlation

from demo_volume import load_scenario
from demo_volume.generate import generate, main, verify
from pipeline.errors import ConfigError, StoreError

# A session small enough to generate twice in well under a second.
TINY = {"imaging": {"shape_zyx": [3, 24, 32], "n_volumes": 30},
        "cells": {"n_cells": 25, "min_separation_um": 4.0}}

LOG_COLUMNS = ["time_s", "x_mm", "y_mm", "heading_rad", "turn", "bout", "vigor", "trial",
               "t0_x_mm", "t0_y_mm", "t1_x_mm", "t1_y_mm", "t2_x_mm", "t2_y_mm", "trigger"]


@pytest.fixture(scope="module")
def session(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The small preset in both layouts, generated once for this module."""
    return generate(tmp_path_factory.mktemp("demo") / "small", preset="small", seed=0,
                    layout="both")


@pytest.fixture(scope="module")
def scenario(session: Path) -> dict:
    return json.loads((session / "truth" / "scenario.json").read_text())


@pytest.fixture(scope="module")
def log(session: Path) -> pd.DataFrame:
    return pd.read_csv(session / "rig_log.csv")


@pytest.fixture(scope="module")
def splits(session: Path) -> pd.DataFrame:
    return pd.read_parquet(session / "truth" / "trials.parquet")


def test_same_seed_gives_identical_files(tmp_path: Path) -> None:
    a = generate(tmp_path / "a", preset="small", seed=3, preset_overrides=TINY)
    b = generate(tmp_path / "b", preset="small", seed=3, preset_overrides=TINY)
    c = generate(tmp_path / "c", preset="small", seed=4, preset_overrides=TINY)
    sums_a = (a / "SHA256SUMS").read_text()
    assert sums_a == (b / "SHA256SUMS").read_text()
    assert sums_a != (c / "SHA256SUMS").read_text()
    assert len(sums_a.splitlines()) == 30 + 8   # 30 volumes, the log and 7 truth files
    assert verify(a)
    (a / "raw" / "vol_00007.tif").write_bytes(b"changed")
    assert not verify(a)


def test_regenerating_replaces_previous_output(tmp_path: Path) -> None:
    out = generate(tmp_path / "s", preset="small", seed=1, preset_overrides=TINY)
    first = (out / "SHA256SUMS").read_text()
    generate(out, preset="small", seed=1, preset_overrides=TINY, layout="stack")
    assert not (out / "raw").exists() and (out / "raw_stack" / "stack.tif").is_file()
    assert (out / "SHA256SUMS").read_text() != first


def test_per_volume_tiffs(session: Path, scenario: dict) -> None:
    n_t, n_z, n_y, n_x = scenario["shape_tzyx"]
    files = sorted((session / "raw").glob("vol_*.tif"))
    assert [f.name for f in files] == [f"vol_{k:05d}.tif" for k in range(n_t)]
    with tifffile.TiffFile(files[5]) as tif:
        assert len(tif.pages) == n_z
        vol = tif.asarray()
    assert vol.shape == (n_z, n_y, n_x) and vol.dtype == np.uint16
    # camera offset 100 ADU: dark voxels sit near it, brain voxels above it
    assert 90 < np.percentile(vol, 1) < 130 and vol.max() > 300


def test_stack_holds_the_same_pixels(session: Path, scenario: dict) -> None:
    n_t, n_z, n_y, n_x = scenario["shape_tzyx"]
    with tifffile.TiffFile(session / "raw_stack" / "stack.tif") as tif:
        assert tif.is_bigtiff
        assert len(tif.pages) == n_t * n_z
        stack = tif.asarray()
    per_volume = np.stack([tifffile.imread(f) for f in sorted((session / "raw").glob("*.tif"))])
    np.testing.assert_array_equal(stack.reshape(n_t, n_z, n_y, n_x), per_volume)


def test_rig_log_columns_and_sampling(log: pd.DataFrame, session: Path) -> None:
    clock = json.loads((session / "truth" / "clock.json").read_text())
    assert list(log.columns) == LOG_COLUMNS
    dt = np.diff(log["time_s"].to_numpy())
    assert dt.min() > 0
    assert np.median(dt) == pytest.approx(0.005, abs=2e-4)          # 200 Hz nominal
    assert 0 < dt.std() < 1e-3                                        # jitter kept
    assert log["time_s"].iat[0] < clock["offset_s"] - 1.0            # starts before imaging
    h = log["heading_rad"].to_numpy()
    assert h.min() > -np.pi and h.max() <= np.pi
    between = log[log["trial"] == -1]
    assert between[["t0_x_mm", "t1_x_mm", "t2_x_mm"]].isna().all().all()
    quiet = log[log["bout"] == 0]
    assert (quiet["turn"] == 0).all() and (quiet["vigor"] == 0).all()
    assert (log.loc[log["bout"] == 1, "turn"] != 0).all()


def test_triggers_fit_the_planted_clock(log: pd.DataFrame, session: Path,
                                        scenario: dict) -> None:
    clock = json.loads((session / "truth" / "clock.json").read_text())
    n_vol = scenario["shape_tzyx"][0]
    trig = log["trigger"].to_numpy()
    rising = np.flatnonzero(np.diff(trig) > 0) + 1
    falling = np.flatnonzero(np.diff(trig) < 0) + 1
    assert np.all(falling - rising == 1)                              # one rig sample high
    dropped = clock["dropped_trigger_volumes"]
    assert 1 <= len(dropped) <= 2
    assert rising.size == n_vol - len(dropped)
    volumes = np.setdiff1d(np.arange(n_vol), dropped)
    t_scope = volumes / scenario["volume_rate_hz"]
    slope, intercept = np.polyfit(t_scope, log["time_s"].to_numpy()[rising], 1)
    # The edge lags the true volume start by U(0, 1 rig sample); the slope's standard error is
    # then (5 ms / sqrt(12)) / (sqrt(n) * sd(t)) (least squares, common practice): ~2 ppm here.
    se_ppm = 0.005 / np.sqrt(12) / (np.sqrt(t_scope.size) * t_scope.std()) * 1e6
    assert abs((slope - 1) * 1e6 - clock["drift_ppm"]) < 4 * se_ppm
    assert 0.0 <= intercept - clock["offset_s"] < 0.005               # within one rig sample


def test_heading_integrates_turn(log: pd.DataFrame, session: Path) -> None:
    bouts = pd.read_parquet(session / "truth" / "bouts.parquet")
    t = log["time_s"].to_numpy()
    worst = 0.0
    for _, trial in log[log["trial"] >= 0].groupby("trial"):
        idx = trial.index.to_numpy()
        heading = np.unwrap(trial["heading_rad"].to_numpy())
        integral = np.concatenate([[0.0], np.cumsum(trial["turn"].to_numpy()[:-1]
                                                    * np.diff(t[idx]))])
        worst = max(worst, float(np.max(np.abs(heading - heading[0] - integral))))
    assert worst < 2e-3                                               # CSV keeps 6 decimals
    # each bout's signed angle is the integral of the turn column over its samples
    onsets = np.searchsorted(t, bouts["onset_rig_s"].to_numpy() - 1e-7)
    offsets = np.searchsorted(t, bouts["offset_rig_s"].to_numpy() - 1e-7)
    dt = np.diff(t, append=t[-1])
    turn = log["turn"].to_numpy()
    angle = [np.sum(turn[a:b + 1] * dt[a:b + 1]) for a, b in zip(onsets, offsets, strict=True)]
    np.testing.assert_allclose(angle, bouts["turn_rad"], atol=1e-4)
    assert np.count_nonzero(np.diff(log["bout"].to_numpy()) > 0) == len(bouts)


def _subtended_deg(row: pd.Series, targets: list[int]) -> float:
    """Largest angle between targets seen from the animal (plain numpy geometry)."""
    d = [np.arctan2(row[f"t{k}_y_mm"] - row["y_mm"], row[f"t{k}_x_mm"] - row["x_mm"])
         for k in targets]
    pair = [abs(np.angle(np.exp(1j * (a - b)))) for i, a in enumerate(d) for b in d[i + 1:]]
    return float(np.rad2deg(max(pair)))


def test_splits_happen_at_the_critical_angle(log: pd.DataFrame, splits: pd.DataFrame,
                                             scenario: dict) -> None:
    crit = scenario["critical_angle_deg"]
    assert splits["subtended_deg"].between(crit, crit + 2.0).all()
    t = log["time_s"].to_numpy()
    for _, s in splits.iterrows():
        i = int(np.argmin(np.abs(t - s["t_split_rig_s"])))
        row = log.iloc[i]
        assert row["trial"] == s["trial"]
        present = [k for k in range(3) if np.isfinite(row[f"t{k}_x_mm"])]
        assert len(present) == s["n_targets"]
        if s["split_index"] == 1:
            first = splits[(splits["trial"] == s["trial"]) & (splits["split_index"] == 0)]
            present.remove(int(first["dropped_target"].iat[0]))
        # the rule switched at this sample: above the critical angle here, not one sample before
        assert _subtended_deg(row, present) == pytest.approx(s["subtended_deg"], abs=1e-3)
        assert _subtended_deg(log.iloc[i - 1], present) <= crit + 1e-4
        if s["chosen_target"] == -1:   # the trial ended (log end, arrival) before a choice
            assert s["split_index"] == splits.loc[splits["trial"] == s["trial"],
                                                  "split_index"].max()
        else:
            assert s["chosen_target"] in present
    assert (splits["chosen_target"] >= 0).mean() > 0.8


def test_enough_planted_events_for_statistics(session: Path, splits: pd.DataFrame) -> None:
    bouts = pd.read_parquet(session / "truth" / "bouts.parquet")
    cells = pd.read_parquet(session / "truth" / "cells.parquet")
    assert splits["trial"].nunique() >= 8
    assert (splits["n_targets"] == 3).any() and splits["has_moving_target"].any()
    assert len(bouts) >= 100
    assert (bouts["turn_rad"] > 0).sum() >= 40 and (bouts["turn_rad"] < 0).sum() >= 40
    counts = cells["cell_class"].value_counts()
    assert counts["bearing"] >= 40 and counts["premotor"] >= 20 and counts["vigor"] >= 10
    bearing = cells[cells["cell_class"] == "bearing"]
    assert set(bearing["epoch"]) == {"pre", "post", "both"}
    assert set(bearing["target"]) == {0, 1}
    assert set(cells.loc[cells["cell_class"] == "premotor", "side"]) == {"left", "right"}
    assert (cells.loc[cells["cell_class"] == "untuned", "target"] == -1).all()


def test_bearing_cells_prefer_a_bearing_their_target_takes_in_their_epoch(
        log: pd.DataFrame, session: Path, splits: pd.DataFrame) -> None:
    # a preference the target never takes in the epoch would leave the cell silent there:
    # "both" cells draw theirs before the split (the narrower range), so they are tuned in both
    cells = pd.read_parquet(session / "truth" / "cells.parquet")
    first = splits[splits["split_index"] == 0].set_index("trial")["t_split_rig_s"]
    inside = log[log["trial"] >= 0]
    t_split = inside["trial"].map(first).fillna(np.inf).to_numpy()
    before = inside["time_s"].to_numpy() < t_split
    bearing = {k: np.angle(np.exp(1j * (np.arctan2(inside[f"t{k}_y_mm"] - inside["y_mm"],
                                                   inside[f"t{k}_x_mm"] - inside["x_mm"])
                                        - inside["heading_rad"]))) for k in range(3)}
    tuned = cells[cells["cell_class"] == "bearing"]
    for r in tuned.itertuples():
        b = bearing[int(r.target)]
        seen = b[(before if r.epoch in ("pre", "both") else ~before) & np.isfinite(b)]
        gap = np.abs(np.angle(np.exp(1j * (seen - r.pref_bearing_rad)))).min()
        assert np.degrees(gap) < 2.0, (r.id, r.epoch)


def test_moving_target_follows_a_smooth_path(log: pd.DataFrame, splits: pd.DataFrame) -> None:
    trial = int(splits.loc[splits["has_moving_target"], "trial"].iat[0])
    rows = log[log["trial"] == trial]
    spread = [rows[f"t{k}_x_mm"].std() + rows[f"t{k}_y_mm"].std() for k in range(3)]
    assert np.nanmax(spread) > 0.5
    k = int(np.nanargmax(spread))
    step = np.hypot(np.diff(rows[f"t{k}_x_mm"]), np.diff(rows[f"t{k}_y_mm"]))
    assert step.max() < 0.05                                          # < 10 mm/s, no jumps


def test_truth_tables(session: Path, scenario: dict) -> None:
    n_t, n_z = scenario["shape_tzyx"][:2]
    cells = pd.read_parquet(session / "truth" / "cells.parquet")
    activity = np.load(session / "truth" / "activity.npy")
    shifts = pd.read_parquet(session / "truth" / "shifts.parquet")
    assert activity.shape == (len(cells), n_t) and activity.dtype == np.float32
    assert list(shifts.columns) == ["t", "dz_vox", "dy_vox", "dx_vox"]
    assert shifts[["dy_vox", "dx_vox"]].abs().max().max() < 3.0
    assert shifts["dz_vox"].abs().max() <= 0.3 + 1e-12
    assert cells["z_vox"].between(0, n_z - 1).all()
    assert scenario["plane_period_s"] == pytest.approx((0.5 - 0.05) / n_z)
    for key in ("critical_angle_deg", "indicator", "class_fractions", "premotor_lead_s",
                "voxel_size_um", "flyback_s"):
        assert key in scenario


def test_planted_shift_sign_matches_phase_correlation(session: Path) -> None:
    shifts = pd.read_parquet(session / "truth" / "shifts.parquet")
    s = shifts[["dz_vox", "dy_vox", "dx_vox"]].to_numpy()
    k = int(np.argmax(np.hypot(s[:, 1] - s[0, 1], s[:, 2] - s[0, 2])))
    files = sorted((session / "raw").glob("*.tif"))
    ref = np.mean([tifffile.imread(f) for f in files[:3]], axis=0)
    mov = np.mean([tifffile.imread(f) for f in files[k - 1:k + 2]], axis=0)
    est, _, _ = phase_cross_correlation(ref, mov, upsample_factor=20)
    # reference: skimage.registration.phase_cross_correlation returns the shift that registers
    # the moving image, i.e. minus the content displacement
    planted = s[k - 1:k + 2].mean(axis=0) - s[:3].mean(axis=0)
    np.testing.assert_allclose(-est[1:], planted[1:], atol=0.25)


def test_pixels_carry_the_planted_activity(session: Path) -> None:
    cells = pd.read_parquet(session / "truth" / "cells.parquet")
    activity = np.load(session / "truth" / "activity.npy")
    shifts = pd.read_parquet(session / "truth" / "shifts.parquet")
    vol = np.stack([tifffile.imread(f) for f in sorted((session / "raw").glob("*.tif"))])
    s = shifts[["dz_vox", "dy_vox", "dx_vox"]].to_numpy()
    bright = cells.nlargest(20, "brightness")
    corr = []
    for _, c in bright.iterrows():
        z = np.clip(np.round(c["z_vox"] + s[:, 0]).astype(int), 0, vol.shape[1] - 1)
        y = np.round(c["y_vox"] + s[:, 1]).astype(int)
        x = np.round(c["x_vox"] + s[:, 2]).astype(int)
        trace = vol[np.arange(len(vol)), z, y, x].astype(float)
        corr.append(np.corrcoef(trace, activity[int(c["id"])])[0, 1])
    assert np.median(corr) > 0.6


def test_bad_preset_layout_and_keys_are_refused(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="preset 'huge' not found"):
        load_scenario("huge")
    with pytest.raises(ConfigError, match=r"layout = 'tiles': expected one of"):
        generate(tmp_path, layout="tiles")
    with pytest.raises(ConfigError, match="unknown key imaging.n_vols"):
        load_scenario("small", overrides={"imaging": {"n_vols": 3}})
    with pytest.raises(ConfigError, match="unknown section 'optics'"):
        load_scenario("small", overrides={"optics": {}})
    with pytest.raises(ConfigError, match="n_volumes = 2.5: expected a whole number"):
        load_scenario("small", overrides={"imaging": {"n_volumes": 2.5}})
    with pytest.raises(ConfigError, match=r"shape_zyx = \[3, 4\]: expected 3 values"):
        load_scenario("small", overrides={"imaging": {"shape_zyx": [3, 4]}})
    with pytest.raises(ConfigError, match="seed = -1"):
        load_scenario("small", seed=-1)


def test_too_many_cells_is_refused(tmp_path: Path) -> None:
    crowded = {"imaging": {"shape_zyx": [2, 16, 16], "n_volumes": 4},
               "cells": {"n_cells": 60}}
    with pytest.raises(ConfigError, match=r"cells.n_cells = 60: only \d+ nuclei fit"):
        generate(tmp_path, preset="small", preset_overrides=crowded)


def test_foreign_raw_folder_is_not_deleted(tmp_path: Path) -> None:
    (tmp_path / "raw").mkdir()
    (tmp_path / "raw" / "scan_001.tif").write_bytes(b"precious")
    with pytest.raises(StoreError, match="did not write"):
        generate(tmp_path, preset="small", preset_overrides=TINY)
    assert (tmp_path / "raw" / "scan_001.tif").read_bytes() == b"precious"


def test_command_line(tmp_path: Path, session: Path, capsys: pytest.CaptureFixture) -> None:
    assert main(["--out", str(session), "--check"]) == 0
    assert main(["--out", str(tmp_path / "none"), "--check"]) == 1
    assert main(["--out", str(tmp_path / "x"), "--preset", "huge"]) == 2
    assert "preset 'huge' not found" in capsys.readouterr().err
