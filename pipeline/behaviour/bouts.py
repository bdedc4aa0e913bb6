"""Turn events (bouts) from the commanded turn rate or, failing that, the heading velocity.

Sign convention (DEVELOPERS.md): a positive turn is counter-clockwise = leftward.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

__all__ = ["detect_turns", "heading_velocity", "BOUT_COLUMNS"]

BOUT_COLUMNS = ("onset_s", "offset_s", "onset_index", "offset_index", "duration_s",
                "angle_rad", "peak_rad_s", "vigor", "direction", "trial")


def heading_velocity(t_s: ArrayLike, heading_rad: ArrayLike) -> NDArray[np.float64]:
    """Angular velocity (rad/s) of a heading series, differentiated on the unwrapped angle.

    Uses :func:`numpy.gradient` (second-order central differences) on ``numpy.unwrap`` of the
    heading, so a step across +-pi is not a spurious turn.
    """
    t = np.asarray(t_s, dtype=np.float64)
    return np.gradient(np.unwrap(np.asarray(heading_rad, dtype=np.float64)), t)


def _runs(mask: NDArray[np.bool_]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    edge = np.diff(np.concatenate(([0], mask.view(np.int8), [0])))
    return np.flatnonzero(edge == 1), np.flatnonzero(edge == -1)


def _merged_runs(mask: NDArray[np.bool_], t: NDArray[np.float64], *, min_gap_s: float,
                 min_duration_s: float, core: NDArray[np.bool_] | None = None
                 ) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Runs of ``mask`` (start, stop exclusive) holding a ``core`` sample, merged across gaps
    shorter than ``min_gap_s``, without those shorter than ``min_duration_s``."""
    start, stop = _runs(mask)
    if core is not None and start.size:
        n_core = np.concatenate(([0], np.cumsum(core)))
        hit = n_core[stop] - n_core[start] > 0
        start, stop = start[hit], stop[hit]
    if start.size == 0:
        return start, stop
    gap_s = t[start[1:]] - t[stop[:-1] - 1]
    keep = np.concatenate(([True], gap_s >= min_gap_s))
    group = np.cumsum(keep) - 1
    m_start = start[keep]
    m_stop = np.zeros(m_start.size, dtype=np.int64)
    np.maximum.at(m_stop, group, stop)
    dur = t[m_stop - 1] - t[m_start]
    long_enough = dur >= min_duration_s
    return m_start[long_enough], m_stop[long_enough]


