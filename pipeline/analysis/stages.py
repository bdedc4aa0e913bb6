"""The ``decode`` and ``tuning`` stages: map the analysis kernels over the session store.

Inputs (written by earlier stages):

``session.zarr/traces/{dff,events}``   (n_cells, n_volumes) activity, row i = cells.parquet row i
``cells.parquet``                      ``id``, ``plane``, ``z_um``, ``y_um``, ``x_um``
``session.zarr/align/<name>``          behaviour resampled per plane sample, (n_volumes, n_planes)
                                       [, n_targets]: :data:`ALIGN` lists the names used
``bouts.parquet`` / ``splits.parquet`` bout and split tables on the rig clock; converted with
                                       the align stage's clock model and matched to volumes
                                       by ``align/plane_times_s``

A cell in plane ``z`` is sampled at plane ``z``'s times, so the tuning regressors of that cell
are column ``z`` of the resampled behaviour. The decoders use all cells together and one target
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
from pipeline.analysis.stats import circular_shift_indices, trial_shuffle_indices
from pipeline.analysis.tuning import (
    curve_preference,
    epoch_masks,
    fit_von_mises,
    population_summary,
    tuned_flags,
    tuning_curves,
    unique_variance_test,
)
from pipeline.errors import InputError, StoreError
from pipeline.stages import stage

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


def _scope_times(store, table, column):
    """A table column's times on the imaging clock (rig-clock times converted)."""
    from pipeline.align import ClockModel

    t = table[column].to_numpy(dtype=np.float64)
    if column.endswith("_rig_s"):
        info = (store.record("align") or {}).get("info", {})
        if "clock" not in info:
            raise StoreError(f"{column}: rig-clock times need the align stage's clock model; "
                             "re-run `forkmap run --from align`")
        t = ClockModel.from_dict(info["clock"]).rig_to_scope(t)
    return t


def _volume_index(store, table, column):
    """Volume index of each row's time (imaging clock; rig-clock times converted)."""
    plane_times = np.asarray(store.read_array(ALIGN["plane_times"])[...], dtype=np.float64)
    start = plane_times.min(axis=1)
    t = _scope_times(store, table, column)
    return np.clip(np.searchsorted(start, t, side="right") - 1, 0, start.size - 1)


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
    _write_weight_maps(store, res.weights, res.weights_lag_s)
    store.set_info({"best_lag_s": res.r2.best_lag_s, "earliest_lag_s": res.r2.earliest_lag_s,
                    "null_kind": res.null_kind})


#: shown in the report whenever the continuous decoder's null had to use circular shifts
CIRCULAR_WARNING = ("decode: no trials, so the null shifts the turn series circularly; on "
                    "slowly drifting signals circular shifts can overstate significance "
                    "(Harris 2020, bioRxiv doi:10.1101/2020.11.29.402719)")


def _write_weight_maps(store, weights, lag_s):
    """Decoder weights per cell (a table with positions) and painted into the label volume."""
    cells = store.read_table("cells.parquet")
    table = pd.DataFrame({"cell": cells["id"].to_numpy(), "plane": cells["plane"].to_numpy(),
                          **{c: cells[c].to_numpy(dtype=np.float64)
                             for c in ("z_um", "y_um", "x_um") if c in cells},
                          "turn_weight": np.asarray(weights, dtype=np.float64)})
    store.write_table("decode_weights.parquet", table,
                      metadata={"units": {"z_um": "um", "y_um": "um", "x_um": "um",
                                          "turn_weight": "turn units per activity unit"},
                                "lag_s": lag_s})
    try:
        labels = store.labels()
    except StoreError:
        store.warn("no cell label volume: decoder weight map not painted")
        return
    ids = cells["id"].to_numpy()
    lut = np.full(int(max(ids.max(initial=0), 0)) + 1, np.nan, dtype=np.float32)
    lut[ids] = weights
    arr = store.create_array("decode/weight_map", shape=tuple(labels.shape), dtype="float32",
                             chunks=(1, *labels.shape[1:]), fill_value=np.nan,
                             dimension_names=("z", "y", "x"),
                             attrs={"unit": "turn units per activity unit", "lag_s": lag_s})
    for z in range(labels.shape[0]):
        lab = np.asarray(labels[z])
        arr[z] = np.where(lab > 0, lut[np.clip(lab, 0, lut.size - 1)], np.nan)


