"""Per-plane sample times on the microscope clock.

Plane ``z`` (z-ascending index) of volume ``k`` is sampled at ``volume_start_s[k] +
plane_offset_s[k, z]`` (DEVELOPERS.md). The offset comes from the acquisition order of the
planes and the plane period, or from per-plane time stamps written by the microscope.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import ConfigError, InputError

__all__ = ["acquisition_rank", "plane_times", "plane_period"]

PlaneOrder = Literal["ascending", "descending", "alternating"]


def plane_period(volume_rate_hz: float, n_planes: int, *, flyback_s: float = 0.0) -> float:
    """Plane period: ``(1 / volume_rate_hz - flyback_s) / n_planes`` seconds.

    Raises
    ------
    ConfigError
        The flyback is not shorter than the volume period (names ``imaging.flyback_s``).
    """
    vol_s = 1.0 / volume_rate_hz
    if not 0.0 <= flyback_s < vol_s:
        raise ConfigError(f"imaging.flyback_s = {flyback_s!r}: expected 0 <= flyback_s < the "
                          f"volume period {vol_s:.6g} s (imaging.volume_rate_hz = "
                          f"{volume_rate_hz!r})")
    return (vol_s - flyback_s) / n_planes


def acquisition_rank(n_volumes: int, n_planes: int, *, plane_order: PlaneOrder = "ascending"
                     ) -> NDArray[np.int64]:
    """Position of each z-ascending plane in its volume's acquisition sequence.

    Returns
    -------
    ndarray of int64 of shape (n_volumes, n_planes)
        ``rank[k, z]`` = 0 for the first plane acquired. ``alternating`` (bidirectional scan)
        goes up on even volumes and down on odd ones.
    """
    up = np.arange(n_planes, dtype=np.int64)
    down = up[::-1].copy()
    if plane_order == "ascending":
        return np.broadcast_to(up, (n_volumes, n_planes)).copy()
    if plane_order == "descending":
        return np.broadcast_to(down, (n_volumes, n_planes)).copy()
    if plane_order == "alternating":
        odd = (np.arange(n_volumes) % 2 == 1)[:, None]
        return np.where(odd, down[None, :], up[None, :])
    raise ConfigError(f"imaging.plane_order = {plane_order!r}: expected one of 'ascending', "
                      "'descending', 'alternating'")


def plane_times(n_volumes: int, n_planes: int, *, volume_rate_hz: float | None = None,
                volume_start_s: ArrayLike | None = None, plane_order: PlaneOrder = "ascending",
                plane_period_s: float | None = None, flyback_s: float = 0.0,
                plane_timestamps_s: ArrayLike | None = None,
                source: str = "plane time stamps") -> NDArray[np.float64]:
    """Sample time of every plane, shape (n_volumes, n_planes), planes in z-ascending order.

    Parameters
    ----------
    n_volumes, n_planes : int
    volume_rate_hz : float, optional
        Volumes per second; volume ``k`` then starts at ``k / volume_rate_hz`` unless
        ``volume_start_s`` is given.
    volume_start_s : array_like of shape (n_volumes,), optional
        Measured volume start times (microscope clock).
    plane_order : {"ascending", "descending", "alternating"}, default="ascending"
    plane_period_s : float, optional
        Default ``(1/volume_rate_hz - flyback_s) / n_planes`` (the volume rate being the
        median of ``volume_start_s`` when only those are given).
    flyback_s : float, default=0.0
        Dead time at the end of each volume.
    plane_timestamps_s : array_like of shape (n_volumes, n_planes) or (n_volumes*n_planes,)
        Per-plane time stamps in acquisition order; when given they win over everything else.
    source : str
        Name of the time stamp file, for messages.

    Returns
    -------
    ndarray of float64 of shape (n_volumes, n_planes)

    Raises
    ------
    InputError
        Time stamps of the wrong size, not finite or not increasing (names the position).
    ConfigError
        Neither a volume rate nor volume start times, or a flyback too long.
    """
    rank = acquisition_rank(n_volumes, n_planes, plane_order=plane_order)
    if plane_timestamps_s is not None:
        ts = np.asarray(plane_timestamps_s, dtype=np.float64).ravel()
        want = n_volumes * n_planes
        if ts.size != want:
            raise InputError(f"{source}: {ts.size} time stamps; expected n_volumes x n_planes ="
                             f" {n_volumes} x {n_planes} = {want}")
        bad = np.flatnonzero(~np.isfinite(ts))
        if bad.size:
            raise InputError(f"{source}: time stamp {bad[0] + 1} (1-based) is {float(ts[bad[0]])}; "
                             "expected seconds")
        back = np.flatnonzero(np.diff(ts) <= 0)
        if back.size:
            raise InputError(f"{source}: time stamp {back[0] + 2} (1-based, {float(ts[back[0] + 1])}"
                             f" s) does not follow {float(ts[back[0]])} s; expected increasing times "
                             "in acquisition order")
        acq = ts.reshape(n_volumes, n_planes)
        return np.take_along_axis(acq, rank, axis=1)
    if volume_start_s is not None:
        start = np.asarray(volume_start_s, dtype=np.float64)
        if start.shape != (n_volumes,):
            raise InputError(f"{source}: {start.size} volume start times; expected {n_volumes}")
        if volume_rate_hz is None and plane_period_s is None:
            volume_rate_hz = 1.0 / float(np.median(np.diff(start))) if n_volumes > 1 else None
    elif volume_rate_hz is not None:
        start = np.arange(n_volumes, dtype=np.float64) / volume_rate_hz
    else:
        raise ConfigError("imaging.volume_rate_hz: a volume rate or volume start times are "
                          "needed to time the planes")
    if plane_period_s is None:
        if volume_rate_hz is None:
            raise ConfigError("imaging.volume_rate_hz: cannot derive the plane period from a "
                              "single volume; give the volume rate or the plane period")
        plane_period_s = plane_period(volume_rate_hz, n_planes, flyback_s=flyback_s)
    return start[:, None] + rank * plane_period_s
