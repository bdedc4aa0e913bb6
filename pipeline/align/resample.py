"""Behaviour resampled onto the imaging time base, one value per plane sample.

Each plane sample ``(k, z)`` integrates over its exposure window ``[t, t + exposure_s]`` on the
microscope clock. Continuous variables are averaged over the window exactly for the linear
interpolant of the samples (cumulative integral + ``searchsorted``: O(n + m log n), no loop);
angles are averaged as unit vectors; events (bout onsets) are counted in the window; labels
(trial id) are taken at the sample nearest the window centre.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.align.clocks import ClockModel
from pipeline.errors import AlignmentError

__all__ = ["window_mean", "window_circmean", "count_in_windows", "nearest_value",
           "resample_behaviour"]


def _integral_at(t: NDArray[np.float64], v: NDArray[np.float64], cum: NDArray[np.float64],
                 tau: NDArray[np.float64]) -> NDArray[np.float64]:
    """Integral of the linear interpolant of ``v`` from ``t[0]`` to ``tau`` (clamped)."""
    tau = np.clip(tau, t[0], t[-1])
    i = np.clip(np.searchsorted(t, tau, side="right") - 1, 0, t.size - 2)
    d = tau - t[i]
    h = t[i + 1] - t[i]
    if v.ndim == 2:
        d, h = d[:, None], h[:, None]
    slope = (v[i + 1] - v[i]) / h
    return cum[i] + v[i] * d + 0.5 * slope * d * d


def window_mean(t_s: ArrayLike, values: ArrayLike, start_s: ArrayLike, end_s: ArrayLike
                ) -> NDArray[np.float64]:
    """Mean of the linear interpolant of ``values`` over each window ``[start, end]``.

    Parameters
    ----------
    t_s : array_like of shape (n,)
        Increasing sample times.
    values : array_like of shape (n,) or (n, c)
        Samples; NaN makes every window touching it NaN.
    start_s, end_s : array_like of shape (m,)
        Window bounds (same clock as ``t_s``); a zero-length window gives the interpolated value.

    Returns
    -------
    ndarray of shape (m,) or (m, c)

    References
    ----------
    Press, W. H. et al. (2007). *Numerical Recipes*, 3rd ed., Cambridge University Press,
    section 4.1 (trapezoidal rule; exact for piecewise-linear functions).
    """
    t = np.asarray(t_s, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    a = np.asarray(start_s, dtype=np.float64).ravel()
    b = np.asarray(end_s, dtype=np.float64).ravel()
    bad = ~np.isfinite(v)
    v0 = np.where(bad, 0.0, v)
    seg = 0.5 * (v0[1:] + v0[:-1]) * np.diff(t).reshape((-1,) + (1,) * (v.ndim - 1))
    cum = np.concatenate((np.zeros((1,) + v.shape[1:]), np.cumsum(seg, axis=0)))
    width = b - a
    point = width <= 0
    w = np.where(point, 1.0, width)
    out = _integral_at(t, v0, cum, b) - _integral_at(t, v0, cum, a)
    out /= w[:, None] if v.ndim == 2 else w
    if point.any():   # zero-length window: the interpolated value itself
        tau = np.clip(a[point], t[0], t[-1])
        i = np.clip(np.searchsorted(t, tau, side="right") - 1, 0, t.size - 2)
        frac = (tau - t[i]) / (t[i + 1] - t[i])
        out[point] = v0[i] + (frac[:, None] if v.ndim == 2 else frac) * (v0[i + 1] - v0[i])
    if bad.any():
        nan_cum = np.concatenate((np.zeros((1,) + v.shape[1:]), np.cumsum(bad, axis=0)))
        i0 = np.clip(np.searchsorted(t, a, side="right") - 1, 0, t.size - 1)
        i1 = np.clip(np.searchsorted(t, b, side="left"), 0, t.size - 1)
        touched = (nan_cum[i1 + 1] - nan_cum[i0]) > 0
        out[touched] = np.nan
    return out


def window_circmean(t_s: ArrayLike, angle_rad: ArrayLike, start_s: ArrayLike,
                    end_s: ArrayLike) -> NDArray[np.float64]:
    """Circular mean of angles over each window: angle of the window-mean unit vector.

    References
    ----------
    Mardia, K. V. & Jupp, P. E. (2000). *Directional Statistics*. Wiley, section 2.2.1.
    """
    a = np.asarray(angle_rad, dtype=np.float64)
    c = window_mean(t_s, np.cos(a), start_s, end_s)
    s = window_mean(t_s, np.sin(a), start_s, end_s)
    return np.arctan2(s, c)


def count_in_windows(event_s: ArrayLike, start_s: ArrayLike, end_s: ArrayLike
                     ) -> NDArray[np.int64]:
    """Number of events with ``start <= t < end`` in each window."""
    e = np.sort(np.asarray(event_s, dtype=np.float64))
    a = np.asarray(start_s, dtype=np.float64)
    b = np.asarray(end_s, dtype=np.float64)
    return (np.searchsorted(e, b, side="left") - np.searchsorted(e, a, side="left")).astype(
        np.int64)


def nearest_value(t_s: ArrayLike, values: ArrayLike, at_s: ArrayLike) -> NDArray[np.generic]:
    """Value of the sample nearest each time in ``at_s`` (ties go to the earlier sample)."""
    t = np.asarray(t_s, dtype=np.float64)
    v = np.asarray(values)
    at = np.asarray(at_s, dtype=np.float64)
    j = np.clip(np.searchsorted(t, at, side="left"), 1, t.size - 1)
    j = np.where(at - t[j - 1] <= t[j] - at, j - 1, j)
    return v[j]


def resample_behaviour(t_rig_s: ArrayLike, plane_times_s: ArrayLike, *, clock: ClockModel,
                       exposure_s: float,
                       continuous: Mapping[str, ArrayLike] | None = None,
                       angles: Mapping[str, ArrayLike] | None = None,
                       labels: Mapping[str, ArrayLike] | None = None,
                       events_rig_s: Mapping[str, ArrayLike] | None = None
                       ) -> dict[str, NDArray[np.generic]]:
    """Resample behaviour variables to every plane sample.

    Parameters
    ----------
    t_rig_s : array_like of shape (n,)
        Behaviour sample times on the rig clock.
    plane_times_s : array_like of shape (n_volumes, n_planes)
        Plane sample times on the microscope clock (:func:`pipeline.align.plane_times`).
    clock : ClockModel
        Converts rig times to the microscope clock.
    exposure_s : float
        Length of each plane's exposure window.
    continuous, angles, labels : mapping of name to array_like of shape (n,) or (n, k)
        Window-averaged, unit-vector averaged, and nearest-sample variables.
    events_rig_s : mapping of name to array_like of shape (n_events,)
        Event times on the rig clock (e.g. bout onsets), counted per window.

    Returns
    -------
    dict of name to ndarray of shape (n_volumes, n_planes) or (n_volumes, n_planes, k)

    Raises
    ------
    AlignmentError
        The log does not cover the imaging session (names both spans on the microscope clock).
    """
    pt = np.asarray(plane_times_s, dtype=np.float64)
    shape = pt.shape
    a = pt.ravel()
    b = a + exposure_s
    t = clock.rig_to_scope(np.asarray(t_rig_s, dtype=np.float64))
    if t.size < 2 or t[0] > a.min() or t[-1] < b.max():
        raise AlignmentError(
            f"the behaviour log covers microscope time {t[0]:.3f} to {t[-1]:.3f} s "
            f"({t.size} samples) but the imaging session spans {a.min():.3f} to {b.max():.3f} s;"
            " the log must cover every plane's exposure (wrong log, or clock model)")

    def shaped(x: NDArray[np.generic]) -> NDArray[np.generic]:
        return x.reshape(shape + x.shape[1:])

    out: dict[str, NDArray[np.generic]] = {}
    for name, val in (continuous or {}).items():
        out[name] = shaped(window_mean(t, val, a, b))
    for name, val in (angles or {}).items():
        out[name] = shaped(window_circmean(t, val, a, b))
    centre = 0.5 * (a + b)
    for name, val in (labels or {}).items():
        out[name] = shaped(nearest_value(t, val, centre))
    for name, ev in (events_rig_s or {}).items():
        out[name] = shaped(count_in_windows(clock.rig_to_scope(np.asarray(ev, np.float64)),
                                            a, b))
    return out
