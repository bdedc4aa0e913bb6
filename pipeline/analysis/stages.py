"""The ``decode`` stage, and the store helpers it shares with the ``tuning`` stage
(:mod:`pipeline.analysis.tuning_stage`): map the analysis kernels over the session store.

Inputs of both stages (written by earlier stages):

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
are the fine-grid regressors sampled at plane ``z``'s times. The decoders use all cells
together and one target per volume: the plane average of the turn command.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import zarr

from pipeline.analysis.bouts import decode_bouts
from pipeline.analysis.cv import gap_samples
from pipeline.analysis.decode import decode_continuous, lag_samples
from pipeline.errors import InputError, StoreError
from pipeline.stages import stage

__all__ = ["ALIGN", "run_decode"]

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
    maps = [(store.create_array(f"decode/{name}", shape=tuple(labels.shape), dtype="float32",
                                chunks=(1, *labels.shape[1:]), fill_value=np.nan,
                                dimension_names=("z", "y", "x"),
                                attrs={"unit": unit, "lag_s": lag_s}),
             _cell_lut(cells["id"].to_numpy(), values))
            for name, values, unit in (("weight_map", weights, "turn units per activity unit"),
                                       ("pattern_map", pattern, "activity units per turn unit"))]
    for z in range(labels.shape[0]):           # each label plane read once for both maps
        lab = np.asarray(labels[z])
        for arr, lut in maps:
            arr[z] = _painted(lut, lab)


def _cell_lut(ids, values):
    """Look-up table from cell label to value (NaN for labels without a value)."""
    lut = np.full(int(max(ids.max(initial=0), 0)) + 1, np.nan, dtype=np.float32)
    lut[ids] = values
    return lut


def _painted(lut, labels):
    """One plane of a label volume with each cell's value from ``lut`` (NaN off cells)."""
    lab = np.asarray(labels)
    return np.where(lab > 0, lut[np.clip(lab, 0, lut.size - 1)], np.nan)


def _scope_times(store, table, column):
    from pipeline.align import ClockModel

    info = (store.record("align") or {}).get("info", {})
    if "clock" not in info:
        raise StoreError(f"{column}: rig-clock times need the align stage's clock model; "
                         "re-run `forkmap run --from align`")
    return ClockModel.from_dict(info["clock"]).rig_to_scope(table[column].to_numpy(np.float64))
