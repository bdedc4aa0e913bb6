"""Target geometry seen from the animal: bearings, distances, subtended angle, bisector.

Every angle is handled on the unit circle: differences are wrapped to (-pi, pi], averages are
taken over unit vectors, spreads are measured as arcs of the circle. Sign convention (see
DEVELOPERS.md): counter-clockwise positive, heading measured from +x, egocentric bearing =
target direction minus heading, positive = target on the animal's left.

A target that is absent at a sample has NaN coordinates; every quantity involving it is NaN
there, and the set quantities (subtended angle, bisector) use the targets present.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "wrap_angle",
    "circular_mean",
    "egocentric_bearing",
    "target_distance",
    "TargetSet",
    "target_set_geometry",
]

_TWO_PI = 2.0 * np.pi


def wrap_angle(angle_rad: ArrayLike) -> NDArray[np.float64]:
    """Wrap angles to the half-open interval (-pi, pi].

    Parameters
    ----------
    angle_rad : array_like
        Angles in radians, any shape; NaN stays NaN.

    Returns
    -------
    ndarray of float64
        The same angles in (-pi, pi] (pi maps to pi, -pi maps to pi).
    """
    a = np.asarray(angle_rad, dtype=np.float64)
    return np.pi - np.mod(np.pi - a, _TWO_PI)


def circular_mean(angle_rad: ArrayLike, *, axis: int | None = None,
                  weights: ArrayLike | None = None) -> NDArray[np.float64]:
    """Mean direction of angles: the angle of the mean unit vector, ignoring NaN.

    Parameters
    ----------
    angle_rad : array_like
        Angles in radians.
    axis : int or None, default=None
        Axis to average over (None = all).
    weights : array_like or None, default=None
        Optional non-negative weights, broadcast against ``angle_rad``.

    Returns
    -------
    ndarray of float64
        Mean direction in (-pi, pi]; NaN where no finite angle (or a zero resultant).

    References
    ----------
    Mardia, K. V. & Jupp, P. E. (2000). *Directional Statistics*. Wiley, section 2.2.1.
    DOI:10.1002/9780470316979.
    """
    a = np.asarray(angle_rad, dtype=np.float64)
    w = np.ones_like(a) if weights is None else np.broadcast_to(
        np.asarray(weights, dtype=np.float64), a.shape)
    ok = np.isfinite(a)
    w = np.where(ok, w, 0.0)
    a0 = np.where(ok, a, 0.0)
    c = np.sum(w * np.cos(a0), axis=axis)
    s = np.sum(w * np.sin(a0), axis=axis)
    tiny = np.abs(c) + np.abs(s) <= 1e-12 * np.maximum(np.sum(w, axis=axis), 1e-300)
    return np.where(tiny, np.nan, wrap_angle(np.arctan2(s, c)))


def egocentric_bearing(x_mm: ArrayLike, y_mm: ArrayLike, heading_rad: ArrayLike,
                       target_x_mm: ArrayLike, target_y_mm: ArrayLike) -> NDArray[np.float64]:
    """Bearing of each target relative to the heading, wrapped to (-pi, pi], + = left.

    Parameters
    ----------
    x_mm, y_mm, heading_rad : array_like of shape (n,)
        Animal position and heading (from +x, counter-clockwise).
    target_x_mm, target_y_mm : array_like of shape (n,) or (n, n_targets)
        Target positions (NaN where absent).

    Returns
    -------
    ndarray of shape (n,) or (n, n_targets)
        Egocentric bearing in radians; NaN where the target is absent.
    """
    x, y, h = (np.asarray(v, dtype=np.float64) for v in (x_mm, y_mm, heading_rad))
    tx = np.asarray(target_x_mm, dtype=np.float64)
    ty = np.asarray(target_y_mm, dtype=np.float64)
    if tx.ndim == 2:
        x, y, h = x[:, None], y[:, None], h[:, None]
    return wrap_angle(np.arctan2(ty - y, tx - x) - h)


def target_distance(x_mm: ArrayLike, y_mm: ArrayLike, target_x_mm: ArrayLike,
                    target_y_mm: ArrayLike) -> NDArray[np.float64]:
    """Euclidean distance from the animal to each target (mm), NaN where absent."""
    x, y = np.asarray(x_mm, dtype=np.float64), np.asarray(y_mm, dtype=np.float64)
    tx = np.asarray(target_x_mm, dtype=np.float64)
    ty = np.asarray(target_y_mm, dtype=np.float64)
    if tx.ndim == 2:
        x, y = x[:, None], y[:, None]
    return np.hypot(tx - x, ty - y)


class TargetSet(NamedTuple):
    """Geometry of a set of targets at each sample (see :func:`target_set_geometry`)."""

    subtended_rad: NDArray[np.float64]
    """(n,) smallest arc of the circle holding every present target; 0 with one target."""
    bisector_rad: NDArray[np.float64]
    """(n,) circular mean of the present targets' directions, in the same frame as the input."""
    outer_left: NDArray[np.int64]
    """(n,) column of the outermost target counter-clockwise (left); -1 where none."""
    outer_right: NDArray[np.int64]
    """(n,) column of the outermost target clockwise (right); -1 where none."""
    n_present: NDArray[np.int64]
    """(n,) number of targets present."""


