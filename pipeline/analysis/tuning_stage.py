"""The ``tuning`` stage: per cell, target and epoch, bearing tuning with permutation tests.

Reads the same store arrays as the decode stage (:mod:`pipeline.analysis.stages` lists them)
plus the bearings and trial ids on the rig's samples, the split and bout tables; writes
``tuning.parquet``, ``session.zarr/tuning/curves`` and the painted preference maps.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import zarr

from pipeline.analysis.regressors import (
    baseline_columns,
    sample_columns,
    trial_anchors,
    tuning_regressors,
    uniform_grid,
    window_epochs,
)
from pipeline.analysis.stages import (
    ALIGN,
    _activity_path,
    _cell_lut,
    _opt_array,
    _painted,
    _scope_times,
)
from pipeline.analysis.stats import (
    circular_shift_indices,
    swap_donor_times,
    swap_orders,
    trial_shuffle_indices,
)
from pipeline.analysis.tuning import (
    curve_preference,
    fit_von_mises,
    population_summary,
    trial_indicators,
    tuned_flags,
    tuning_curves,
    unique_variance_test,
    within_trial_alone_r2,
)
from pipeline.errors import StoreError
from pipeline.stages import stage
from pipeline.volumes.traces import window_samples

__all__ = ["run_tuning"]


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


def _tuning_task(rows, activity_path, design, options):
    """One block of cells of one plane: each epoch's joint test and the tuning curves."""
    act = np.asarray(zarr.open_array(activity_path, mode="r").oindex[rows, :]).T
    idx, epoch_of = design["samples"], design["epoch_of"]
    y = act[idx]
    terms, levels, motor = design["terms"], design["levels"], design["motor"]
    trial = design["trial"]
    fixed = None
    if options["trial_intercepts"]:
        fixed = trial_indicators(trial)
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
                                   fixed_nuisance=fixed, **_null_of(design, e, keep))
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
    if options["baseline"] is not None and reg["motor"].shape[1]:
        # the dF/F baseline saw every sample of the plane, not only the analysis windows:
        # sample the motor terms at all of them once, and take the windows' rows from there
        fin = np.isfinite(plane_t)
        full = np.full((plane_t.size, reg["motor"].shape[1]), np.nan)
        full[fin] = sample_columns(t_fine, reg["motor"], plane_t[fin])
        extra = np.full((plane_t.size, 5), np.nan)
        extra[fin] = baseline_columns(full[fin], options["leads_s"], **options["baseline"])
        motor = np.concatenate([full[idx], extra[idx]], axis=1)
    else:
        motor = sample_columns(t_fine, reg["motor"], t)
    return {"samples": idx, "epoch_of": epoch_of[idx], "trial": trial_z[idx],
            "epochs": reg["epochs"], "bearing": bearing_z[idx],
            "terms": sample_columns(t_fine, reg["terms"], t),
            "levels": sample_columns(t_fine, reg["levels"], t),
            "motor": motor,
            "null": (_swap_design(reg, t_fine, t, trial_z[idx], options,
                                  seed=options["seed"] + int(z))
                     if options["null"] == "aligned"
                     else _perms(trial_z[idx], options, seed=options["seed"] + int(z)))}


def _null_of(design, e, keep):
    """The permutation arguments of epoch ``e``'s test: the swap's (a tuple of the donor
    table and orders) or a row reordering (an index array)."""
    if isinstance(design["null"], tuple):
        terms, order = design["null"]
        return {"perm_columns": _SwappedColumns(terms[:, :, e][:, :, keep], order)}
    return {"perm_index": design["null"]}


class _SwappedColumns:
    """The bearing terms of every permutation of the split-aligned swap, gathered on demand.

    ``self[a:b]`` is ``(b - a, n_samples, n_targets, m)``: each sample's terms taken from its
    donor trial in permutations ``a..b``. Holding one table of every trial's terms at every
    sample (``n_trials x n_samples``) instead of all permutations keeps a plane's null to a
    few MB, built batch by batch inside :func:`pipeline.analysis.permtest.permutation_bases`.
    """

    def __init__(self, donor_terms, order):
        self.donor_terms, self.order = donor_terms, order
        self.shape = (order.shape[0], *donor_terms.shape[1:])
        self.ndim = 4

    def __getitem__(self, sl):
        rows = self.order[sl]
        return self.donor_terms[rows, np.arange(rows.shape[1])[None, :]]


