"""The ``decode`` and ``tuning`` stages: map the analysis kernels over the session store.

Inputs (written by earlier stages):

``session.zarr/traces/{dff,events}``   (n_cells, n_volumes) activity, row i = cells.parquet row i
``cells.parquet``                      ``id``, ``plane``, ``z_um``, ``y_um``, ``x_um``
``session.zarr/align/<name>``          behaviour resampled per plane sample, (n_volumes, n_planes)
                                       [, n_targets]: :data:`ALIGN` lists the names used
``bouts.parquet`` / ``splits.parquet`` bout and split tables on the rig clock; converted with
                                       the align stage's clock model and matched to volumes
                                       by ``align/plane_times_s``
``behaviour/bearing_rad``,             bearings and trial ids on the rig's samples with their
``behaviour.parquet`` (trial),         imaging-clock times (the tuning model is built there)
``align/behaviour_t_scope_s``

A cell in plane ``z`` is sampled at plane ``z``'s times, so the tuning regressors of that cell
are the fine-grid regressors sampled at plane ``z``'s times. The decoders use all cells together and one target
per volume: the plane average of the turn command.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import zarr

from pipeline.analysis.bouts import decode_bouts
from pipeline.analysis.cv import gap_samples
from pipeline.analysis.decode import decode_continuous, lag_samples
from pipeline.analysis.regressors import (
    baseline_columns,
    sample_columns,
    tuning_regressors,
    uniform_grid,
    window_epochs,
)
from pipeline.analysis.stats import circular_shift_indices, trial_shuffle_indices
from pipeline.analysis.tuning import (
    curve_preference,
    fit_von_mises,
    population_summary,
    tuned_flags,
    tuning_curves,
    unique_variance_test,
    within_trial_alone_r2,
)
from pipeline.errors import InputError, StoreError
from pipeline.stages import stage
from pipeline.volumes.traces import window_samples

__all__ = ["ALIGN", "run_decode", "run_tuning"]

#: names of the align stage's per-plane behaviour arrays read here
ALIGN = {"turn": "align/turn_rad_s", "vigor": "align/vigor", "trial": "align/trial",
         "bearing": "align/bearing_rad", "plane_times": "align/plane_times_s"}


#: activity up to this size is loaded; larger is read block by block of cells from zarr
IN_MEMORY_BYTES = 4 << 30


class _TimeMajor:
    """A (cells, t) zarr array seen as (t, cells), read in blocks of cells on indexing."""

    def __init__(self, arr):
        self.arr = arr
        self.shape = (arr.shape[1], arr.shape[0])
        self.ndim = 2

    def __getitem__(self, key):
        rows, cols = key
        return np.asarray(self.arr.oindex[cols, rows]).T


def _activity(path):
    arr = zarr.open_array(path, mode="r")
    if arr.nbytes <= IN_MEMORY_BYTES:
        return np.asarray(arr[...]).T
    return _TimeMajor(arr)


def _opt_array(store, name):
    try:
        return np.asarray(store.read_array(name)[...])
    except StoreError:
        return None


def _activity_path(store, feature):
    name = f"traces/{feature}"
    store.read_array(name)                 # raises StoreError naming the missing array
    return store.array_path(name)


def _trial_per_volume(store):
    trial = _opt_array(store, ALIGN["trial"])
    return None if trial is None else trial.reshape(trial.shape[0], -1)[:, 0]


def _cell_planes(store, n_cells, n_planes):
    """Each activity row's plane (column of ``align/plane_times_s``), from cells.parquet."""
    cells = store.read_table("cells.parquet")
    if len(cells) != n_cells or "plane" not in cells:
        raise InputError(f"cells.parquet: expected {n_cells} rows with a 'plane' column (one "
                         f"per activity row), got {len(cells)} rows and columns "
                         f"{list(cells.columns)}")
    plane = cells["plane"].to_numpy(dtype=np.int64)
    if plane.min(initial=0) < 0 or plane.max(initial=0) >= n_planes:
        raise InputError(f"cells.parquet: plane values {plane.min()}..{plane.max()} outside "
                         f"the {n_planes} planes of {ALIGN['plane_times']}")
    return plane