def _target_sets(finite, min_samples):
    """Which samples test which targets, when some targets are absent (NaN bearing) at times.

    Targets present on every sample of the epoch are tested together on all of them; a target
    present on only some samples (a third target shown in some trials) is tested with the
    always-present ones on the samples where it is present. Returns ``(sample mask, targets
    in the model, targets whose result is kept)`` triples.
    """
    always = [k for k in range(finite.shape[1]) if finite[:, k].all()]
    sets = []
    if always:
        sets.append((np.ones(finite.shape[0], bool), always, always))
    for k in range(finite.shape[1]):
        if k in always or not finite[:, k].any():
            continue
        model = [*always, k]
        keep = finite[:, model].all(axis=1)
        if keep.sum() >= min_samples:
            sets.append((keep, model, [k]))
    return sets


def motor_nuisance(parts, *, rate_hz, decay_s, lead_s):
    """Motor regressors as a calcium indicator would see them, at leads up to ``lead_s``.

    Each (t, z) series (turn command, vigor) is split into its positive and negative parts
    (leftward and rightward turns drive different cells), shifted earlier by 0 .. ``lead_s``
    in whole volumes (activity that leads a movement), and convolved with the indicator's
    exponential decay, so that premotor and vigor-related activity is absorbed by the nuisance
    terms instead of passing as bearing tuning.
    """
    if not parts:
        return parts
    kernel = np.exp(-np.arange(0, 5 * decay_s * rate_hz + 1) / (decay_s * rate_hz))
    out = []
    for series in parts:
        for signed in (np.clip(series, 0, None), np.clip(-series, 0, None)):
            if not signed.any():
                continue
            conv = np.apply_along_axis(lambda c: np.convolve(c, kernel)[: c.size], 0, signed)
            for lead in range(int(round(lead_s * rate_hz)) + 1):
                shifted = np.zeros_like(conv)
                shifted[: conv.shape[0] - lead] = conv[lead:]
                out.append(shifted)
    return out


