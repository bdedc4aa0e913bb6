"""The ``behaviour`` stage: rig log -> typed table, turn events, target geometry, splits.

Outputs::

    behaviour.parquet              the validated log (rig clock), units in the Parquet metadata
    bouts.parquet                  one row per turn event (times on the rig clock)
    splits.parquet                 one row per split (times on the rig clock)
    splits_steering.parquet        the same from the steering model alone (no critical-angle
                                   prior): the per-trial split angles to study their spread
    session.zarr/behaviour/        bearing_rad, distance_mm (n_samples, n_targets);
                                   subtended_rad, bisector_rad (n_samples,);
                                   density (y, x) with x_edges_mm, y_edges_mm
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from pipeline.behaviour.bouts import detect_turns
from pipeline.behaviour.density import trajectory_density
from pipeline.behaviour.geometry import (
    egocentric_bearing,
    target_distance,
    target_set_geometry,
)
from pipeline.behaviour.log import LogSpec, read_log
from pipeline.behaviour.splits import (
    critical_angle_brackets,
    crossing_prior,
    detect_splits,
)
from pipeline.stages import stage

__all__ = ["run_behaviour", "target_arrays", "behaviour_kernels"]


def target_arrays(table: pd.DataFrame, names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Target positions (n, n_targets) in mm from the canonical table."""
    n = len(table)
    if not names:
        return np.empty((n, 0)), np.empty((n, 0))
    tx = np.column_stack([table[f"{nm}_x_mm"].to_numpy(np.float64) for nm in names])
    ty = np.column_stack([table[f"{nm}_y_mm"].to_numpy(np.float64) for nm in names])
    return tx, ty


def behaviour_kernels(table: pd.DataFrame, settings: Any) -> dict[str, Any]:
    """Every behaviour result from the canonical table (the stage without the store I/O)."""
    b = settings
    names = list(table.attrs.get("targets", []))
    t = table["t_rig_s"].to_numpy(np.float64)
    x, y = table["x_mm"].to_numpy(np.float64), table["y_mm"].to_numpy(np.float64)
    h = table["heading_rad"].to_numpy(np.float64)
    trial = table["trial"].to_numpy()
    tx, ty = target_arrays(table, names)
    bearing = egocentric_bearing(x, y, h, tx, ty)
    geo = target_set_geometry(bearing)
    bouts = detect_turns(t, table["turn_rad_s"].to_numpy(np.float64), heading_rad=h,
                         vigor=table["vigor"].to_numpy(np.float64), trial=trial,
                         bout=table["bout"].to_numpy(), threshold_rad_s=b.turn_threshold_rad_s,
                         release_rad_s=b.turn_release_rad_s,
                         min_duration_s=b.bout_min_duration_s, min_gap_s=b.bout_min_gap_s)
    opts = {"target_names": tuple(names), "resample_s": b.split_resample_s,
            "penalty": b.split_penalty, "step_max_s": b.split_step_max_s}
    steering = detect_splits(t, x, y, h, tx, ty, trial, **opts)
    # the critical angle from the steering alone: the second pass leans on it
    crit = critical_angle_brackets(steering["subtended_prev_rad"],
                                   steering["subtended_post_rad"],
                                   n_resamples=b.bootstrap_resamples, seed=b.seed)
    prior = crossing_prior(steering, eps=b.split_prior_eps) if b.split_angle_prior else None
    splits = steering if prior is None else detect_splits(t, x, y, h, tx, ty, trial,
                                                          prior=prior, **opts)
    dens = trajectory_density(x, y, tx, ty, trial, bin_mm=b.density_bin_mm)
    return {"names": names, "bearing_rad": bearing, "distance_mm": target_distance(x, y, tx, ty),
            "subtended_rad": geo.subtended_rad, "bisector_rad": geo.bisector_rad,
            "bouts": bouts, "splits": splits, "steering_splits": steering, "critical": crit,
            "density": dens}


@stage("behaviour", sections=("behaviour",), inputs=("behaviour",),
       enabled=lambda s: s.behaviour is not None)
def run_behaviour(settings: Any, store: Any, compute: Any) -> None:
    """Read the rig log and write the behaviour table, events, geometry and splits."""
    b = settings.behaviour
    table, report = read_log(b.log, LogSpec.from_settings(b), format=b.format)
    res = behaviour_kernels(table, b)
    names = res["names"]
    meta = {"units": table.attrs["units"], "targets": names, "source": str(b.log),
            "clock": "rig", "report": report}
    store.write_table("behaviour.parquet", table, metadata=meta)
    bouts = res["bouts"].rename(columns={"onset_s": "onset_rig_s", "offset_s": "offset_rig_s"})
    store.write_table("bouts.parquet", bouts, metadata={"units": {
        "onset_rig_s": "s", "offset_rig_s": "s", "duration_s": "s", "angle_rad": "rad",
        "peak_rad_s": "rad/s"}, "sign": "positive = left (counter-clockwise)"})
    units = {"split_rig_s": "s", "commit_rig_s": "s", "x_mm": "mm", "y_mm": "mm",
             "subtended_rad": "rad", "subtended_prev_rad": "rad",
             "subtended_post_rad": "rad", "subtended_mid_rad": "rad"}
    for name, key, note in (
            ("splits.parquet", "splits", "timed with the critical-angle prior when "
             "behaviour.split_angle_prior is on: its angles lean towards the population value"),
            ("splits_steering.parquet", "steering_splits", "steering model alone (no prior): "
             "the critical angle is estimated from these; use them for per-trial angles")):
        tab = res[key]
        store.write_table(name, tab.rename(columns={"split_s": "split_rig_s",
                                                    "commit_s": "commit_rig_s"}), metadata={
            "units": units, "critical_angle": res["critical"], "method": note,
            "steering_gain": tab.attrs.get("steering_gain"),
            "steering_kappa": tab.attrs.get("steering_kappa"),
            "crossing_prior": tab.attrs.get("crossing_prior")})
    dims2 = ("sample", "target")
    store.write_array("behaviour/bearing_rad", res["bearing_rad"], dimension_names=dims2,
                      attrs={"unit": "rad", "targets": names,
                             "sign": "target direction minus heading, + = left"})
    store.write_array("behaviour/distance_mm", res["distance_mm"], dimension_names=dims2,
                      attrs={"unit": "mm", "targets": names})
    store.write_array("behaviour/subtended_rad", res["subtended_rad"],
                      dimension_names=("sample",), attrs={"unit": "rad"})
    store.write_array("behaviour/bisector_rad", res["bisector_rad"], dimension_names=("sample",),
                      attrs={"unit": "rad", "frame": "egocentric"})
    dens = res["density"]
    store.write_array("behaviour/density", dens.counts, dimension_names=("y", "x"),
                      attrs={"unit": "fraction of samples", "n_trials": dens.n_trials})
    store.write_array("behaviour/x_edges_mm", dens.x_edges_mm, attrs={"unit": "mm"})
    store.write_array("behaviour/y_edges_mm", dens.y_edges_mm, attrs={"unit": "mm"})
    if report["repaired_rows"]:
        store.warn(f"{report['repaired_rows']} rig log rows had short gaps repaired by "
                   "interpolation")
    n_trials = int(np.unique(table["trial"][table["trial"] >= 0]).size)
    splits = res["splits"]
    if len(splits) == 0 and n_trials:
        store.warn(f"no split found in any of {n_trials} trials")
    store.set_info({"log": report, "n_bouts": len(bouts), "n_splits": len(splits),
                    "n_trials": n_trials, "critical_angle": res["critical"]})
