"""A small synthetic session store with every stage's outputs, written through the store API.

Used by the report, NWB export and Session API tests (import ``build_synthetic_store``). The
planted facts (``TRUTH``) are what the tests recover: a clock offset and drift, two cells with
known positions and sizes, a known shift trace.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pipeline.align import ClockModel, ClockSegment
from pipeline.store import Store

TRUTH: dict[str, Any] = {
    "n_t": 40, "shape_zyx": (3, 20, 24), "rate_hz": 2.0, "voxel_um": (4.0, 1.0, 1.0),
    "offset_s": 1.5, "drift_ppm": 40.0, "rig_rate_hz": 20.0, "n_cells": 5,
}

#: the planted clock as the align stage records it (one segment, one pulse dropped)
CLOCK = ClockModel(TRUTH["offset_s"], TRUTH["drift_ppm"],
                   (ClockSegment(0.0, TRUTH["n_t"] / TRUTH["rate_hz"], TRUTH["offset_s"],
                                 TRUTH["drift_ppm"], TRUTH["n_t"] - 1),),
                   residual_rms_ms=0.3, residual_max_ms=0.9, matched=TRUTH["n_t"] - 1,
                   dropped_volume_indices=(7,), spurious_pulse_indices=(),
                   n_events=TRUTH["n_t"], n_pulses=TRUTH["n_t"] - 1)

CONFIG = {
    "session": {"name": "synthetic", "subject": "larva-1", "species": "Danio rerio",
                "description": "synthetic store for tests"},
    "imaging": {"voxel_size_um": list(TRUTH["voxel_um"]), "volume_rate_hz": TRUTH["rate_hz"],
                "indicator": "GCaMP6s", "excitation_nm": 488.0, "emission_nm": 510.0,
                "location": "whole brain", "planes_per_volume": 3},
    "report": {"n_raster_cells": 200},
}


def _stage(store: Store, name: str, write, *, seconds: float = 0.5,
           warnings: tuple[str, ...] = (), info: dict[str, Any] | None = None) -> None:
    sub = store.stage_store(name, "hash", resumable=False)
    write(sub)
    for w in warnings:
        sub._warnings.append(w)
    sub.set_info(info or {})
    outputs = sub.commit()
    store.write_record(name, {"stage": name, "outputs": outputs, "seconds": seconds,
                              "started": "2026-01-01T00:00:00", "finished": "2026-01-01T00:00:01",
                              **sub.record_extras()})


def _cells(shape: tuple[int, int, int], n: int) -> tuple[np.ndarray, pd.DataFrame]:
    labels = np.zeros(shape, np.int32)
    rows = []
    for i in range(n):
        z, y, x = i % shape[0], 3 + 3 * i, 4 + 4 * i
        labels[z, y:y + 2, x:x + 3] = i + 1
        rows.append({"id": i + 1, "z_vox": z, "y_vox": y + 0.5, "x_vox": x + 1.0,
                     "z_um": 4.0 * z, "y_um": y + 0.5, "x_um": x + 1.0, "n_voxels": 6,
                     "plane": z})
    return labels, pd.DataFrame(rows)


def build_synthetic_store(root: Path, rng: np.random.Generator, *,
                          skip: tuple[str, ...] = ()) -> Store:
    """Write a complete small session store under ``root`` (stages in ``skip`` left out)."""
    T = TRUTH
    n_t, (nz, ny, nx), n_c = T["n_t"], T["shape_zyx"], T["n_cells"]
    store = Store(root)
    store.update_manifest(config=CONFIG, inputs={"imaging": [
        {"path": "/data/raw/vol_00000.tif", "name": "vol_00000.tif", "size": 1234,
         "sha256": "ab" * 32}]}, versions={"numpy": np.__version__})
    t_s = np.arange(n_t) / T["rate_hz"]

    def ingest(s):
        vol = s.create_volumes(shape=(n_t, nz, ny, nx), chunks=(1, nz, ny, nx),
                               voxel_size_um=T["voxel_um"], interval_s=1 / T["rate_hz"])
        vol[...] = rng.integers(100, 200, size=(n_t, nz, ny, nx)).astype(np.uint16)

    labels, cells = _cells((nz, ny, nx), n_c)

    def motion(s):
        shifts = np.stack([0.1 * np.sin(t_s), 0.5 * np.cos(t_s / 3), t_s / n_t], axis=1)
        s.write_array("motion/shifts_vox", shifts)
        s.write_array("motion/shifts_um", shifts * np.asarray(T["voxel_um"]))
        s.write_array("motion/quality", 0.9 - 0.01 * rng.random(n_t))
        flags = np.zeros(n_t, bool)
        flags[[5, 17]] = True
        s.write_array("motion/flags", flags)
        s.write_array("motion/mean", rng.random((nz, ny, nx)).astype(np.float32))
        s.write_array("motion/local_corr", rng.random((nz, ny, nx)).astype(np.float32))

    def cells_stage(s):
        s.create_labels(labels, voxel_size_um=T["voxel_um"])
        s.write_table("cells.parquet", cells)

    def traces(s):
        for kind in ("raw", "neuropil", "corrected", "dff", "events", "denoised"):
            s.write_array(f"traces/{kind}", rng.random((n_c, n_t)).astype(np.float32),
                          attrs={"unit": "a.u." if kind != "dff" else "1"})

    # behaviour on the rig clock: t_rig = offset + (1 + drift) * t_scope
    t_scope = np.arange(0, n_t / T["rate_hz"], 1 / T["rig_rate_hz"])
    t_rig = T["offset_s"] + (1 + T["drift_ppm"] * 1e-6) * t_scope
    n_b = t_rig.size
    trial = (t_scope >= t_scope[-1] / 2).astype(np.int64)
    x = np.where(trial == 0, t_scope, t_scope - t_scope[-1] / 2) * 2.0
    y = 0.2 * np.sin(t_scope)
    beh = pd.DataFrame({"t_rig_s": t_rig, "x_mm": x, "y_mm": y,
                        "heading_rad": np.arctan2(np.gradient(y), np.gradient(x)),
                        "turn_rad_s": rng.normal(0, 0.2, n_b), "bout": np.zeros(n_b, np.int64),
                        "trial": trial, "trigger": np.zeros(n_b, np.int64),
                        "t0_x_mm": np.full(n_b, 40.0), "t0_y_mm": np.full(n_b, 10.0),
                        "t1_x_mm": 40.0 + 0.1 * t_scope, "t1_y_mm": np.full(n_b, -10.0)})

    def behaviour(s):
        s.write_table("behaviour.parquet", beh)
        s.write_table("bouts.parquet", pd.DataFrame({
            "onset_rig_s": t_rig[[20, 200]], "offset_rig_s": t_rig[[25, 210]],
            "onset_index": [20, 200], "offset_index": [25, 210], "duration_s": [0.25, 0.5],
            "angle_rad": [0.3, -0.2], "peak_rad_s": [1.2, -0.8], "vigor": [1.0, 1.1],
            "direction": ["left", "right"], "trial": [0, 1]}))
        s.write_table("splits.parquet", pd.DataFrame({
            "trial": [0, 1], "level": [1, 1], "split_index": [100, 330],
            "split_rig_s": t_rig[[100, 330]], "x_mm": [15.0, 15.0], "y_mm": [0.0, 0.1],
            "subtended_rad": [0.9, 1.1], "subtended_prev_rad": [0.89, 1.09],
            "subtended_mid_rad": [0.895, 1.095], "dropped": ["t1", "t0"],
            "chosen": ["t0", "t1"], "n_remaining": [2, 2]}))
        s.write_array("behaviour/density", rng.random((16, 20)))
        s.write_array("behaviour/x_edges_mm", np.linspace(0, 40, 21))
        s.write_array("behaviour/y_edges_mm", np.linspace(-10, 10, 17))

    def align(s):
        plane_off = np.arange(nz) / (T["rate_hz"] * nz)
        s.write_array("align/plane_times_s", t_s[:, None] + plane_off[None, :])
        s.write_array("align/behaviour_t_scope_s", CLOCK.rig_to_scope(t_rig))

    lags = np.linspace(-2, 1, 7)

    def decode(s):
        # shaped like the decode stage's document: one entry per score, each with lags_s
        def curve(metric, peak):
            return {"metric": metric, "lags_s": lags.tolist(),
                    "mean": (peak * np.exp(-(lags + 1.5) ** 2)).tolist(),
                    "folds": rng.random((5, lags.size)).tolist(),
                    "null_mean": [0.0] * lags.size, "null_p95": [0.08] * lags.size,
                    "earliest_lag_s": -1.5, "best_lag_s": -1.5, "n_null": 20}
        s.write_json("decode.json", {
            "turn_r2": curve("r2", 0.3), "bout_auc": curve("auc", 0.8),
            "bout_confusion": {"lag_s": 0.0, "classes": ["left", "right"],
                               "confusion": [[10, 2], [3, 9]], "n_bouts": 24},
            "null_kind": "trial-shuffle", "n_samples": n_t, "rate_hz": T["rate_hz"],
            "weights_lag_s": -1.5})
        s.write_array("decode/weights", rng.normal(size=n_c))

    def tuning(s):
        rows = [{"cell": c, "z_um": cells.z_um[c - 1], "y_um": cells.y_um[c - 1],
                 "x_um": cells.x_um[c - 1], "target": tgt, "epoch": ep,
                 "preferred_rad": float(rng.uniform(-np.pi, np.pi)),
                 "selectivity": float(rng.random()), "unique_r2": 0.01,
                 "p": float(rng.random()), "q": float(rng.random()), "tuned": bool(c % 2)}
                for c in cells.id for tgt in ("t0", "t1") for ep in ("pre", "post")]
        s.write_table("tuning.parquet", pd.DataFrame(rows))
        s.write_array("tuning/curves", rng.random((2, 2, 12, n_c)),
                      attrs={"bin_centres_rad": np.linspace(-np.pi, np.pi, 12, endpoint=False)
                             .tolist(), "targets": ["t0", "t1"], "epochs": ["pre", "post"]},
                      dimension_names=("target", "epoch", "bin", "cell"))

    info_align = {"clock": CLOCK.to_dict(), "residual_rms_ms": 0.3, "matched": n_t}
    info_behaviour = {"critical_angle": {"estimate_rad": 1.0, "ci_low_rad": 0.85,
                                         "ci_high_rad": 1.15, "n": 2}}
    plan = [("ingest", ingest, {}, ()), ("motion", motion, {}, ("2 volumes flagged",)),
            ("cells", cells_stage, {}, ()), ("traces", traces, {}, ()),
            ("behaviour", behaviour, info_behaviour, ()), ("align", align, info_align, ("1 pulse dropped",)),
            ("decode", decode, {}, ()), ("tuning", tuning, {}, ())]
    for name, fn, info, warns in plan:
        if name not in skip:
            _stage(store, name, fn, warnings=warns, info=info)
    return store


def test_synthetic_store_has_every_stage(tmp_path, rng):
    store = build_synthetic_store(tmp_path / "out", rng)
    assert set(store.manifest()["stages"]) == {"ingest", "motion", "cells", "traces",
                                               "behaviour", "align", "decode", "tuning"}
    assert store.labels().shape == TRUTH["shape_zyx"]
