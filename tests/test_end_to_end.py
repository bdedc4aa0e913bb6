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
from scipy.spatial import cKDTree

from pipeline.cli import main
from pipeline.session import Session

pytestmark = pytest.mark.slow

#: reduced-cost analysis settings for the test run (replacing the demo config's values)
REDUCED = {"decode": {"n_null": 20, "n_null_bouts": 2}, "tuning": {"n_permutations": 300}}
TARGETS = ("t0", "t1", "t2")


@pytest.fixture(scope="module")
def run(demo_small_data: Path, tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("e2e")
    cfg = demo_config(demo_small_data, folder / "out", folder, overrides=REDUCED)
    assert main(["--quiet", "run", str(cfg)]) == 0
    truth = demo_small_data / "truth"
    return {"cfg": cfg, "out": folder / "out", "truth": truth,
            "session": Session.open(folder / "out"),
            "clock": json.loads((truth / "clock.json").read_text())}


def _bout_interval_s(truth: Path) -> float:
    bouts = pd.read_parquet(truth / "bouts.parquet")
    return float(np.median(np.diff(bouts["onset_rig_s"].to_numpy())))


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
    # (README "least-squares standard error ~2 ppm on small"); measured error 3.6 ppm with
    # SE 2.0 ppm on seed 0, so the check is three standard errors
    se = _drift_se_ppm(s)
    assert 1.0 < se < 3.0
    assert abs(clock["drift_ppm"] - truth["drift_ppm"]) < 3 * se
    assert sorted(clock["dropped_volume_indices"]) == sorted(truth["dropped_trigger_volumes"])
    assert clock["spurious_pulse_indices"] == []
    # Session converts rig times with the same model the align stage applied
    beh = s.behaviour
    t_model = s.clock_model.rig_to_scope(beh["t_rig_s"].to_numpy())
    np.testing.assert_allclose(beh["t_s"].to_numpy(), t_model, atol=1e-9)


@pytest.mark.xfail(strict=True, reason="drift error 3.6 ppm on seed 0 (SE 2.0 ppm): a "
                   "least-squares line on 0-5 ms edge lags; a bracketing (interval) fit "
                   "would be tighter")
def test_clock_drift_within_3_ppm(run):
    assert abs(run["session"].clock["drift_ppm"] - run["clock"]["drift_ppm"]) < 3.0


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


def _split_errors_s(run) -> np.ndarray:
    truth = pd.read_parquet(run["truth"] / "trials.parquet")
    found = run["session"].splits
    m = truth.merge(found.assign(split_index=found["level"] - 1), on=["trial", "split_index"],
                    how="left")
    return (m["split_rig_s"] - m["t_split_rig_s"]).abs().to_numpy()   # NaN: not found


def test_splits_recovered(run):
    err = _split_errors_s(run)
    ibi = _bout_interval_s(run["truth"])
    # heading changes only in bouts (README), so a split shows in the trajectory at the next
    # bout at the earliest. Measured on seed 0: 20 of 21 splits found, 52% within one bout
    # interval (0.75 s), all found within two; the 90%-within-one target is the xfail below
    assert np.mean(np.isfinite(err)) >= 0.9
    assert np.mean(err <= 2 * ibi) >= 0.9
    assert np.mean(err <= ibi) >= 0.45


@pytest.mark.xfail(strict=True, reason="52% of planted splits within one bout interval on "
                   "seed 0 (errors 0.1-1.5 s); target 90%")
def test_splits_within_one_bout_interval(run):
    assert np.mean(_split_errors_s(run) <= _bout_interval_s(run["truth"])) >= 0.9


def test_critical_angle_near_planted(run):
    crit = run["session"].critical_angle
    # planted critical angle 100 deg (demo_volume/README.md); tolerance 5 deg (brief)
    assert abs(np.degrees(crit["estimate_rad"]) - 100.0) < 5.0
    assert crit["ci_low_rad"] <= crit["estimate_rad"] <= crit["ci_high_rad"]


# ---- decoding -------------------------------------------------------------------------------
def test_decoder_peaks_at_planted_premotor_lead(run):
    s = run["session"]
    cells = pd.read_parquet(run["truth"] / "cells.parquet")
    lead_s = float(cells.loc[cells["cell_class"] == "premotor", "lead_s"].median())
    doc = s.decoding_summary
    # lag < 0 = activity before the turn; within one volume (0.5 s at 2 Hz)
    assert abs(doc["turn_r2"]["best_lag_s"] + lead_s) <= 1.0 / doc["rate_hz"] + 1e-9
    assert max(doc["turn_r2"]["mean"]) > max(doc["turn_r2"]["null_p95"])
    # bout direction: measured peak AUC 0.811 on seed 0 (the 0.8 target is the test below)
    assert max(doc["bout_auc"]["mean"]) > 0.7
    conf = np.asarray(doc["bout_confusion"]["confusion"])
    assert conf.shape == (2, 2) and np.trace(conf) > conf.sum() / 2   # better than chance
    table = s.decoding
    assert {"lag_s", "mean", "decoder"} <= set(table.columns)


def test_bout_direction_auc_above_0_8(run):
    # measured peak bout-direction AUC 0.811 on seed 0 (0.871 on seed 1) with the shift
    # estimated on 2 x 2 binned planes (motion.bin_yx = 2); 0.785 (0.862) unbinned
    assert max(run["session"].decoding_summary["bout_auc"]["mean"]) > 0.8


# ---- tuning ---------------------------------------------------------------------------------
def _tuning_recovery(run) -> dict[str, float]:
    s = run["session"]
    truth = pd.read_parquet(run["truth"] / "cells.parquet")
    cells, tun = s.cells, s.tuning
    pos = ["z_um", "y_um", "x_um"]
    dist, idx = cKDTree(cells[pos].to_numpy()).query(truth[pos].to_numpy())
    # nearest detected cell within 3 um (half a nucleus diameter, README radius 2.2-3.2 um)
    truth["det"] = np.where(dist < 3.0, cells["id"].to_numpy()[idx], -1)
    key = tun.set_index(["cell", "target", "epoch"])
    planted, found, err_deg = set(), [], []
    for r in truth[truth["cell_class"] == "bearing"].itertuples():
        for ep in (("pre", "post") if r.epoch == "both" else (r.epoch,)):
            k = (r.det, TARGETS[int(r.target)], ep)
            planted.add(k)
            ok = k in key.index and bool(key.loc[k, "tuned"])
            found.append(ok)
            if ok:
                d = np.angle(np.exp(1j * (key.loc[k, "preferred_rad"] - r.pref_bearing_rad)))
                err_deg.append(abs(np.degrees(d)))
    tuned = tun[tun["tuned"]]
    false = [k not in planted for k in zip(tuned["cell"], tuned["target"], tuned["epoch"],
                                           strict=True)]
    return {"sensitivity": float(np.mean(found)), "fdr": float(np.mean(false)),
            "n_tuned": len(tuned), "median_err_deg": float(np.median(err_deg)),
            "within_20": float(np.mean(np.asarray(err_deg) <= 20.0))}


def test_tuning_finds_planted_bearing_cells(run):
    r = _tuning_recovery(run)
    # measured on seed 0 (300 permutations): sensitivity 0.38, preferred bearing median error
    # ~12 deg with 74% within 20 deg; FDR 0.64 at q = 0.05 (the gap: xfail below)
    assert r["sensitivity"] >= 0.35
    assert r["median_err_deg"] <= 20.0
    assert r["within_20"] >= 0.65


@pytest.mark.xfail(strict=True, reason="observed false discovery proportion 0.64 at "
                   "q = 0.05 on seed 0 (bearing cells flagged for the other target or epoch, "
                   "premotor and vigor cells); confounds the null does not remove")
def test_tuning_false_discoveries_controlled(run):
    # Benjamini-Hochberg at q = 0.05 (Benjamini & Hochberg 1995): allow twice the level
    assert _tuning_recovery(run)["fdr"] <= 0.1


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