def _tuning_task(rows, activity_path, bearing, nuisance, trial, masks, options):
    """One block of cells of one plane: every epoch's test and curves (picklable)."""
    act = np.asarray(zarr.open_array(activity_path, mode="r").oindex[rows, :]).T
    out = []
    for e, (epoch, mask) in enumerate(masks.items()):
        if mask.sum() < 10:
            continue
        epoch_idx = np.flatnonzero(mask)
        for sub, model, keep in _target_sets(np.isfinite(bearing[epoch_idx]), 10):
            idx = epoch_idx[sub]
            if (options["null"] == "trial" and trial is not None
                    and np.unique(trial[idx]).size > 1):
                perms = trial_shuffle_indices(trial[idx], options["n_perm"],
                                              seed=options["seed"] + e)
            else:
                perms = circular_shift_indices(idx.size, options["n_perm"],
                                               min_shift=min(options["min_shift"],
                                                             idx.size // 2),
                                               seed=options["seed"] + e)
            fixed = None
            if options["trial_intercepts"] and trial is not None:
                # one indicator per trial of the activity rows (never permuted)
                fixed = (trial[idx][:, None] == np.unique(trial[idx])[None, :]).astype(float)
            res = unique_variance_test(act[idx], bearing[np.ix_(idx, model)],
                                       nuisance=None if nuisance is None else nuisance[idx],
                                       fixed_nuisance=fixed,
                                       perm_index=perms, n_harmonics=options["n_harmonics"])
            for k in keep:
                j = model.index(k)
                curves, _, centres = tuning_curves(act[idx], bearing[idx, k],
                                                   n_bins=options["n_bins"],
                                                   min_count=options["min_count"])
                pref, sel = curve_preference(curves, centres)
                out.append({"epoch": epoch, "target": k, "rows": rows, "preferred_rad": pref,
                            "selectivity": sel, "unique_r2": res.unique_r2[j], "p": res.p[j],
                            "regression_rad": res.bearing_rad[j], "curves": curves,
                            "centres": centres})
    return out


@stage("tuning", requires=("traces", "cells", "align", "behaviour"),
       sections=("imaging", "tuning"), enabled=lambda s: s.tuning.enabled)
def run_tuning(settings, store, compute):
    """Per cell, target and epoch: tuning curve, preference, unique variance, p, q, flags."""
    ts, im = settings.tuning, settings.imaging
    rate = im.volume_rate_hz
    cells = store.read_table("cells.parquet")
    path = _activity_path(store, ts.feature)
    bearing = np.asarray(store.read_array(ALIGN["bearing"])[...], dtype=np.float64)
    if bearing.ndim == 2:
        bearing = bearing[..., None]
    n_vol, n_planes, n_targets = bearing.shape
    nuis_parts = [_opt_array(store, ALIGN[k]) for k in ("turn", "vigor")] if ts.nuisance else []
    nuis_parts = [a.reshape(n_vol, n_planes) for a in nuis_parts if a is not None]
    nuis_parts = motor_nuisance(nuis_parts, rate_hz=rate, decay_s=im.decay_s,
                                lead_s=ts.nuisance_lead_s)
    trial = _trial_per_volume(store)
    if trial is None:
        raise StoreError(f"{ALIGN['trial']} is missing: the tuning epochs need trial ids")
    splits = store.read_table("splits.parquet")
    split_vol = _volume_index(store, splits, "split_rig_s")
    per_trial = {t: split_vol[splits["trial"].to_numpy() == t].astype(np.float64)
                 for t in np.unique(splits["trial"].to_numpy())}
    masks = epoch_masks(trial, per_trial, pre=round(ts.pre_window_s * rate),
                        post=round(ts.post_window_s * rate))
    options = {"null": ts.null, "n_perm": ts.n_permutations, "seed": ts.seed,
               "min_shift": max(1, round(ts.min_shift_s * rate)), "n_harmonics": ts.n_harmonics,
               "trial_intercepts": ts.trial_intercepts,
               "n_bins": ts.n_bins, "min_count": max(1, round(ts.min_occupancy_s * rate))}
    tasks = []
    planes = cells["plane"].to_numpy()
    for z in np.unique(planes):
        rows = np.flatnonzero(planes == z)
        zc = int(np.clip(z, 0, n_planes - 1))
        nuis = np.stack([a[:, zc] for a in nuis_parts], axis=1) if nuis_parts else None
        for a in range(0, rows.size, ts.block_cells):
            tasks.append((rows[a: a + ts.block_cells], bearing[:, zc], nuis))
    results = compute.map(_tuning_task_star, tasks, path, trial, masks, options, desc="tuning")
    _write_tuning(store, settings, cells, [r for block in results for r in block],
                  list(masks), n_targets)


def _tuning_task_star(task, path, trial, masks, options):
    rows, bearing, nuis = task
    return _tuning_task(rows, path, bearing, nuis, trial, masks, options)


def _target_names(settings, n_targets):
    beh = settings.behaviour
    names = [t.name for t in beh.targets] if beh is not None else []
    return names if len(names) == n_targets else [f"t{k}" for k in range(n_targets)]


def _write_tuning(store, settings, cells, parts, epochs, n_targets):
    ts = settings.tuning
    names = _target_names(settings, n_targets)
    n_cells = len(cells)
    fields = ("preferred_rad", "selectivity", "unique_r2", "p", "regression_rad")
    grid = {f: np.full((n_targets, len(epochs), n_cells), np.nan) for f in fields}
    curves = np.full((n_targets, len(epochs), ts.n_bins, n_cells), np.nan, dtype=np.float32)
    centres = np.linspace(-np.pi, np.pi, ts.n_bins + 1)[:-1] + np.pi / ts.n_bins
    for part in parts:
        k, e = part["target"], epochs.index(part["epoch"])
        for f in fields:
            grid[f][k, e, part["rows"]] = part[f]
        curves[k, e][:, part["rows"]] = part["curves"]
    qv, tuned = tuned_flags(grid["p"], q=ts.fdr_q)
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
        **{f: grid[f][k_idx, e_idx, c_idx] for f in fields},
        "q": qv[k_idx, e_idx, c_idx], "tuned": tuned[k_idx, e_idx, c_idx],
        "vm_mu_rad": vm_mu[k_idx, e_idx, c_idx], "vm_kappa": vm_kappa[k_idx, e_idx, c_idx]})
    store.write_table("tuning.parquet", table, metadata={
        "units": {"preferred_rad": "rad", "regression_rad": "rad", "vm_mu_rad": "rad",
                  "z_um": "um", "y_um": "um", "x_um": "um"},
        "fdr_q": ts.fdr_q, "n_permutations": ts.n_permutations, "null": ts.null})
    store.write_array("tuning/curves", curves, attrs={"targets": names, "epochs": epochs,
                                                      "bin_centres_rad": centres.tolist()},
                      dimension_names=("target", "epoch", "bin", "cell"))
    summary, switches = population_summary(tuned, targets=names, epochs=epochs)
    store.set_info({"fractions": summary, "switches": switches})
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
                lut = np.full(int(max(ids.max(initial=0), 0)) + 1, np.nan, dtype=np.float32)
                vals = np.where(tuned[k, e], grid[what][k, e], np.nan)
                lut[ids] = vals
                for z in range(labels.shape[0]):
                    arr[k, e, z] = lut[np.asarray(labels[z])]
