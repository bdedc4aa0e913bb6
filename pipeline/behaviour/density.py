"""Trajectory density: every trial's path in a common frame, folded about the midline."""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["trajectory_density", "TrajectoryDensity"]


class TrajectoryDensity(NamedTuple):
    """Folded, rotated trajectory histogram (see :func:`trajectory_density`)."""

    counts: NDArray[np.float64]
    """(n_y_bins, n_x_bins) fraction of samples per bin (rows = y, for image display)."""
    x_edges_mm: NDArray[np.float64]
    """lateral |x| bin edges (mm), from 0."""
    y_edges_mm: NDArray[np.float64]
    """forward bin edges (mm); the targets' centre of mass lies on +y."""
    n_trials: int


def trajectory_density(x_mm: ArrayLike, y_mm: ArrayLike, target_x_mm: ArrayLike,
                       target_y_mm: ArrayLike, trial: ArrayLike, *, bin_mm: float = 0.5,
                       extent_mm: tuple[float, float, float] | None = None
                       ) -> TrajectoryDensity:
    """2-D histogram of trajectories in a common frame, folded about the midline.

    Each trial is translated so it starts at the origin and rotated so the centre of mass of
    the targets present at its first sample lies ahead on +y; then ``x -> |x|`` folds left and
    right choices together.

    Parameters
    ----------
    x_mm, y_mm, trial : array_like of shape (n,)
    target_x_mm, target_y_mm : array_like of shape (n, n_targets)
    bin_mm : float, default=0.5
    extent_mm : (x_max, y_min, y_max), optional
        Histogram extent; default from the data.

    Returns
    -------
    TrajectoryDensity
    """
    x, y = np.asarray(x_mm, dtype=np.float64), np.asarray(y_mm, dtype=np.float64)
    tx = np.atleast_2d(np.asarray(target_x_mm, dtype=np.float64).T).T
    ty = np.atleast_2d(np.asarray(target_y_mm, dtype=np.float64).T).T
    tr = np.asarray(trial)
    valid = tr >= 0
    ids, inverse = np.unique(tr[valid], return_inverse=True)
    sel = np.flatnonzero(valid)
    _, first_pos = np.unique(inverse, return_index=True)
    first = sel[first_pos]
    cx = np.nanmean(tx[first], axis=1)
    cy = np.nanmean(ty[first], axis=1) if tx.shape[1] else np.zeros(ids.size)
    ang = np.arctan2(cy - y[first], cx - x[first])
    rot = np.pi / 2 - ang[inverse]
    dx, dy = x[sel] - x[first][inverse], y[sel] - y[first][inverse]
    c, s = np.cos(rot), np.sin(rot)
    fx = np.abs(c * dx - s * dy)
    fy = s * dx + c * dy
    if extent_mm is None:
        x_max = max(float(fx.max(initial=0.0)), bin_mm)
        y_min, y_max = float(fy.min(initial=0.0)), max(float(fy.max(initial=0.0)), bin_mm)
    else:
        x_max, y_min, y_max = extent_mm
    x_edges = np.arange(0.0, x_max + bin_mm, bin_mm)
    y_edges = np.arange(np.floor(y_min / bin_mm) * bin_mm, y_max + bin_mm, bin_mm)
    counts, _, _ = np.histogram2d(fx, fy, bins=(x_edges, y_edges))
    total = counts.sum()
    return TrajectoryDensity((counts / total if total else counts).T, x_edges, y_edges,
                             int(ids.size))