@stage("decode", requires=("traces", "cells", "align"), sections=("imaging", "decode"),
       enabled=lambda s: s.decode.enabled)
def run_decode(settings, store, compute):
    """Decode the turn command (continuous, all lags) and bout direction/angle."""
    ds, im = settings.decode, settings.imaging
    rate = im.volume_rate_hz
    X = _activity(_activity_path(store, ds.feature))
    turn = np.asarray(store.read_array(ALIGN["turn"])[...], dtype=np.float64)
    y = turn.reshape(turn.shape[0], -1).mean(axis=1)
    if y.shape[0] != X.shape[0]:
        raise InputError(f"{ALIGN['turn']}: {y.shape[0]} volumes, but traces/{ds.feature} has "
                         f"{X.shape[0]}")
    plane_times = np.asarray(store.read_array(ALIGN["plane_times"])[...], dtype=np.float64)
    plane_times = plane_times.reshape(plane_times.shape[0], -1)
    plane = _cell_planes(store, X.shape[1], plane_times.shape[1])
    # the continuous decoder keeps each cell's own samples (at its plane's time) against the
    # plane average of the turn: resampling every cell at the volume's mean plane time was
    # measured to lose R^2 (peak 0.43 -> 0.27, small demo seed 0), because the planes' phase
    # spread within a volume is information the per-cell weights use
    trial = _trial_per_volume(store)
    if trial is not None:
        # CV groups are contiguous runs: each trial, and each gap between trials (id -1)
        trial = np.concatenate([[0], np.cumsum(np.diff(trial) != 0)])
    lags = lag_samples(lag_min_s=ds.lag_min_s, lag_max_s=ds.lag_max_s, rate_hz=rate)
    gap = gap_samples(rate_hz=rate, decay_s=im.decay_s, lag_span_s=ds.lag_max_s - ds.lag_min_s,
                      extra_s=ds.gap_s)
    res = decode_continuous(X, y, lags=lags, rate_hz=rate, alphas=ds.alphas,
                            n_splits=ds.n_folds, gap=gap, trial_ids=trial, n_null=ds.n_null,
                            n_components=ds.pca_components, seed=ds.seed)
    doc: dict[str, Any] = res.to_dict()
    doc.update({"feature": ds.feature, "gap_samples": gap, "rate_hz": rate})
    if res.null_kind == "circular-shift":
        doc["null_warning"] = CIRCULAR_WARNING
        store.warn(CIRCULAR_WARNING)
    if store.has("bouts.parquet"):
        bouts = store.read_table("bouts.parquet")
        onset_s = _scope_times(store, bouts, "onset_rig_s")
        trial_b = bouts["trial"].to_numpy() if "trial" in bouts else None
        try:
            # the same lag grid as the continuous decoder: one volume period
            bres = decode_bouts(X, onset_s, bouts["direction"].to_numpy() == "left",
                                times_s=plane_times, plane=plane, lags_s=lags / rate,
                                window_s=ds.pre_bout_window_s, feature=ds.bout_feature,
                                angle=bouts["angle_rad"].to_numpy(dtype=np.float64),
                                n_splits=ds.n_folds, gap=1, n_null=ds.n_null_bouts,
                                trial_of_bout=trial_b, seed=ds.seed)
            doc.update(bres.to_dict())
        except InputError as exc:
            store.warn(f"bout decoders skipped: {exc}")
    store.write_json("decode.json", doc)
    store.write_array("decode/weights", res.weights.astype(np.float32),
                      attrs={"unit": "turn units per activity unit", "lag_s": res.weights_lag_s,
                             "alpha": res.weights_alpha}, dimension_names=("cell",))
    store.write_array("decode/lags_s", res.r2.lags_s, dimension_names=("lag",))
    store.write_array("decode/r2_folds", res.r2.folds, dimension_names=("fold", "lag"))
    store.write_array("decode/pattern", res.pattern.astype(np.float32),
                      attrs={"unit": "activity units per turn unit",
                             "lag_s": res.weights_lag_s}, dimension_names=("cell",))
    _write_weight_maps(store, res.weights, res.pattern, res.weights_lag_s)
    store.set_info({"best_lag_s": res.r2.best_lag_s, "earliest_lag_s": res.r2.earliest_lag_s,
                    "null_kind": res.null_kind})


