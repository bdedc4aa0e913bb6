"""Benchmark: the permutation step of the tuning test as a fraction of the machine's GEMM peak.

The figure is the permutation GEMM's floating-point operations divided by the wall time of the
whole :func:`unique_variance_test` call (bases, GEMM, reductions); the baseline is the rate of
one large ``np.dot`` of float32 matrices measured in the same run.
"""

from __future__ import annotations

import time

import numpy as np

from pipeline.analysis.stats import trial_shuffle_indices
from pipeline.analysis.tuning import unique_variance_test


def _peak_gflops(size=3000, repeat=3):
    a = np.random.default_rng(1).normal(size=(size, size)).astype(np.float32)
    b = a.T.copy()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        np.dot(a, b)
        best = min(best, time.perf_counter() - t0)
    return 2.0 * size**3 / best / 1e9


def run(quick: bool) -> list[dict]:
    rng = np.random.default_rng(0)
    n_cells, n, n_perm, n_targets = (2000, 1000, 200, 2) if quick else (20000, 3000, 1000, 2)
    trials = np.repeat(np.arange(n // 100), 100)
    bearings = rng.uniform(-np.pi, np.pi, size=(n, n_targets))
    act = rng.normal(size=(n, n_cells)).astype(np.float32)
    perms = trial_shuffle_indices(trials, n_perm, seed=0)
    peak = _peak_gflops(2000 if quick else 4000)
    t0 = time.perf_counter()
    unique_variance_test(act, bearings, perm_index=perms)
    wall_s = time.perf_counter() - t0
    flops = 2.0 * n * (n_perm + 1) * n_targets * 2 * n_cells
    achieved = flops / wall_s / 1e9
    ratio = achieved / peak
    return [{"name": "tuning: permutation GEMM rate / matmul peak", "figure": achieved,
             "baseline": peak, "ratio": ratio, "goal": 0.5, "passed": bool(ratio >= 0.5),
             "unit": "GFLOP/s",
             "note": f"{n_cells} cells x {n} samples x {n_perm} permutations x {n_targets} "
                     f"targets in {wall_s:.1f} s"}]
