"""Benchmark: the permutation step of the tuning test, against the machine's GEMM peak.

(a) The figure is the permutation GEMM's floating-point operations (unique and joint bases of
    every permutation times the nuisance residuals) divided by the wall time of the whole
    :func:`unique_variance_test` call (bases, GEMM, reductions), with a realistic nuisance
    (30 columns); the baseline is the rate of one large float32 ``np.dot`` measured in the
    same run (goal >= 0.5).
(b) Non-quick only: 100k cells x 5k samples x 1,000 permutations through dask in blocks of
    cells (threads share one set of permutation bases), in its own subprocess: wall time and
    peak RSS (``getrusage`` ru_maxrss). The activity is generated block by block, so memory
    is bounded by the bases plus a few blocks.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from pipeline.analysis.stats import trial_shuffle_indices
from pipeline.analysis.tuning import permutation_bases, unique_variance_test

ROOT = Path(__file__).resolve().parents[2]


def _peak_gflops(size=3000, repeat=3):
    a = np.random.default_rng(1).normal(size=(size, size)).astype(np.float32)
    b = a.T.copy()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        np.dot(a, b)
        best = min(best, time.perf_counter() - t0)
    return 2.0 * size**3 / best / 1e9


def _design(rng, n, n_targets, n_nuis=30):
    trials = np.repeat(np.arange(n // 100), 100)
    bearings = rng.uniform(-np.pi, np.pi, size=(n, n_targets))
    nuisance = rng.normal(size=(n, n_nuis))
    return trials, bearings, nuisance


def _flops(n, n_perm, n_targets, n_cells, m=2):
    # unique and joint bases: 2 x n_targets x m columns per permutation (and the observed)
    return 2.0 * n * (n_perm + 1) * 2 * n_targets * m * n_cells


def _big_child(n_cells, n, n_perm, block):
    """Run in a subprocess: 100k-cell case through dask, print time and peak RSS as JSON."""
    import dask
    import dask.array as da

    rng = np.random.default_rng(0)
    trials, bearings, nuisance = _design(rng, n, 2)
    perms = trial_shuffle_indices(trials, n_perm, seed=0)
    t0 = time.perf_counter()
    null = permutation_bases(n, bearings, perm_index=perms, nuisance=nuisance)
    t_bases = time.perf_counter() - t0

    def block_p(_, block_info=None):
        lo, hi = block_info[None]["array-location"][1]
        y = np.random.default_rng(lo).normal(size=(n, hi - lo)).astype(np.float32)
        return null.test(y, block_cells=block).p_joint[None, :]

    cells = da.zeros((1, n_cells), chunks=(1, block), dtype=np.float32)
    out = cells.map_blocks(block_p, dtype=np.float64)
    with dask.config.set(scheduler="threads", num_workers=2):
        p = out.compute()
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
    print(json.dumps({"wall_s": wall, "bases_s": t_bases, "peak_mb": peak,
                      "frac_p_le_05": float(np.mean(p <= 0.05))}))


def _big(n_cells=100_000, n=5000, n_perm=1000, block=4096):
    code = (f"import sys; sys.path.insert(0, {str(ROOT)!r}); sys.path.insert(0, "
            f"{str(ROOT / 'tests' / 'benchmarks')!r}); import bench_tuning as b; "
            f"b._big_child({n_cells}, {n}, {n_perm}, {block})")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(quick: bool) -> list[dict]:
    rng = np.random.default_rng(0)
    n_cells, n, n_perm, n_targets = (2000, 1000, 200, 2) if quick else (20000, 3000, 1000, 2)
    trials, bearings, nuisance = _design(rng, n, n_targets)
    act = rng.normal(size=(n, n_cells)).astype(np.float32)
    perms = trial_shuffle_indices(trials, n_perm, seed=0)
    peak = _peak_gflops(2000 if quick else 4000)
    t0 = time.perf_counter()
    unique_variance_test(act, bearings, perm_index=perms, nuisance=nuisance)
    wall_s = time.perf_counter() - t0
    achieved = _flops(n, n_perm, n_targets, n_cells) / wall_s / 1e9
    ratio = achieved / peak
    rows = [{"name": "tuning: permutation GEMM rate / matmul peak", "figure": achieved,
             "baseline": peak, "ratio": ratio, "goal": 0.5, "passed": bool(ratio >= 0.5),
             "unit": "GFLOP/s",
             "note": f"{n_cells} cells x {n} samples x {n_perm} permutations x {n_targets} "
                     f"targets, 30 nuisance columns, in {wall_s:.1f} s (bases included)"}]
    if not quick:
        big = _big()
        flops = _flops(5000, 1000, 2, 100_000)
        rows.append({"name": "tuning: 100k cells x 5k samples x 1000 permutations (dask)",
                     "figure": big["wall_s"], "baseline": None, "ratio": None, "goal": None,
                     "passed": True, "unit": "s",
                     "note": f"peak RSS {big['peak_mb']:.0f} MB; bases {big['bases_s']:.1f} s; "
                             f"{flops / big['wall_s'] / 1e9:.0f} GFLOP/s overall "
                             f"(matmul peak {peak:.0f}); P(p<=0.05) on noise "
                             f"{big['frac_p_le_05']:.3f}"})
    return rows


if __name__ == "__main__":
    for row in run(quick="--full" not in sys.argv):
        print(row)