#: shown in the report whenever the continuous decoder's null had to use circular shifts
CIRCULAR_WARNING = ("decode: no trials, so the null shifts the turn series circularly; on "
                    "slowly drifting signals circular shifts can overstate significance "
                    "(Harris 2020, bioRxiv doi:10.1101/2020.11.29.402719)")


def _write_weight_maps(store, weights, pattern, lag_s):
    """Decoder weights and activation pattern per cell (a table with positions), painted into
    the label volume (weights in ``decode/weight_map``, pattern in ``decode/pattern_map``)."""
    cells = store.read_table("cells.parquet")
    table = pd.DataFrame({"cell": cells["id"].to_numpy(), "plane": cells["plane"].to_numpy(),
                          **{c: cells[c].to_numpy(dtype=np.float64)
                             for c in ("z_um", "y_um", "x_um") if c in cells},
                          "turn_weight": np.asarray(weights, dtype=np.float64),
                          "turn_pattern": np.asarray(pattern, dtype=np.float64)})
    store.write_table("decode_weights.parquet", table,
                      metadata={"units": {"z_um": "um", "y_um": "um", "x_um": "um",
                                          "turn_weight": "turn units per activity unit",
                                          "turn_pattern": "activity units per turn unit"},
                                "lag_s": lag_s})
    try:
        labels = store.labels()
    except StoreError:
        store.warn("no cell label volume: decoder weight map not painted")
        return
    for name, values, unit in (("weight_map", weights, "turn units per activity unit"),
                               ("pattern_map", pattern, "activity units per turn unit")):
        lut = _cell_lut(cells["id"].to_numpy(), values)
        arr = store.create_array(f"decode/{name}", shape=tuple(labels.shape), dtype="float32",
                                 chunks=(1, *labels.shape[1:]), fill_value=np.nan,
                                 dimension_names=("z", "y", "x"),
                                 attrs={"unit": unit, "lag_s": lag_s})
        for z in range(labels.shape[0]):
            arr[z] = _painted(lut, labels[z])


def _cell_lut(ids, values):
    """Look-up table from cell label to value (NaN for labels without a value)."""
    lut = np.full(int(max(ids.max(initial=0), 0)) + 1, np.nan, dtype=np.float32)
    lut[ids] = values
    return lut


def _painted(lut, labels):
    """One plane of a label volume with each cell's value from ``lut`` (NaN off cells)."""
    lab = np.asarray(labels)
    return np.where(lab > 0, lut[np.clip(lab, 0, lut.size - 1)], np.nan)


def _fine_behaviour(store):
    """Bearings and trial ids on the rig's samples, with their imaging-clock times."""
    missing = [n for n in ("align/behaviour_t_scope_s", "behaviour/bearing_rad")
               if _opt_array(store, n) is None]
    if missing or not store.has("behaviour.parquet"):
        what = missing[0] if missing else "behaviour.parquet"
        raise StoreError(f"{what} is missing: the tuning model needs the behaviour on the rig "
                         "clock; re-run `forkmap run --from behaviour`")
    t = np.asarray(store.read_array("align/behaviour_t_scope_s")[...], dtype=np.float64)
    bearing = np.asarray(store.read_array("behaviour/bearing_rad")[...], dtype=np.float64)
    trial = store.read_table("behaviour.parquet")["trial"].to_numpy()
    if not (t.shape[0] == bearing.shape[0] == trial.shape[0]):
        raise StoreError(f"behaviour/bearing_rad: {bearing.shape[0]} rows, but "
                         f"align/behaviour_t_scope_s has {t.shape[0]} and behaviour.parquet "
                         f"{trial.shape[0]}; expected one row per rig sample in all three")
    return t, bearing.reshape(t.size, -1), trial


