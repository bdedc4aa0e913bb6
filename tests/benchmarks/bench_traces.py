"""Benchmarks of trace extraction: running percentile and shifted sampling.

Each entry measures ours and its baseline in the same process.
"""

from __future__ import annotations

import numpy as np
import scipy.ndimage as ndi

from pipeline.volumes.sampling import build_weights, sample_volume
from pipeline.volumes.traces import running_percentile
from tests.benchmarks.timing import best_of


def _entry(name, ours_s, base_s, goal, note):
    ratio = base_s / ours_s
    return {"name": name, "figure": ours_s, "baseline": base_s, "ratio": ratio, "goal": goal,
            "passed": bool(ratio >= goal), "unit": "s", "note": note}


def bench_percentile(quick):
    rng = np.random.default_rng(0)
    n_cells, n_t, window = (200, 3000, 120) if quick else (2000, 3000, 120)
    x = rng.normal(size=(n_cells, n_t))
    running_percentile(x[:2], 20.0, window)  # compile outside the timing
    ours = best_of(lambda: running_percentile(x, 20.0, window), 3)
    base = best_of(lambda: ndi.percentile_filter(x, 20.0, size=(1, window)), 1)
    same = np.allclose(running_percentile(x[:20], 20.0, window),
                       ndi.percentile_filter(x[:20], 20.0, size=(1, window)))
    return _entry("running percentile vs scipy.ndimage.percentile_filter", ours, base, 10.0,
                  f"{n_cells} cells x {n_t} samples, {window}-sample window; equal: {same}")


def bench_sampling(quick):
    rng = np.random.default_rng(1)
    shape = (10, 256, 256) if quick else (20, 512, 512)
    vs = (2.0, 0.8, 0.8)
    lab = np.zeros(shape, np.int32)
    n = shape[0] * shape[1] * shape[2] // 3000
    cen = np.column_stack([rng.integers(1, s - 1, n) for s in shape])
    lab[tuple(cen.T)] = np.arange(1, n + 1)
    lab = ndi.grey_dilation(lab, footprint=np.ones((3, 7, 7), bool))
    _, lab = np.unique(lab, return_inverse=True)
    lab = lab.reshape(shape).astype(np.int32)
    w = build_weights(lab, voxel_size_um=vs)
    vol = rng.integers(100, 4000, shape).astype(np.uint16)
    shift = np.array([0.3, -2.6, 1.2])
    n_cells = int(lab.max())

    def baseline():
        reg = ndi.shift(vol.astype(np.float32), -shift, order=1, mode="nearest")
        # per-cell means of the registered copy (vectorised over cells by scipy.ndimage.mean)
        return ndi.mean(reg, lab, index=np.arange(1, n_cells + 1))

    ours = best_of(lambda: sample_volume(vol, shift, w), 3)
    base = best_of(baseline, 2)
    close = np.allclose(sample_volume(vol, shift, w)[0], baseline(), rtol=1e-4)
    return _entry("shifted sampling vs registered copy + per-cell means", ours, base, 2.0,
                  f"{shape} volume, {n_cells} cells (+ rings in ours only); equal: {close}")


def run(quick: bool) -> list[dict]:
    """All trace benchmarks; ``quick`` uses smaller inputs."""
    return [bench_percentile(quick), bench_sampling(quick)]


if __name__ == "__main__":
    import sys

    for row in run("--quick" in sys.argv):
        print(row)