def target_set_geometry(direction_rad: ArrayLike, *, present: ArrayLike | None = None
                        ) -> TargetSet:
    """Subtended angle and bisector of the present targets, on the unit circle.

    The subtended angle is the length of the smallest arc containing every present target's
    direction, i.e. ``2*pi`` minus the largest gap between consecutive directions around the
    circle. With two targets it is the angle between them; with three it is the angle between
    the outermost two. The two targets bounding the largest gap are the outermost pair.

    Parameters
    ----------
    direction_rad : array_like of shape (n, n_targets)
        Direction of each target from the animal (egocentric bearings or world directions);
        NaN where a target is absent.
    present : array_like of bool, shape (n, n_targets), optional
        Restrict the set further (e.g. to the targets not yet dropped); default: all finite.

    Returns
    -------
    TargetSet
        Subtended angle (rad, in [0, 2*pi)), bisector direction (circular mean of unit vectors,
        same frame as the input), the columns of the outermost pair and the count present.

    References
    ----------
    Mardia, K. V. & Jupp, P. E. (2000). *Directional Statistics*. Wiley, section 2.2.1 (mean
    direction) and 2.3 (circular range = 2*pi minus the largest arc between observations).
    DOI:10.1002/9780470316979.
    """
    d = np.asarray(direction_rad, dtype=np.float64)
    if d.ndim != 2:
        raise ValueError(f"direction_rad must be (n, n_targets); got shape {d.shape}")
    ok = np.isfinite(d)
    if present is not None:
        ok &= np.asarray(present, dtype=bool)
    n, k = d.shape
    n_present = ok.sum(axis=1)
    d_mod = np.mod(np.where(ok, d, 0.0), _TWO_PI)
    # Absent targets are replaced by a present one: duplicates add zero-length gaps only.
    first = np.argmax(ok, axis=1)
    fill = d_mod[np.arange(n), first]
    filled = np.where(ok, d_mod, fill[:, None])
    order = np.argsort(filled, axis=1)
    srt = np.take_along_axis(filled, order, axis=1)
    gaps = np.empty((n, k))
    gaps[:, :-1] = np.diff(srt, axis=1)
    gaps[:, -1] = srt[:, 0] + _TWO_PI - srt[:, -1]
    big = np.argmax(gaps, axis=1)
    rows = np.arange(n)
    subtended = _TWO_PI - gaps[rows, big]
    # the largest gap runs counter-clockwise from srt[big] to srt[big+1]: srt[big] is the
    # outermost target on the counter-clockwise side, srt[big+1] the clockwise one.
    left = order[rows, big]
    right = order[rows, (big + 1) % k]
    # an absent column holds a copy of column `first`; a pick of it means `first` itself
    left = np.where(ok[rows, left], left, first)
    right = np.where(ok[rows, right], right, first)
    bisector = circular_mean(np.where(ok, d, np.nan), axis=1)
    none = n_present == 0
    one = n_present == 1
    subtended = np.where(none, np.nan, np.where(one, 0.0, subtended))
    left = np.where(none, -1, left)
    right = np.where(none, -1, np.where(one, left, right))
    return TargetSet(subtended, bisector, left.astype(np.int64), right.astype(np.int64),
                     n_present.astype(np.int64))
