"""Trigger pulses on the rig clock: rising edges of a sampled digital column, or time stamps."""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from pipeline.errors import InputError

__all__ = ["rising_edges", "edge_brackets", "bracket_times", "pulses_from_timestamps"]


def rising_edges(signal: ArrayLike, t_s: ArrayLike | None = None, *, threshold: float = 0.5,
                 min_interval_s: float = 0.002,
                 edge_time: Literal["first_high", "midpoint"] = "first_high"
                 ) -> NDArray[np.float64]:
    """Rising edges of a digital signal, debounced.

    An edge is a sample above ``threshold`` whose predecessor is not. An edge closer than
    ``min_interval_s`` to the previous edge (kept or not) is contact bounce and is dropped, so a
    burst of chatter counts once.

    Parameters
    ----------
    signal : array_like of shape (n,)
        The trigger column (0/1 or a voltage).
    t_s : array_like of shape (n,), optional
        Sample times. Without them the result is in sample indices and ``min_interval_s`` is
        read as samples.
    threshold : float, default=0.5
    min_interval_s : float, default=0.002
    edge_time : {"first_high", "midpoint"}, default="first_high"
        Time given to an edge: the first high sample, or halfway between it and the last low
        one (unbiased when the rig marks the first sample after the pulse started).

    Returns
    -------
    ndarray of float64 of shape (n_edges,)
    """
    high, low = edge_brackets(signal, t_s, threshold=threshold, min_interval_s=min_interval_s)
    return bracket_times(high, low, edge_time=edge_time)


def bracket_times(high: NDArray[np.float64], low: NDArray[np.float64], *,
                  edge_time: Literal["first_high", "midpoint"] = "first_high"
                  ) -> NDArray[np.float64]:
    """The time given to each edge of :func:`edge_brackets` (see :func:`rising_edges`)."""
    if edge_time == "midpoint":
        return np.where(np.isfinite(low), 0.5 * (high + low), high)
    return high


def edge_brackets(signal: ArrayLike, t_s: ArrayLike | None = None, *, threshold: float = 0.5,
                  min_interval_s: float = 0.002
                  ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Rising edges as brackets: (first high sample time, last low sample time) of each edge.

    The same edges as :func:`rising_edges` (debounced the same way). The pulse that caused an
    edge started after the last low sample and at or before the first high one, so the pair
    brackets its time (``-inf`` as the low end of an edge at the first sample).

    Returns
    -------
    high, low : ndarray of float64 of shape (n_edges,)
    """
    s = np.asarray(signal, dtype=np.float64)
    high = s > threshold
    idx = np.flatnonzero(high[1:] & ~high[:-1]) + 1
    if s.size and high[0]:
        idx = np.concatenate(([0], idx))
    t = np.arange(s.size, dtype=np.float64) if t_s is None else np.asarray(t_s, np.float64)
    keep = np.concatenate(([True], np.diff(t[idx]) >= min_interval_s)) if idx.size else idx > 0
    idx = idx[keep]
    low = np.where(idx > 0, t[np.maximum(idx - 1, 0)], -np.inf)
    return t[idx], low


def pulses_from_timestamps(times_s: ArrayLike, *, min_interval_s: float = 0.002,
                           source: str = "timestamps") -> NDArray[np.float64]:
    """Pulse times from a list of time stamps (sorted; chatter closer than the interval merged).

    Raises
    ------
    InputError
        A time stamp is not finite (names the position in ``source``).
    """
    t = np.asarray(times_s, dtype=np.float64).ravel()
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        raise InputError(f"{source}: pulse time stamp {bad[0] + 1} (1-based) is {float(t[bad[0]])};"
                         " expected a finite number of seconds")
    t = np.sort(t)
    keep = np.concatenate(([True], np.diff(t) >= min_interval_s)) if t.size else t > 0
    return t[keep]
