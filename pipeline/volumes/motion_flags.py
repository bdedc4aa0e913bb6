"""Per-volume motion flags: robust outlier rules on shifts and registration quality."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi

from pipeline.errors import ConfigError

__all__ = ["MotionFlags", "flag_motion", "robust_zscore"]

_MAD_TO_SIGMA = 1.4826  # consistency constant of the MAD for a normal distribution


def robust_zscore(x: np.ndarray, *, floor: float = 0.0) -> np.ndarray:
    """``(x - median) / (1.4826 * MAD)``, the scale floored at ``floor``.

    References
    ----------
    .. [1] Leys, C., Ley, C., Klein, O., Bernard, P. & Licata, L. (2013). Detecting outliers:
       do not use standard deviation around the mean, use absolute deviation around the
       median. J. Exp. Soc. Psychol. 49(4), 764-766. doi:10.1016/j.jesp.2013.03.013
    """
    x = np.asarray(x, dtype=float)
    med = np.median(x)
    scale = max(_MAD_TO_SIGMA * float(np.median(np.abs(x - med))), float(floor),
                np.finfo(float).tiny)
    return (x - med) / scale


@dataclass(frozen=True)
class MotionFlags:
    """Per-volume motion flags (boolean arrays of shape (t,)).

    Attributes
    ----------
    jump : ndarray
        The shift departs from its running median by a robust outlier amount.
    low_quality : ndarray
        The correlation quality is a low robust outlier.
    z_drift : ndarray
        ``|dz|`` exceeds the allowed fraction of a plane.
    too_large : ndarray
        The shift exceeds the largest plausible displacement.
    """

    jump: np.ndarray
    low_quality: np.ndarray
    z_drift: np.ndarray
    too_large: np.ndarray

    NAMES = ("jump", "low_quality", "z_drift", "too_large")

    def as_array(self) -> np.ndarray:
        """(t, 4) bool array, columns in :attr:`NAMES` order."""
        return np.stack([getattr(self, n) for n in self.NAMES], axis=1)

    @property
    def any(self) -> np.ndarray:
        return np.asarray(self.as_array().any(axis=1))

    def counts(self) -> dict[str, int]:
        return {n: int(getattr(self, n).sum()) for n in self.NAMES}


def flag_motion(shifts_vox: np.ndarray, quality: np.ndarray, *,
                voxel_size_um: Sequence[float], max_shift_um: float = 20.0,
                z_drift_fraction: float = 0.5, quality_mad: float = 5.0,
                jump_mad: float = 5.0, jump_window: int = 5,
                min_jump_um: float = 1.0) -> MotionFlags:
    """Flag volumes whose motion estimate should not be trusted or that moved too much.

    Rules (robust z = ``(x - median) / (1.4826 * MAD)``):

    * jump: ``r_t = |shift_t - running_median(shift)_t|`` (um, window ``jump_window``) has
      robust z above ``jump_mad`` and ``r_t > min_jump_um``;
    * low_quality: quality has robust z below ``-quality_mad``;
    * z_drift: ``|dz| > z_drift_fraction`` planes;
    * too_large: ``|shift| > max_shift_um``.

    Parameters
    ----------
    shifts_vox : ndarray of shape (t, 3)
    quality : ndarray of shape (t,)
    voxel_size_um : sequence of 3 float
        (z, y, x) voxel size.

    Returns
    -------
    MotionFlags

    Raises
    ------
    ConfigError
        Shapes that do not match.

    References
    ----------
    .. [1] Leys, C. et al. (2013). J. Exp. Soc. Psychol. 49(4), 764-766.
       doi:10.1016/j.jesp.2013.03.013 (median/MAD outlier rule)
    """
    s = np.asarray(shifts_vox, dtype=float)
    q = np.asarray(quality, dtype=float)
    if s.ndim != 2 or s.shape[1] != 3 or q.shape != (s.shape[0],):
        raise ConfigError(f"shifts_vox has shape {s.shape} and quality {q.shape}; expected "
                          f"(t, 3) and (t,)")
    um = s * np.asarray(voxel_size_um, dtype=float)[None, :]
    w = max(1, int(jump_window)) | 1
    smooth = ndi.median_filter(um, size=(w, 1), mode="nearest")
    resid = np.linalg.norm(um - smooth, axis=1)
    jump = (robust_zscore(resid) > jump_mad) & (resid > min_jump_um)
    low = robust_zscore(q, floor=1e-3) < -quality_mad
    return MotionFlags(jump=jump, low_quality=low,
                       z_drift=np.abs(s[:, 0]) > z_drift_fraction,
                       too_large=np.linalg.norm(um, axis=1) > max_shift_um)