def detect_turns(t_s: ArrayLike, turn_rad_s: ArrayLike | None = None, *,
                 heading_rad: ArrayLike | None = None, vigor: ArrayLike | None = None,
                 trial: ArrayLike | None = None, bout: ArrayLike | None = None,
                 threshold_rad_s: float = 0.2, release_rad_s: float = 0.02,
                 min_duration_s: float = 0.02, min_gap_s: float = 0.05) -> pd.DataFrame:
    """Find turn events: runs where the turn rate exceeds a threshold, one sign at a time.

    A turn event is a run of samples where ``w`` keeps one sign with ``|w| > release_rad_s``
    and reaches ``|w| > threshold_rad_s`` somewhere (two-level hysteresis, so the event covers
    the slow start and end of a turn); runs of the same sign separated by less than
    ``min_gap_s`` merge, and merged runs shorter than ``min_duration_s`` are dropped. ``w`` is
    the commanded turn rate when it is logged (all finite) and the heading velocity otherwise.
    When the rig logs its own bout flag (``bout``, any non-zero), its runs are the events
    instead (straight swims included) and the thresholds are not used.

    Parameters
    ----------
    t_s : array_like of shape (n,)
        Sample times (increasing).
    turn_rad_s : array_like of shape (n,), optional
        Commanded turn rate (rad/s, + = left). None or all-NaN: use ``heading_rad``.
    heading_rad : array_like of shape (n,), optional
        Heading; needed when no turn command is logged.
    vigor, trial : array_like of shape (n,), optional
        Per-sample vigor (averaged over the event) and trial id (taken at the onset).
    bout : array_like of shape (n,), optional
        The rig's bout flag (0/1).
    threshold_rad_s, release_rad_s : float, default=0.2, 0.02
        Levels on ``|w|``: larval turns reach several rad/s (tens of degrees in 0.2-0.3 s),
        so 0.2 rad/s keeps turns down to about 2 degrees (common practice, from memory).
    min_duration_s : float, default=0.02
        Shortest event kept (4 samples at 200 Hz).
    min_gap_s : float, default=0.05
        Same-sign runs closer than this are one event.

    Returns
    -------
    pandas.DataFrame
        One row per event sorted by onset, columns ``BOUT_COLUMNS``: onset/offset time and
        sample index (offset = last sample in the event), duration, signed turn angle (the
        integral of ``w`` over the event, rectangle rule with forward steps), signed peak
        angular velocity (of the event's sign), mean vigor, ``"left"``/``"right"`` (the sign
        of the thresholded run) and trial id.

    Raises
    ------
    ValueError
        Neither a usable turn command nor a heading is given.
    """
    t = np.asarray(t_s, dtype=np.float64)
    w: NDArray[np.float64] | None = None
    if turn_rad_s is not None:
        w = np.asarray(turn_rad_s, dtype=np.float64)
        if not np.isfinite(w).all():
            w = None
    if w is None:
        if heading_rad is None:
            raise ValueError("detect_turns needs turn_rad_s (finite) or heading_rad")
        w = heading_velocity(t, heading_rad)
    flag = None if bout is None else np.asarray(bout, dtype=np.float64) > 0.5
    if flag is not None and flag.any():
        on, off = _merged_runs(flag, t, min_gap_s=min_gap_s, min_duration_s=min_duration_s)
        sgn = np.empty(0)
    else:
        starts, stops, signs = [], [], []
        for sign in (1.0, -1.0):
            s0, s1 = _merged_runs(sign * w > release_rad_s, t, min_gap_s=min_gap_s,
                                  min_duration_s=min_duration_s,
                                  core=sign * w > threshold_rad_s)
            starts.append(s0)
            stops.append(s1)
            signs.append(np.full(s0.size, sign))
        on = np.concatenate(starts)
        off = np.concatenate(stops)
        order = np.argsort(on, kind="stable")
        on, off, sgn = on[order], off[order], np.concatenate(signs)[order]
    last = off - 1
    if on.size:
        # rectangle rule with forward steps: how a rig integrates its command into heading
        dt = np.diff(t, append=t[-1] + (t[-1] - t[-2] if t.size > 1 else 0.0))
        cum = np.concatenate(([0.0], np.cumsum(w * dt)))
        angle = cum[off] - cum[on]
        # reduceat over interleaved (onset, stop) pairs reduces exactly w[onset:stop] at the
        # even positions, even when a merged event encloses a short opposite-sign event
        pairs = np.column_stack((on, off)).ravel()
        w_ext = np.append(w, 0.0)
        hi = np.maximum.reduceat(w_ext, pairs)[::2]
        lo = np.minimum.reduceat(w_ext, pairs)[::2]
        if sgn.size != on.size:   # bout-flag events: the sign of the net turn
            sgn = np.where(angle >= 0, 1.0, -1.0)
        peak = np.where(sgn > 0, hi, lo)   # the event's own sign (a merged gap may hold a blip)
    else:
        angle = peak = np.empty(0)
    if vigor is not None and on.size:
        v = np.asarray(vigor, dtype=np.float64)
        cv = np.concatenate(([0.0], np.cumsum(np.nan_to_num(v))))
        mean_vigor = (cv[off] - cv[on]) / (off - on)
    else:
        mean_vigor = np.full(on.size, np.nan)
    tr = (np.asarray(trial)[on].astype(np.int64) if trial is not None and on.size
          else np.full(on.size, -1, dtype=np.int64))
    return pd.DataFrame({
        "onset_s": t[on], "offset_s": t[last], "onset_index": on.astype(np.int64),
        "offset_index": last.astype(np.int64), "duration_s": t[last] - t[on],
        "angle_rad": angle, "peak_rad_s": peak, "vigor": mean_vigor,
        "direction": np.where(sgn > 0, "left", "right").astype(object), "trial": tr,
    }, columns=list(BOUT_COLUMNS))