def _scope_times(store, table, column):
    from pipeline.align import ClockModel

    info = (store.record("align") or {}).get("info", {})
    if "clock" not in info:
        raise StoreError(f"{column}: rig-clock times need the align stage's clock model; "
                         "re-run `forkmap run --from align`")
    return ClockModel.from_dict(info["clock"]).rig_to_scope(table[column].to_numpy(np.float64))


def _tuning_task(rows, activity_path, design, options):
    """One block of cells of one plane: each epoch's joint test and the tuning curves."""
    act = np.asarray(zarr.open_array(activity_path, mode="r").oindex[rows, :]).T
    idx, epoch_of = design["samples"], design["epoch_of"]
    y = act[idx]
    terms, levels, motor = design["terms"], design["levels"], design["motor"]
    trial = design["trial"]
    perms = design["perms"]
    fixed = None
    if options["trial_intercepts"]:
        fixed = (trial[:, None] == np.unique(trial)[None, :]).astype(float)
    out = []
    for e, epoch in enumerate(design["epochs"]):
        inside = epoch_of == epoch
        if np.unique(trial[inside]).size < options["min_epoch_trials"]:
            continue
        # targets with terms on this epoch's samples (a third target shown in some trials)
        keep = [k for k in range(terms.shape[2]) if np.any(terms[inside, e, k] != 0)]
        if not keep:
            continue
        others = [terms[:, f].reshape(idx.size, -1) for f in range(terms.shape[1]) if f != e]
        nuis = np.concatenate(others + [levels.reshape(idx.size, -1), motor], axis=1)
        res = unique_variance_test(y, columns=terms[:, e][:, keep], nuisance=nuis,
                                   fixed_nuisance=fixed, perm_index=perms)
        best = np.asarray(keep)[np.argmax(res.alone_r2, axis=0)]
        # which target the variation within trials follows best (trial intercepts added; no
        # permutations): "consistent" attribution needs it to agree with ``best``
        within = res.alone_r2
        if options["attribution"] == "consistent" and fixed is None and len(keep) > 1:
            within = within_trial_alone_r2(y, terms[:, e][:, keep], trial=trial,
                                           nuisance=nuis)
        best_within = np.asarray(keep)[np.argmax(within, axis=0)]
        for j, k in enumerate(keep):
            curves, _, centres = tuning_curves(y[inside], design["bearing"][inside, k],
                                               n_bins=options["n_bins"],
                                               min_count=options["min_count"])
            pref, sel = curve_preference(curves, centres)
            out.append({"epoch": epoch, "target": k, "rows": rows, "preferred_rad": pref,
                        "selectivity": sel, "unique_r2": res.unique_r2[j], "p": res.p[j],
                        "p_joint": res.p_joint, "joint_r2": res.joint_r2,
                        "alone_r2": res.alone_r2[j], "best": best == k,
                        "alone_within_r2": within[j], "best_within": best_within == k,
                        "regression_rad": res.bearing_rad[j], "curves": curves})
    return out


def _plane_design(reg, t_fine, z, plane_t, trial_z, bearing_z, split_s, options):
    """Sample the fine regressors at plane z's times, inside the analysis windows."""
    epoch_of = window_epochs(plane_t, trial_z, split_s, pre_s=options["pre_s"],
                             post_s=options["post_s"], guard_s=options["guard_s"])
    idx = np.flatnonzero(epoch_of != "")
    if idx.size < 10 or np.unique(trial_z[idx]).size < 3:
        return None
    t = plane_t[idx]
    motor = sample_columns(t_fine, reg["motor"], t)
    if options["baseline"] is not None and motor.shape[1]:
        # the dF/F baseline saw every sample of the plane, not only the analysis windows
        fin = np.isfinite(plane_t)
        extra = np.full((plane_t.size, 5), np.nan)
        extra[fin] = baseline_columns(sample_columns(t_fine, reg["motor"], plane_t[fin]),
                                      options["leads_s"], **options["baseline"])
        motor = np.concatenate([motor, extra[idx]], axis=1)
    return {"samples": idx, "epoch_of": epoch_of[idx], "trial": trial_z[idx],
            "epochs": reg["epochs"], "bearing": bearing_z[idx],
            "terms": sample_columns(t_fine, reg["terms"], t),
            "levels": sample_columns(t_fine, reg["levels"], t),
            "motor": motor,
            "perms": _perms(trial_z[idx], options, seed=options["seed"] + int(z))}


