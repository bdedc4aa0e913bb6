"""Timing helper shared by the benchmarks."""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np


def best_of(fn: Callable[[], object], repeat: int) -> float:
    """Shortest wall time of ``repeat`` calls of ``fn``, in seconds (the least disturbed run)."""
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return float(best)