def _swap_design(reg, t_fine, t, trial, options, *, seed):
    """Every trial's terms aligned with every sample, and each permutation's donors.

    Trials are swapped within their kind (the targets they show); a plane whose trials are
    all of different kinds swaps them all together rather than not at all.
    """
    donors, _ = swap_donor_times(t, trial, options["anchors"])
    terms = sample_columns(t_fine, reg["terms"], donors.ravel()).astype(np.float32)
    kinds = [options["kinds"].get(int(i), 0) for i in np.unique(trial)]
    blocks = options["kinds"] if len(kinds) > len(set(kinds)) else None
    order = swap_orders(trial, options["n_perm"], kinds=blocks, seed=seed)
    return terms.reshape(donors.shape[0], t.size, *reg["terms"].shape[1:]), order


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
    bearing_fine, trial_fine = held[:, :-1], held[:, -1].astype(np.int64)
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
    # the null's anchors: each trial's first split, its span on the rig's clock and its kind
    anchors = trial_anchors(t_fine, trial_fine, bearing_fine, split_s)
    shown = _trials_per_target(anchors[1], _target_names(settings, n_targets))
    for name, count in shown.items():
        if count < ts.min_epoch_trials:
            store.warn(f"tuning: target {name} is shown in {count} trials with a split, fewer "
                       f"than tuning.min_epoch_trials = {ts.min_epoch_trials}: its tests "
                       f"have little power (few trials to swap)")
    reg = tuning_regressors(t_fine, bearing_fine, trial_fine, split_s,
                            rise_s=im.rise_s, decay_s=im.decay_s, n_harmonics=ts.n_harmonics,
                            bouts=bouts, leads_s=ts.nuisance_leads_s)
    options = {"n_perm": ts.n_permutations, "seed": ts.seed, "pre_s": ts.pre_window_s,
               "null": ts.null, "min_shift": max(1, round(ts.min_shift_s * im.volume_rate_hz)),
               "post_s": ts.post_window_s, "trial_intercepts": ts.trial_intercepts,
               "attribution": ts.attribution,
               "anchors": anchors[0], "kinds": anchors[1],
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
                  reg["epochs"], n_targets, between=between, shown=shown)


def _trials_per_target(kinds, names):
    """Trials (with a split) showing each target, from the null's trial kinds (bit k set when
    target k is shown)."""
    return {name: sum(1 for kind in kinds.values() if kind >> k & 1)
            for k, name in enumerate(names)}


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


def _write_tuning(store, settings, cells, parts, epochs, n_targets, between="separate",
                  shown=None):
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
                    "between_epoch": between, "between_setting": ts.between_epoch,
                    "trials_per_target": shown or {},
                    "min_epoch_trials": ts.min_epoch_trials,
                    "null": ts.null,
                    "n_permutations": ts.n_permutations})
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
    maps = []                                  # (array, target, epoch, look-up table)
    for what in ("preferred_rad", "selectivity"):
        arr = store.create_array(f"tuning/{what}", shape=(n_t, n_e, *labels.shape),
                                 dtype="float32", chunks=(1, 1, 1, *labels.shape[1:]),
                                 fill_value=np.nan, dimension_names=("target", "epoch", "z",
                                                                     "y", "x"),
                                 attrs={**attrs, "unit": "rad" if what.endswith("rad") else ""})
        maps += [(arr, k, e, _cell_lut(ids, np.where(tuned[k, e], grid[what][k, e], np.nan)))
                 for k in range(n_t) for e in range(n_e)]
    for z in range(labels.shape[0]):           # each label plane read once for every map
        lab = np.asarray(labels[z])
        for arr, k, e, lut in maps:
            arr[k, e, z] = _painted(lut, lab)
