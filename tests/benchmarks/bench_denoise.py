"""Benchmark of the denoised trace: noise-constrained OASIS against a generic NNLS solve.

Ours runs the whole noise-constrained fit (the penalty search, ~10-20 OASIS passes per cell);
the baseline solves only the final penalised problem once per cell with
``scipy.optimize.nnls`` on the convolution matrix, so the ratio is a lower bound on the gain
over a generic route (which would need the search too).
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import nnls

from pipeline.volumes.oasis import ar1_gamma, denoise_many
from tests.benchmarks.timing import best_of


def bench_denoise(quick):
    n_cells, n_t = (20, 400) if quick else (40, 600)
    rng = np.random.default_rng(0)
    gamma = ar1_gamma(1.8, 2.0)
    k = np.tril(gamma ** np.clip(np.subtract.outer(np.arange(n_t), np.arange(n_t)), 0, None))
    s_true = (rng.random((n_cells, n_t)) < 0.03) * rng.uniform(0.5, 2.0, (n_cells, n_t))
    y = s_true @ k.T + rng.normal(0, 0.1, (n_cells, n_t))
    denoise_many(y[:1], gamma=gamma)  # compile
    _, _, lam = denoise_many(y, gamma=gamma)
    ours = best_of(lambda: denoise_many(y, gamma=gamma), 3)
    shift = np.linalg.solve(k.T, np.ones(n_t))

    def baseline():
        for i in range(n_cells):
            nnls(k, y[i] - lam[i] * shift, maxiter=50 * n_t)

    base = best_of(baseline, 1)
    ratio = base / ours
    return {"name": "denoised trace (constrained OASIS) vs one scipy nnls per cell",
            "figure": ours, "baseline": base, "ratio": ratio, "goal": 10.0,
            "passed": bool(ratio >= 10.0), "unit": "s",
            "note": f"{n_cells} cells x {n_t} samples; the baseline skips the penalty search"}


def run(quick: bool) -> list[dict]:
    """The denoising benchmark; ``quick`` uses smaller inputs."""
    return [bench_denoise(quick)]


if __name__ == "__main__":
    import sys

    for row in run("--quick" in sys.argv):
        print(row)