def _perms(trial, options, *, seed):
    if options["null"] == "trial":
        return trial_shuffle_indices(trial, options["n_perm"], seed=seed)
    return circular_shift_indices(trial.size, options["n_perm"], seed=seed,
                                  min_shift=min(options["min_shift"], trial.size // 2))


@stage("tuning", requires=("traces", "cells", "align", "behaviour"),
       sections=("imaging", "traces", "tuning"), enabled=lambda s: s.tuning.enabled)
def run_tuning(settings, store, compute):
    """Per cell, target and epoch: tuning curve, preference, unique variance, p, q, flags.

    A cell-epoch is flagged by the joint test of all targets (BH across cells per epoch) and
    attributed by ``tuning.attribution``: with ``"consistent"`` to the target whose terms
    alone explain most both over the session and within trials, or marked ``ambiguous``
    (``tuned`` False on every target row) when the two disagree.

    The model of every plane's cells is built once from the behaviour on the rig's samples
    (:func:`pipeline.analysis.regressors.tuning_regressors`: indicator-filtered, epoch-gated
    bearing terms and motor terms) and sampled at that plane's times.
    """
    ts, im = settings.tuning, settings.imaging
    cells = store.read_table("cells.parquet")
    path = _activity_path(store, ts.feature)
    bearing = np.asarray(store.read_array(ALIGN["bearing"])[...], dtype=np.float64)
    if bearing.ndim == 2:
        bearing = bearing[..., None]
    n_vol, n_planes, n_targets = bearing.shape
    trial_all = _opt_array(store, ALIGN["trial"])
    if trial_all is None:
        raise StoreError(f"{ALIGN['trial']} is missing: the tuning epochs need trial ids")
    trial_all = trial_all.reshape(n_vol, -1)
    plane_times = np.asarray(store.read_array(ALIGN["plane_times"])[...], dtype=np.float64)
    plane_times = plane_times.reshape(n_vol, -1)
    exposure = float(store.read_array(ALIGN["plane_times"]).attrs.get("exposure_s", 0.0))
    t_rig, bearing_rig, trial_rig = _fine_behaviour(store)
    t_fine, held = uniform_grid(t_rig, np.column_stack([bearing_rig, trial_rig]))
    splits = store.read_table("splits.parquet")
    split_t = _scope_times(store, splits, "split_rig_s")
    split_s = {t: split_t[splits["trial"].to_numpy() == t]
               for t in np.unique(splits["trial"].to_numpy())}
    split_s = _epoch_splits(split_s, ts.between_epoch, ts.min_epoch_trials)
    # recorded: whether a three-target trial's stretch between its splits is its own epoch
    between = "separate" if any(np.size(v) >= 2 for v in split_s.values()) else "merged into post"
    bouts = None
    if ts.nuisance and store.has("bouts.parquet"):
        tab = store.read_table("bouts.parquet")
        vig = tab["vigor"].to_numpy(np.float64) if "vigor" in tab else np.zeros(len(tab))
        bouts = (_scope_times(store, tab, "onset_rig_s"),
                 tab["angle_rad"].to_numpy(np.float64), vig)
    reg = tuning_regressors(t_fine, held[:, :-1], held[:, -1].astype(np.int64), split_s,
                            rise_s=im.rise_s, decay_s=im.decay_s, n_harmonics=ts.n_harmonics,
                            bouts=bouts, leads_s=ts.nuisance_leads_s)
    options = {"n_perm": ts.n_permutations, "seed": ts.seed, "pre_s": ts.pre_window_s,
               "null": ts.null, "min_shift": max(1, round(ts.min_shift_s * im.volume_rate_hz)),
               "post_s": ts.post_window_s, "trial_intercepts": ts.trial_intercepts,
               "attribution": ts.attribution,
               "guard_s": ts.split_guard_s,
               "min_epoch_trials": ts.min_epoch_trials,
               "leads_s": ts.nuisance_leads_s,
               # the dF/F's own baseline (traces section) applied to the motor terms
               "baseline": ({"percentile": settings.traces.baseline_percentile,
                             "window": window_samples(settings.traces.baseline_window_s,
                                                      im.volume_rate_hz)}
                            if ts.nuisance_baseline and ts.feature == "dff" else None),
               "n_bins": ts.n_bins,
               "min_count": max(1, round(ts.min_occupancy_s * im.volume_rate_hz))}
    tasks = []
    planes = cells["plane"].to_numpy()
    for z in np.unique(planes):
        zc = int(np.clip(z, 0, n_planes - 1))
        design = _plane_design(reg, t_fine, zc, plane_times[:, zc] + exposure / 2,
                               trial_all[:, min(zc, trial_all.shape[1] - 1)],
                               bearing[:, zc], split_s, options)
        if design is None:
            continue
        rows = np.flatnonzero(planes == z)
        for a in range(0, rows.size, ts.block_cells):
            tasks.append((rows[a: a + ts.block_cells], design))
    results = compute.map(_tuning_task_star, tasks, path, options, desc="tuning")
    _write_tuning(store, settings, cells, [r for block in results for r in block],
                  reg["epochs"], n_targets, between=between)


def _epoch_splits(split_s, mode, min_trials):
    """The splits that cut each trial into epochs.

    ``"merged"`` (or ``"auto"`` with fewer than ``min_trials`` trials of two or more splits)
    keeps only each trial's first split, so the samples between a three-target trial's splits
    join ``post`` instead of forming a ``between`` epoch too rare to be tested.
    """
    times = {t: np.sort(np.asarray(v, dtype=np.float64)[np.isfinite(v)])
             for t, v in split_s.items()}
    n_two = sum(v.size >= 2 for v in times.values())
    if mode == "separate" or (mode == "auto" and n_two >= min_trials):
        return split_s
    return {t: v[:1] for t, v in times.items()}


def _tuning_task_star(task, path, options):
    rows, design = task
    return _tuning_task(rows, path, design, options)


def _target_names(settings, n_targets):
    beh = settings.behaviour
    names = [t.name for t in beh.targets] if beh is not None else []
    return names if len(names) == n_targets else [f"t{k}" for k in range(n_targets)]


def _write_tuning(store, settings, cells, parts, epochs, n_targets, between="separate"):
    ts = settings.tuning
    names = _target_names(settings, n_targets)
    n_cells = len(cells)
    fields = ("preferred_rad", "selectivity", "unique_r2", "p", "regression_rad", "p_joint",
              "joint_r2", "alone_r2", "best", "alone_within_r2", "best_within")
    grid = {f: np.full((n_targets, len(epochs), n_cells), np.nan) for f in fields}
    curves = np.full((n_targets, len(epochs), ts.n_bins, n_cells), np.nan, dtype=np.float32)
    centres = np.linspace(-np.pi, np.pi, ts.n_bins + 1)[:-1] + np.pi / ts.n_bins
    for part in parts:
        k, e = part["target"], epochs.index(part["epoch"])
        for f in fields:
            grid[f][k, e, part["rows"]] = part[f]
        curves[k, e][:, part["rows"]] = part["curves"]
    q_unique = tuned_flags(grid["p"], q=ts.fdr_q)[0]
    # one joint p per (epoch, cell): BH across cells per epoch
    p_joint = np.nanmax(np.where(np.isfinite(grid["p_joint"]), grid["p_joint"], -np.inf),
                        axis=0)
    p_joint = np.where(np.isfinite(p_joint), p_joint, np.nan)
    q_joint = np.broadcast_to(tuned_flags(p_joint, q=ts.fdr_q)[0], grid["p"].shape)
    ambiguous = np.zeros(grid["p"].shape, dtype=bool)
    if ts.attribution in ("best", "consistent"):
        qv = np.where(np.isfinite(grid["p"]), q_joint, np.nan)
        joint = np.isfinite(qv) & (qv <= ts.fdr_q)
        tuned = joint & (grid["best"] == 1)
        if ts.attribution == "consistent":
            # a target is named only when the evidence between and within trials agrees;
            # otherwise every row of the (epoch, cell) is marked ambiguous, none tuned
            agree = np.any((grid["best"] == 1) & (grid["best_within"] == 1), axis=0)
            ambiguous = joint & ~agree[None]
            tuned &= agree[None]
    else:
        qv = q_unique
        tuned = np.isfinite(qv) & (qv <= ts.fdr_q)
    vm_mu = np.full(grid["p"].shape, np.nan)
    vm_kappa = np.full(grid["p"].shape, np.nan)
    for k, e, i in zip(*np.nonzero(tuned), strict=True):     # fits only where tuned
        fit = fit_von_mises(centres, curves[k, e, :, i])
        vm_mu[k, e, i], vm_kappa[k, e, i] = fit.mu_rad, fit.kappa
    k_idx, e_idx, c_idx = np.nonzero(np.isfinite(grid["p"]))
    table = pd.DataFrame({
        "cell": cells["id"].to_numpy()[c_idx], "plane": cells["plane"].to_numpy()[c_idx],
        **{c: cells[c].to_numpy(dtype=np.float64)[c_idx] for c in ("z_um", "y_um", "x_um")},
        "target": np.asarray(names, dtype=object)[k_idx],
        "epoch": np.asarray(epochs, dtype=object)[e_idx],
        **{f: grid[f][k_idx, e_idx, c_idx] for f in fields
           if f not in ("best", "best_within")},
        "q_unique": q_unique[k_idx, e_idx, c_idx], "q_joint": q_joint[k_idx, e_idx, c_idx],
        "q": qv[k_idx, e_idx, c_idx], "tuned": tuned[k_idx, e_idx, c_idx],
        "ambiguous": ambiguous[k_idx, e_idx, c_idx],
        "vm_mu_rad": vm_mu[k_idx, e_idx, c_idx], "vm_kappa": vm_kappa[k_idx, e_idx, c_idx]})
    store.write_table("tuning.parquet", table, metadata={
        "units": {"preferred_rad": "rad", "regression_rad": "rad", "vm_mu_rad": "rad",
                  "z_um": "um", "y_um": "um", "x_um": "um"},
        "fdr_q": ts.fdr_q, "n_permutations": ts.n_permutations, "null": ts.null,
        "attribution": ts.attribution})
    store.write_array("tuning/curves", curves, attrs={"targets": names, "epochs": epochs,
                                                      "bin_centres_rad": centres.tolist()},
                      dimension_names=("target", "epoch", "bin", "cell"))
    summary, switches = population_summary(tuned, targets=names, epochs=epochs)
    # cells whose bearing terms are significant but whose target cannot be named, per epoch
    n_ambiguous = {e: int(ambiguous[:, j].any(axis=0).sum()) for j, e in enumerate(epochs)}
    store.set_info({"fractions": summary, "switches": switches, "ambiguous": n_ambiguous,
                    "between_epoch": between})
    _paint(store, cells, grid, tuned, names, epochs)


def _paint(store, cells, grid, tuned, names, epochs):
    """Preferred bearing and selectivity painted into the cell label volume."""
    try:
        labels = store.labels()
    except StoreError:
        store.warn("no cell label volume: tuning maps not painted")
        return
    ids = cells["id"].to_numpy()
    n_t, n_e = len(names), len(epochs)
    attrs = {"targets": names, "epochs": epochs}
    for what in ("preferred_rad", "selectivity"):
        arr = store.create_array(f"tuning/{what}", shape=(n_t, n_e, *labels.shape),
                                 dtype="float32", chunks=(1, 1, 1, *labels.shape[1:]),
                                 fill_value=np.nan, dimension_names=("target", "epoch", "z",
                                                                     "y", "x"),
                                 attrs={**attrs, "unit": "rad" if what.endswith("rad") else ""})
        for k in range(n_t):
            for e in range(n_e):
                lut = _cell_lut(ids, np.where(tuned[k, e], grid[what][k, e], np.nan))
                for z in range(labels.shape[0]):
                    arr[k, e, z] = _painted(lut, labels[z])
