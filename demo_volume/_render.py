"""Rendering one volume: analytic nuclei and tissue at the displaced position, then sensor noise.

Each volume is drawn exactly at its planted rigid displacement (no resampling): nuclei are
separable anisotropic Gaussians evaluated in a small box around their displaced centre and
scattered into the volume with one ``np.bincount``; the tissue and neuropil are analytic too.
Each plane uses the calcium signal at that plane's own acquisition time.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from demo_volume._brain import HALF_BOX, BrainModel
from demo_volume._params import Scenario

__all__ = ["VolumeRenderer", "sensor_noise"]


def _axis_weights(centre: np.ndarray, sigma: np.ndarray, half: int, n: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian weights (cells, 2*half+1) along one axis and the clipped voxel indices."""
    idx = np.round(centre).astype(np.int64)[:, None] + np.arange(-half, half + 1)[None, :]
    w = np.exp(-0.5 * ((idx - centre[:, None]) / sigma[:, None]) ** 2)
    w[(idx < 0) | (idx >= n)] = 0.0
    return w, np.clip(idx, 0, n - 1)


class VolumeRenderer:
    """Expected photo-electrons per voxel for each volume of the scenario.

    Parameters
    ----------
    sc : Scenario
    brain : BrainModel
    cells : DataFrame
        Positions (reference frame), Gaussian widths and resting brightness of the nuclei.
    calcium_planes : ndarray of shape (n_volumes, n_planes, n_cells)
        Each cell's dF/F at each plane's acquisition time.
    neuropil : ndarray of shape (n_volumes, n_planes, n_regions)
        Neuropil dF/F of each diffuse region at each plane's time.
    global_factor : ndarray of shape (n_volumes,)
    cell_factor : ndarray of shape (n_volumes, n_cells)
    shifts_vox : ndarray of shape (n_volumes, 3)
        Content displacement: ``volume_t(r) = reference(r - shift)``.
    """

    def __init__(self, sc: Scenario, brain: BrainModel, cells: pd.DataFrame,
                 calcium_planes: np.ndarray, neuropil: np.ndarray, global_factor: np.ndarray,
                 cell_factor: np.ndarray, shifts_vox: np.ndarray) -> None:
        self.shape = sc.imaging.shape_zyx
        self.brain = brain
        self.pos = cells[["z_vox", "y_vox", "x_vox"]].to_numpy()
        self.sigma = cells[["sigma_z_vox", "sigma_y_vox", "sigma_x_vox"]].to_numpy()
        self.brightness = cells["brightness"].to_numpy()
        self.calcium_planes = calcium_planes
        self.neuropil = neuropil
        self.global_factor = global_factor
        self.cell_factor = cell_factor
        self.shifts_vox = shifts_vox

    def cells_only(self, k: int) -> np.ndarray:
        """Nuclei of volume ``k`` (photo-electrons, before the global factor)."""
        nz, ny, nx = self.shape
        shift = self.shifts_vox[k]
        centre = self.pos + shift[None, :]
        wz, iz = _axis_weights(centre[:, 0], self.sigma[:, 0], HALF_BOX[0], nz)
        wy, iy = _axis_weights(centre[:, 1], self.sigma[:, 1], HALF_BOX[1], ny)
        wx, ix = _axis_weights(centre[:, 2], self.sigma[:, 2], HALF_BOX[2], nx)
        f = 1.0 + self.calcium_planes[k].T[np.arange(len(iz))[:, None], iz]   # (cells, bz)
        wz = wz * f * (self.brightness * self.cell_factor[k])[:, None]
        vals = wz[:, :, None, None] * wy[:, None, :, None] * wx[:, None, None, :]
        flat = (iz[:, :, None, None] * ny + iy[:, None, :, None]) * nx + ix[:, None, None, :]
        out = np.bincount(flat.ravel(), weights=vals.ravel(), minlength=nz * ny * nx)
        return out.reshape(self.shape)

    def expected(self, k: int) -> np.ndarray:
        """Expected photo-electrons per voxel of volume ``k``, (z, y, x) float64."""
        shift = self.shifts_vox[k]
        tissue = self.brain.tissue(shift)
        by, bx = self.brain.bump_profiles(shift)
        coef = self.neuropil[k].T                                   # (R, nz)
        field = np.tensordot(coef[:, :, None] * by[:, None, :], bx, axes=(0, 0))
        lam = self.cells_only(k) + tissue * (1.0 + field)
        return lam * self.global_factor[k]


def sensor_noise(expected_e: np.ndarray, rng: np.random.Generator, *, gain_adu_per_e: float,
                 offset_adu: float, read_noise_e: float) -> np.ndarray:
    """Poisson-Gaussian camera model: ``adu = gain * (Poisson(e) + N(0, read)) + offset``.

    Parameters
    ----------
    expected_e : ndarray
        Expected photo-electrons per voxel (>= 0).
    rng : numpy.random.Generator
    gain_adu_per_e, offset_adu, read_noise_e : float
        Sensor constants (see ``params.toml``).

    Returns
    -------
    ndarray of uint16, same shape

    References
    ----------
    Foi A, Trimeche M, Katkovnik V, Egiazarian K (2008) Practical Poissonian-Gaussian noise
    modeling and fitting for single-image raw-data. IEEE Trans. Image Process. 17:1737-1754.
    doi:10.1109/TIP.2008.2001399
    """
    electrons = rng.poisson(np.maximum(expected_e, 0.0)).astype(np.float64)
    electrons += rng.normal(0.0, read_noise_e, size=expected_e.shape)
    adu = np.rint(gain_adu_per_e * electrons + offset_adu)
    return np.clip(adu, 0, np.iinfo(np.uint16).max).astype(np.uint16)
