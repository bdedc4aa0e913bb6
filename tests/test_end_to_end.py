"""The whole pipeline on the small demo session, checked against the planted truth.

One run per module (``forkmap run`` through :func:`pipeline.cli.main`), with reduced null
counts so the module stays within a few minutes on two busy cores. Each check states its
tolerance and where it comes from; targets the pipeline does not reach yet are kept as strict
xfail tests with the measured value in the reason, so they turn into failures (XPASS) the day
they are reached and cannot be forgotten.
"""

from __future__ import annotations

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from demo_session import demo_config
from demo_truth import bout_interval_s, split_errors_s, tuning_recovery
from scipy.spatial import cKDTree

from pipeline.cli import main
from pipeline.session import Session

pytestmark = pytest.mark.slow

#: reduced-cost analysis settings for the test run (replacing the demo config's values)
REDUCED = {"decode": {"n_null": 20, "n_null_bouts": 2}, "tuning": {"n_permutations": 1000}}


@pytest.fixture(scope="module")
def run(demo_small_data: Path, tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("e2e")
    cfg = demo_config(demo_small_data, folder / "out", folder, overrides=REDUCED)
    assert main(["--quiet", "run", str(cfg)]) == 0
    truth = demo_small_data / "truth"
    return {"cfg": cfg, "out": folder / "out", "truth": truth,
            "session": Session.open(folder / "out"),
            "clock": json.loads((truth / "clock.json").read_text())}


# ---- clock ----------------------------------------------------------------------------------
def _drift_se_ppm(s: Session) -> float:
    """Least-squares standard error of the fitted drift from the fit's own residual RMS."""
    clock = s.clock
    t = s.time_s
    # slope SE = sigma / (sqrt(n) * sd(t)) (common practice: ordinary least squares)
    return 1e6 * clock["residual_rms_ms"] * 1e-3 / (np.sqrt(clock["matched"]) * np.std(t))


def test_clock_recovers_planted_offset_drift_and_dropped_pulses(run):
    s, truth = run["session"], run["clock"]
    clock = s.clock
    # offset: rig samples are 5 ms apart and edges lag the true start by 0-5 ms
    # (demo_volume/README.md), so within one rig sample
    assert abs(clock["offset_s"] - truth["offset_s"]) < 5e-3
    # drift: on the 140 s small session the least-squares standard error is ~2 ppm
    # (README "least-squares standard error ~2 ppm on small"); the interval fit on the edge
    # brackets does far better (next test), so three least-squares standard errors is loose
    se = _drift_se_ppm(s)
    assert 1.0 < se < 3.0
    assert abs(clock["drift_ppm"] - truth["drift_ppm"]) < 3 * se
    assert clock["fit"] == "interval"
    assert sorted(clock["dropped_volume_indices"]) == sorted(truth["dropped_trigger_volumes"])
    assert clock["spurious_pulse_indices"] == []
    # Session converts rig times with the same model the align stage applied
    beh = s.behaviour
    t_model = s.clock_model.rig_to_scope(beh["t_rig_s"].to_numpy())
    np.testing.assert_allclose(beh["t_s"].to_numpy(), t_model, atol=1e-9)


def test_clock_drift_within_1_ppm(run):
    # the floor asked of the demo: drift within 1 ppm of the planted 40 ppm. Measured with the
    # interval (bracketing) fit: +0.21 ppm on small seed 0 (least squares: -3.6), -0.24 on
    # small seed 1 (-0.61), -0.09 on default seed 0 (-0.62); on simulated 140 s sessions the
    # interval fit's error is ~0.45 ppm rms (tests/test_align_clocks.py)
    assert abs(run["session"].clock["drift_ppm"] - run["clock"]["drift_ppm"]) < 1.0


# ---- behaviour ------------------------------------------------------------------------------
def test_bouts_match_planted_bouts(run):
    truth = pd.read_parquet(run["truth"] / "bouts.parquet")
    found = run["session"].bouts
    d = np.abs(found["onset_rig_s"].to_numpy()[:, None] - truth["onset_rig_s"].to_numpy()[None])
    # within 4 rig samples of 5 ms (onset = first sample over threshold; README rig rate)
    assert np.mean(d.min(axis=0) < 0.02) >= 0.95       # planted bouts found
    assert np.mean(d.min(axis=1) < 0.02) >= 0.95       # found bouts planted
    hit = d.min(axis=1) < 0.02
    j = d.argmin(axis=1)[hit]
    # the planted turn is the integral of the turn rate over the bout's samples (README)
    np.testing.assert_allclose(found["angle_rad"].to_numpy()[hit], truth["turn_rad"].to_numpy()[j],
                               atol=np.radians(0.5))
    left = found["direction"].to_numpy()[hit] == "left"
    assert np.array_equal(left, truth["turn_rad"].to_numpy()[j] > 0)  # positive = left
    assert {"onset_s", "offset_s"} <= set(found.columns)            # imaging-clock twins


def test_splits_recovered(run):
    err = split_errors_s(run)
    ibi = bout_interval_s(run["truth"])
    # heading changes only in bouts (README): the split is found at the first movement that
    # steers for the new goal and dated to the middle of the movement before it (the crossing
    # happens while the animal moves), re-timed with the steering-only critical angle as a
    # prior. Measured on seed 0: 20 of 21 planted splits found, 95% within two bout intervals
    assert np.mean(np.isfinite(err)) >= 0.9
    assert np.mean(err <= 2 * ibi) >= 0.9
    # a split dated to the right bout is within half a bout (bouts last 0.2-0.35 s, README)
    assert np.median(err[np.isfinite(err)]) < 0.15


def test_splits_within_one_bout_interval(run):
    # floor 90% (issue 5). Measured, small preset: seed 0 90.5% (19 of 21; 81% with the
    # steering alone), seed 1 100% (88%), seed 2 88% (69%); seeds 3-7 89-100%
    assert np.mean(split_errors_s(run) <= bout_interval_s(run["truth"])) >= 0.9


def test_critical_angle_near_planted(run):
    crit = run["session"].critical_angle
    # planted critical angle 100 deg (demo_volume/README.md); tolerance 5 deg (brief).
    # Measured (angle inside the most split brackets): 100.4 deg, 95% CI 94.5-101.2 on seed 0
    assert abs(np.degrees(crit["estimate_rad"]) - 100.0) < 5.0
    assert crit["ci_low_rad"] <= np.radians(100.0) <= crit["ci_high_rad"]
    assert crit["ci_low_rad"] <= crit["estimate_rad"] <= crit["ci_high_rad"]


def test_steering_only_splits_are_kept_and_give_the_critical_angle(run):
    from pipeline.behaviour import critical_angle_brackets

    s = run["session"]
    steer = s.splits_steering
    # the critical angle is estimated from the prior-free splits (the re-timed ones lean on it)
    est = critical_angle_brackets(steer["subtended_prev_rad"], steer["subtended_post_rad"],
                                  n_resamples=50, seed=0)["estimate_rad"]
    assert est == pytest.approx(s.critical_angle["estimate_rad"])
    assert len(steer) >= 0.9 * len(s.splits)
    assert np.isfinite(steer["split_s"]).all()      # on the imaging clock, like `splits`


# ---- decoding -------------------------------------------------------------------------------
def test_decoder_peaks_at_planted_premotor_lead(run):
    s = run["session"]
    cells = pd.read_parquet(run["truth"] / "cells.parquet")
    lead_s = float(cells.loc[cells["cell_class"] == "premotor", "lead_s"].median())
    doc = s.decoding_summary
    # lag < 0 = activity before the turn; within one volume (0.5 s at 2 Hz)
    assert abs(doc["turn_r2"]["best_lag_s"] + lead_s) <= 1.0 / doc["rate_hz"] + 1e-9
    assert max(doc["turn_r2"]["mean"]) > max(doc["turn_r2"]["null_p95"])
    conf = np.asarray(doc["bout_confusion"]["confusion"])
    assert conf.shape == (2, 2) and np.trace(conf) > conf.sum() / 2   # better than chance
    table = s.decoding
    assert {"lag_s", "mean", "decoder"} <= set(table.columns)


def test_bout_direction_auc_above_0_8(run):
    cells = pd.read_parquet(run["truth"] / "cells.parquet")
    lead_s = float(cells.loc[cells["cell_class"] == "premotor", "lead_s"].median())
    auc = run["session"].decoding_summary["bout_auc"]
    # target AUC > 0.8 (issue); measured peak 0.785 with 1 s window means in 1 s lag steps,
    # 0.908 with each cell's rise over 1 s read on its plane times in 0.5 s lag steps (seed 0;
    # 0.911 on seed 1, 0.945 on the default preset)
    assert max(auc["mean"]) > 0.8
    # the premotor transient starts lead_s before the onset (demo_volume/README.md): the best
    # window ends after it starts and before the bout
    assert -lead_s <= auc["best_lag_s"] < 0


def test_decoder_weight_map_separates_premotor_sides(run):
    s = run["session"]
    truth = pd.read_parquet(run["truth"] / "cells.parquet")
    weights = pd.read_parquet(run["out"] / "decode_weights.parquet")
    pos = ["z_um", "y_um", "x_um"]
    dist, idx = cKDTree(truth[pos].to_numpy()).query(weights[pos].to_numpy())
    matched = truth.iloc[idx].assign(pattern=weights["turn_pattern"].to_numpy())[dist < 3.0]
    pm = matched[matched["cell_class"] == "premotor"]
    # left-side premotor cells fire before leftward (positive) turns (demo_volume/README.md),
    # so the decoder's activation pattern (Haufe et al. 2014) is positive for every one of
    # them and negative for right-side ones. The raw weights are not: the weights of
    # correlated premotor cells trade off against each other (their mean over left cells was
    # -0.001 on seed 0, with single weights of both signs)
    assert (pm.loc[pm["side"] == "left", "pattern"] > 0).mean() >= 0.9
    assert (pm.loc[pm["side"] == "right", "pattern"] < 0).mean() >= 0.9
    for name in ("decode_weight_map", "decode_pattern_map"):
        assert s.array(name).shape == s.array("labels").shape


# ---- tuning ---------------------------------------------------------------------------------
def test_tuning_finds_planted_bearing_cells(run):
    r = tuning_recovery(run)
    # measured on seed 0 (1,000 permutations; split-aligned trial swap within trials showing
    # the same targets; dF/F baseline without the samples of activity; joint
    # indicator-filtered model, motor nuisance kept fixed, epochs cut at each trial's first
    # split, a target named only when the evidence over the session and within trials
    # agrees; splits re-timed with the critical-angle prior; dF/F baseline terms in the
    # motor nuisance): sensitivity 0.31, false discovery proportion 0.21, preferred bearing
    # median error 20.4 deg with 45 % within 20 deg (seeds 1, 2: 0.44, 0.37 and 0.38, 0.33;
    # median errors 11 and 9 deg). With 300 permutations seed 0 found 0.11: Benjamini-
    # Hochberg rejects nothing until enough cells sit at the smallest p, 1 / 301, and since
    # the demo's "both" cells prefer bearings taken before the split (DEVELOPERS.md) fewer
    # do. The small preset's 16 short trials leave the calibrated null little room. The
    # floors are in the xfail below (and on the default preset in test_demo_floors.py);
    # these bounds guard against regressions.
    tun = run["session"].tuning
    assert not (tun["tuned"] & tun["ambiguous"]).any()   # an ambiguous cell names no target
    # tuning.between_epoch = "merged" (default): no between epoch, the record says so
    info = run["session"].record("tuning")["info"]
    assert info["between_epoch"] == "merged into post" and info["between_setting"] == "merged"
    assert set(tun["epoch"]) == {"pre", "post"}
    assert r["sensitivity"] >= 0.3
    assert r["fdr"] <= 0.25
    assert r["median_err_deg"] <= 25.0
    assert r["within_20"] >= 0.4


@pytest.mark.xfail(strict=True, reason="observed false discovery proportion 0.21 and "
                   "sensitivity 0.31 at q = 0.05 on seed 0 (small preset, 1,000 permutations, "
                   "split-aligned trial swap; seeds 1, 2: 0.37, 0.44 and 0.33, 0.38): "
                   "bearing cells attributed to a correlated other target (the targets' "
                   "bearings are nearly collinear on ~16 short trials) and untuned cells")
def test_tuning_false_discoveries_controlled(run):
    # Benjamini-Hochberg at q = 0.05 (Benjamini & Hochberg 1995): allow twice the level
    assert tuning_recovery(run)["fdr"] <= 0.1


# ---- report, Session API, NWB ---------------------------------------------------------------
class _Images(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.src: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.src.append(dict(attrs)["src"])


def test_report_has_every_section_and_image(run):
    page = run["out"] / "report" / "index.html"
    text = page.read_text(encoding="utf-8")
    parser = _Images()
    parser.feed(text)
    assert len(parser.src) >= 15
    assert all((page.parent / src).is_file() for src in parser.src)
    assert "could not be shown" not in text and "Not run" not in text
    for name in ("sync", "trajectories", "split_angle", "decode_turn_r2", "confusion",
                 "fraction_tuned", "bearing_map", "tuning_curves"):
        assert any(name in src for src in parser.src), name
    # the tuning caption names the null it used and its assumption
    assert "aligned at the first split, 1000 permutations" in text
    assert "trials are exchangeable" in text
    # and how many trials show each target; the small demo shows its third in 7 (< 8)
    shown = run["session"].record("tuning")["info"]["trials_per_target"]
    assert f"t2 {shown['t2']}" in text
    assert ("t2: fewer than tuning.min_epoch_trials = 8" in text) == (shown["t2"] < 8)


def test_session_api_on_the_real_store(run):
    s = run["session"]
    assert {"ingest", "motion", "cells", "traces", "behaviour", "align", "decode",
            "tuning"} <= set(s.stages_done())
    dff = s.traces("dff")
    assert dff.shape == (len(s.cells), s.volumes.shape[0])
    assert np.isfinite(dff.cell(int(dff.cells[0]))).all()
    beh = s.behaviour
    assert beh["t_s"].is_monotonic_increasing and "t_rig_s" in beh
    # the log starts 3 s before imaging (README), on the imaging clock
    assert beh["t_s"].iloc[0] == pytest.approx(-3.0, abs=0.05)
    tuned = s.tuning.query("tuned")
    assert {"cell", "target", "epoch", "preferred_rad", "q"} <= set(tuned.columns)
    assert "split_s" in s.splits


def test_nwb_export_passes_inspector(run):
    pytest.importorskip("pynwb")
    from nwbinspector import Importance, inspect_nwbfile
    from pynwb import NWBHDF5IO

    from pipeline.config import load_config
    from pipeline.export import export_nwb

    settings = load_config(run["cfg"])
    path = export_nwb(settings, run["session"].store)
    msgs = list(inspect_nwbfile(nwbfile_path=str(path)))
    bad = [f"{m.importance.name} {m.check_function_name}: {m.message}" for m in msgs
           if m.importance in (Importance.ERROR, Importance.PYNWB_VALIDATION,
                               Importance.CRITICAL)]
    assert not bad, bad
    with NWBHDF5IO(str(path), "r") as io:
        nwb = io.read()
        n_trials = len(nwb.trials)
        bouts = nwb.processing["behavior"]["turn_bouts"].to_dataframe()
    beh = run["session"].behaviour
    assert n_trials == beh.loc[beh["trial"] >= 0, "trial"].nunique()  # rows of -1: between
    assert len(bouts) == len(run["session"].bouts)


def test_readme_example_runs_on_the_demo(run, monkeypatch) -> None:
    import doctest

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = readme.split("```pycon\n", 1)[1].split("```", 1)[0]
    block = block.replace('"runs/demo"', repr(str(run["out"])))
    test = doctest.DocTestParser().get_doctest(block, {}, "README", "README.md", 0)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    runner.run(test)
    assert runner.failures == 0 and runner.tries >= 8
