"""Benchmark: a one-hour 200 Hz rig log aligned end to end to 7,200 volumes x 50 planes.

Pipeline timed: read the CSV (chunked, validated) -> target geometry -> trigger edges -> pulse
matching -> clock fit (interval fit on the edge brackets) -> plane times -> resample every variable (window means over each
plane's exposure). Baselines, in the same process: a plain ``pandas.read_csv`` of the whole
file (no validation), and ``numpy.interp`` of each variable at the plane centres (point
samples, no window average). Peak memory is the largest resident-set growth seen by a psutil
sampling thread during the run.
"""

from __future__ import annotations

import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil

from pipeline.align import (
    edge_brackets,
    fit_clock,
    plane_times,
    resample_behaviour,
    rising_edges,
)
from pipeline.behaviour import egocentric_bearing, read_log, target_distance, target_set_geometry

OFFSET_S, DRIFT_PPM = 7.3, 50.0


def _write_log(path: Path, n_volumes: int, rng: np.random.Generator) -> None:
    span_s = n_volumes / 2.0
    n = int((span_s + 6.0) * 200)
    t = OFFSET_S - 3.0 + np.cumsum(0.005 + rng.normal(0, 3e-4, n))
    heading = np.cumsum(rng.normal(0, 0.01, n))
    df = pd.DataFrame({
        "time_s": t, "x_mm": np.cumsum(rng.normal(0, 0.01, n)),
        "y_mm": np.cumsum(rng.normal(0, 0.01, n)), "heading_rad": np.angle(np.exp(1j * heading)),
        "turn": rng.normal(0, 1, n), "bout": (rng.random(n) < 0.2).astype(np.int8),
        "vigor": rng.random(n), "trial": (np.arange(n) // 6000).astype(np.int32),
        "t0_x_mm": 10.0, "t0_y_mm": 20.0, "t1_x_mm": -10.0, "t1_y_mm": 20.0,
        "t2_x_mm": np.linspace(-5, 5, n), "t2_y_mm": 25.0})
    trig = np.zeros(n, dtype=np.int8)
    vol_rig = OFFSET_S + (1 + DRIFT_PPM * 1e-6) * np.arange(n_volumes) / 2.0
    keep = rng.random(n_volumes) > 0.002
    trig[np.searchsorted(t, vol_rig[keep])] = 1
    df["trigger"] = trig
    df.to_csv(path, index=False, float_format="%.6f")


def _pipeline(path: Path, n_volumes: int, n_planes: int) -> tuple[dict, float, float]:
    table, _ = read_log(path)
    t = table["t_rig_s"].to_numpy()
    names = table.attrs["targets"]
    tx = np.column_stack([table[f"{nm}_x_mm"] for nm in names])
    ty = np.column_stack([table[f"{nm}_y_mm"] for nm in names])
    x, y, h = (table[c].to_numpy() for c in ("x_mm", "y_mm", "heading_rad"))
    bearing = egocentric_bearing(x, y, h, tx, ty)
    geo = target_set_geometry(bearing)
    pulses = rising_edges(table["trigger"].to_numpy(), t, edge_time="midpoint")
    high, low = edge_brackets(table["trigger"].to_numpy(), t)    # as the align stage does
    pt = plane_times(n_volumes, n_planes, volume_rate_hz=2.0, flyback_s=0.05)
    model = fit_clock(pulses, pt[:, 0], pulse_bracket_rig_s=(low, high))
    onsets = t[np.flatnonzero(np.diff(table["bout"].to_numpy(), prepend=0) == 1)]
    out = resample_behaviour(
        t, pt, clock=model, exposure_s=0.009,
        continuous={c: table[c].to_numpy() for c in ("x_mm", "y_mm", "turn_rad_s", "vigor",
                                                       "bout")}
        | {"distance_mm": target_distance(x, y, tx, ty), "subtended_rad": geo.subtended_rad},
        angles={"heading_rad": h, "bearing_rad": bearing, "bisector_rad": geo.bisector_rad},
        labels={"trial": table["trial"].to_numpy()}, events_rig_s={"bout_onsets": onsets})
    err_ms = float(np.abs(model.scope_to_rig(pt[:, 0]) - (
        OFFSET_S + (1 + DRIFT_PPM * 1e-6) * pt[:, 0])).max() * 1e3)
    return out, err_ms, model.drift_ppm


def _baseline(path: Path, n_volumes: int, n_planes: int) -> None:
    df = pd.read_csv(path)
    t = (df["time_s"].to_numpy() - OFFSET_S) / (1 + DRIFT_PPM * 1e-6)
    pt = plane_times(n_volumes, n_planes, volume_rate_hz=2.0, flyback_s=0.05) + 0.0045
    for c in df.columns:
        np.interp(pt, t, df[c].to_numpy(dtype=np.float64))


class _PeakRSS:
    def __init__(self) -> None:
        self.proc = psutil.Process()
        self.base = self.peak = self.proc.memory_info().rss
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)

    def _poll(self) -> None:
        while not self._stop.wait(0.01):
            self.peak = max(self.peak, self.proc.memory_info().rss)

    def __enter__(self) -> _PeakRSS:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self.proc.memory_info().rss)


def run(quick: bool) -> list[dict]:
    n_volumes, n_planes = (1200, 50) if quick else (7200, 50)
    rng = np.random.default_rng(0)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "rig_log.csv"
        _write_log(path, n_volumes, rng)
        fit_clock(np.arange(10.0), np.arange(10.0))          # compile the matcher first
        with _PeakRSS() as mem:
            t0 = time.perf_counter()
            out, err_ms, drift_ppm = _pipeline(path, n_volumes, n_planes)
            ours_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        _baseline(path, n_volumes, n_planes)
        base_s = time.perf_counter() - t0
        n_rows = sum(1 for _ in open(path)) - 1
    peak_mb = (mem.peak - mem.base) / 2**20
    label = f"{n_rows:,} rows x {n_volumes:,} volumes x {n_planes} planes"
    goal_s = 5.0 if not quick else 1.5
    return [
        {"name": "align: log -> clock -> plane times -> resample (wall)", "figure": ours_s,
         "baseline": base_s, "ratio": base_s / ours_s, "goal": goal_s,
         "passed": bool(ours_s <= goal_s), "unit": "s",
         "note": f"{label}; {len(out)} variables; baseline = pandas.read_csv + numpy.interp at "
                 f"plane centres (no validation, no window means); clock error vs planted "
                 f"{err_ms:.3f} ms, drift {drift_ppm:.4f} ppm (planted {DRIFT_PPM:g})"},
        {"name": "align: peak resident memory growth", "figure": peak_mb, "baseline": 1024.0,
         "ratio": 1024.0 / max(peak_mb, 1e-9), "goal": 1024.0, "passed": bool(peak_mb < 1024),
         "unit": "MB", "note": f"{label}; psutil RSS sampled every 10 ms; goal < 1 GB"},
    ]


if __name__ == "__main__":
    for row in run(quick=True):
        print(row)
