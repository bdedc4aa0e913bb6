"""Compare a finished demo run with the planted truth (shared by the end-to-end tests).

``run`` is a dict with ``session`` (:class:`pipeline.session.Session`) and ``truth`` (the
generator's ``truth/`` folder, demo_volume/README.md).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

TARGETS = ("t0", "t1", "t2")


def bout_interval_s(truth: Path) -> float:
    bouts = pd.read_parquet(truth / "bouts.parquet")
    return float(np.median(np.diff(bouts["onset_rig_s"].to_numpy())))


def split_errors_s(run) -> np.ndarray:
    truth = pd.read_parquet(run["truth"] / "trials.parquet")
    found = run["session"].splits
    m = truth.merge(found.assign(split_index=found["level"] - 1), on=["trial", "split_index"],
                    how="left")
    return (m["split_rig_s"] - m["t_split_rig_s"]).abs().to_numpy()   # NaN: not found


def tuning_recovery(run) -> dict[str, float]:
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
    # the demo plants "post" as after the trial's FIRST split (demo_volume/README.md), so a
    # post or both cell is also tuned between the first and the second split of a
    # three-target trial: a flag there is a true key (not required for sensitivity)
    allowed = set(planted) | {(r.det, TARGETS[int(r.target)], "between")
                              for r in truth[truth["cell_class"] == "bearing"].itertuples()
                              if r.epoch in ("post", "both")}
    tuned = tun[tun["tuned"]]
    false = [k not in allowed for k in zip(tuned["cell"], tuned["target"], tuned["epoch"],
                                           strict=True)]
    return {"sensitivity": float(np.mean(found)), "fdr": float(np.mean(false)),
            "n_tuned": len(tuned), "median_err_deg": float(np.median(err_deg)),
            "within_20": float(np.mean(np.asarray(err_deg) <= 20.0))}


def corr_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Pearson correlation of each row of ``a`` with the same row of ``b``."""
    a = a - a.mean(axis=1, keepdims=True)
    b = b - b.mean(axis=1, keepdims=True)
    return (a * b).sum(axis=1) / np.sqrt((a * a).sum(axis=1) * (b * b).sum(axis=1))


def shifts(store, truth: Path) -> tuple[np.ndarray, np.ndarray]:
    """Estimated and planted shifts (t, 3) in voxels."""
    est = np.asarray(store.read_array("motion/shifts_vox")[...])
    planted = pd.read_parquet(truth / "shifts.parquet")[["dz_vox", "dy_vox", "dx_vox"]]
    return est, planted.to_numpy()


def shift_rms_vox(store, truth: Path) -> float:
    """RMS shift error in voxels after removing each series' mean.

    Shifts are relative to the session's reference, the truth to the unshifted brain: the two
    differ by a constant (the reference's own offset).
    """
    est, tru = shifts(store, truth)
    err = (est - est.mean(0)) - (tru - tru.mean(0))
    return float(np.sqrt((err**2).sum(axis=1).mean()))


def match_cells(store, truth: Path):
    """Match detected cells to planted nuclei within the median nucleus radius.

    Returns ``(planted, cells, ok, idx, dist)``: the planted table, the detected table, which
    detected cells have a planted nucleus within the radius, the nearest planted row of each
    detected cell and its distance in um.
    """
    import json

    cells = store.read_table("cells.parquet")
    planted = pd.read_parquet(truth / "cells.parquet")
    vs = np.asarray(json.loads((truth / "scenario.json").read_text())["voxel_size_um"])
    # cells are found in the reference's frame, which is the brain displaced by the mean
    # planted shift minus the mean estimated one: move them back before matching
    est, tru = shifts(store, truth)
    found = (cells[["z_vox", "y_vox", "x_vox"]].to_numpy() + est.mean(0) - tru.mean(0)) * vs
    radius_um = float(planted["radius_um"].median())
    # reference: scipy.spatial.cKDTree
    dist, idx = cKDTree(planted[["z_vox", "y_vox", "x_vox"]].to_numpy() * vs).query(found)
    return planted, cells, dist < radius_um, idx, dist
