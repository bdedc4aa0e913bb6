"""Benchmark: all penalties x folds x lags from one decomposition per fold, against
``GridSearchCV(Ridge)`` run lag by lag on the same folds.

Both compute the mean test R^2 of every (lag, penalty) over the same blocked folds; the row
records the largest difference between the two score tables in its note.

Full size (not in quick mode): 100,000 cells x 5,000 volumes of float32 activity (2 GB) in a
subprocess of its own, so its peak RSS is that of our path alone. One outer-fold basis (4,000
training rows, dual path: a 4,000 x 4,000 kernel, never a cells x cells matrix) and one
inner-fold basis (3,200 rows) are timed with the projections and predictions of 10 penalties x
11 lags; the cost of the whole nested cross-validation (5 outer folds, each with 5 inner ones
and its own basis) is extrapolated from those two, and the row says so.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from sklearn.linear_model import Ridge
from sklearn.model_selection import GridSearchCV

from pipeline.analysis.cv import BlockedKFold
from pipeline.analysis.decode import lagged_targets
from pipeline.analysis.ridge import RidgeBasis, path_scores

ROOT = Path(__file__).resolve().parents[2]


def _ours(X, Y, folds, alphas):
    total = np.zeros((len(alphas), Y.shape[1]))
    for tr, te in folds:
        total += path_scores(X, Y, tr, te, alphas=alphas, standardize=False)[0]
    return total / len(folds)                                   # (n_alphas, n_lags)


def _baseline(X, Y, folds, alphas):
    out = np.empty((len(alphas), Y.shape[1]))
    for j in range(Y.shape[1]):
        gs = GridSearchCV(Ridge(), {"alpha": list(alphas)}, cv=folds, refit=False)
        gs.fit(X, Y[:, j])
        out[:, j] = gs.cv_results_["mean_test_score"]
    return out


def _one_basis(X, Y, train, test, alphas):
    """Wall and CPU time of one fold: decomposition, projections, all penalties' predictions."""
    t0, c0 = time.perf_counter(), time.process_time()
    basis = RidgeBasis(X, train)
    a_proj = basis.project_targets(Y[train])
    z = basis.project_rows(test)
    for alpha in alphas:
        z @ (a_proj / (basis.s2 + alpha)[:, None])
    return time.perf_counter() - t0, time.process_time() - c0, bool(basis.dual)


def _full_size_child(n_samples: int, n_cells: int) -> None:
    """Subprocess body: synthetic float32 activity, one outer and one inner basis timed."""
    rng = np.random.default_rng(0)
    X = np.empty((n_samples, n_cells), dtype=np.float32)
    for a in range(0, n_samples, 500):
        X[a: a + 500] = rng.standard_normal((min(500, n_samples - a), n_cells),
                                            dtype=np.float32)
    turn = np.convolve(rng.normal(size=n_samples), np.ones(5) / 5, mode="same")
    X[:, :500] += np.roll(turn, -3)[:, None].astype(np.float32)
    Y, _ = lagged_targets(turn, np.arange(-8, 3))
    Y = np.nan_to_num(Y)
    alphas = np.logspace(-1, 5, 10)
    after_setup = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    n_test = n_samples // 5
    outer = _one_basis(X, Y, np.arange(n_test, n_samples), np.arange(n_test), alphas)
    n_in = (n_samples - n_test) // 5
    inner = _one_basis(X, Y, np.arange(n_test + n_in, n_samples), np.arange(n_test, n_test + n_in),
                       alphas)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss          # KiB on Linux
    print(json.dumps({"outer_s": outer[0], "outer_cpu_s": outer[1], "inner_s": inner[0],
                      "inner_cpu_s": inner[1], "dual": outer[2] and inner[2],
                      "peak_mb": peak / 1024, "after_setup_mb": after_setup / 1024}))


def full_size(n_samples: int = 5000, n_cells: int = 100_000) -> dict:
    """Run :func:`_full_size_child` in its own process; the extrapolated benchmark row."""
    code = (f"import sys; sys.path.insert(0, {str(ROOT)!r}); sys.path.insert(0, "
            f"{str(ROOT / 'tests' / 'benchmarks')!r}); import bench_decode as b; "
            f"b._full_size_child({n_samples}, {n_cells})")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    m = json.loads(out.stdout.strip().splitlines()[-1])
    # nested CV: 5 outer folds, each one outer basis plus 5 inner ones
    total = 5 * (m["outer_s"] + 5 * m["inner_s"])
    total_cpu = 5 * (m["outer_cpu_s"] + 5 * m["inner_cpu_s"])
    return {"name": f"decode: full size {n_cells} cells x {n_samples} volumes (extrapolated)",
            "figure": total, "baseline": None, "ratio": None, "goal": None, "passed": None,
            "unit": "s",
            "note": f"EXTRAPOLATED wall time ({total_cpu / 3600:.2f} core-hours of CPU) from "
                    f"one outer basis ({m['outer_s']:.0f} s wall, "
                    f"{m['outer_cpu_s']:.0f} s CPU, {n_samples - n_samples // 5} rows) and one "
                    f"inner basis ({m['inner_s']:.0f} s wall, {m['inner_cpu_s']:.0f} s CPU) "
                    f"x (5 outer + 25 inner), 10 penalties x 11 lags, nulls excluded; "
                    f"dual path {m['dual']}; peak RSS {m['peak_mb']:.0f} MB "
                    f"({m['after_setup_mb']:.0f} MB after making the float32 data)",
            **m}


def run(quick: bool) -> list[dict]:
    rng = np.random.default_rng(0)
    n, n_cells = (400, 200) if quick else (1500, 1000)
    X = rng.normal(size=(n, n_cells))
    turn = np.convolve(rng.normal(size=n), np.ones(5) / 5, mode="same")
    X[:, :50] += np.roll(turn, -3)[:, None]
    lags = np.arange(-8, 3)                                      # 11 lags
    Y, valid = lagged_targets(turn, lags)
    X, Y = X[valid], Y[valid]
    alphas = np.logspace(-1, 5, 10)                              # 10 penalties
    folds = list(BlockedKFold(5, gap=10).split(X))               # 5 folds
    ours = _ours(X, Y, folds, alphas)                            # warm up BLAS threads
    ours_s = np.inf
    for _ in range(3):
        t0 = time.perf_counter()
        ours = _ours(X, Y, folds, alphas)
        ours_s = min(ours_s, time.perf_counter() - t0)
    t0 = time.perf_counter()
    base = _baseline(X, Y, folds, alphas)
    base_s = time.perf_counter() - t0
    diff = float(np.abs(ours - base).max())
    ratio = base_s / ours_s
    return [{"name": "decode: ridge 10 alphas x 5 folds x 11 lags", "figure": ours_s,
             "baseline": base_s, "ratio": ratio, "goal": 50.0,
             "passed": bool(ratio >= 50.0 and diff < 1e-8), "unit": "s",
             "note": f"{n} samples x {n_cells} cells; GridSearchCV(Ridge) per lag, same folds; "
                     f"max |score difference| = {diff:.1e}"}] + ([] if quick else [full_size()])
