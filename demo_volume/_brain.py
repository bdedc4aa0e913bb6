"""The invented brain: nuclei positions and shapes, background tissue, neuropil, motion.

Everything here is analytic so that a volume can be rendered exactly at any rigid sub-voxel
displacement (``volume_t(r) = reference(r - shift)``) without resampling.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d
from scipy.spatial import cKDTree
from scipy.special import expit

from demo_volume._params import Scenario
from pipeline.errors import ConfigError

__all__ = ["BrainModel", "place_cells", "motion_path", "slow_factor"]

# Cells are drawn in a box (z, y, x) of +-HALF_BOX voxels around their centre; the Gaussian
# footprint is below 1.5 % of its peak at the box edge for the radii allowed in params.toml.
HALF_BOX = (2, 4, 4)
MIDLINE_GAP_UM = 3.0


@dataclass(frozen=True)
class BrainModel:
    """Analytic background of the brain: a two-lobed ellipsoid of tissue and neuropil bumps."""

    shape_zyx: tuple[int, int, int]
    voxel_size_um: tuple[float, float, float]
    centre_vox: np.ndarray          # (3,)
    semi_axes_um: np.ndarray        # (3,)
    tissue_e: float
    outside_e: float
    edge_um: float
    midline_depth: float
    bump_centres_vox: np.ndarray    # (R, 2) in (y, x)
    bump_sigma_um: float

    @classmethod
    def from_scenario(cls, sc: Scenario) -> BrainModel:
        shape = sc.imaging.shape_zyx
        vox = np.asarray(sc.imaging.voxel_size_um)
        centre = (np.asarray(shape) - 1) / 2.0
        semi = np.asarray(sc.brain.semi_axes_fraction_zyx) * np.asarray(shape) * vox
        ny, nx = sc.brain.n_neuropil_yx
        ys = centre[1] + np.linspace(-0.5, 0.5, ny) * semi[1] / vox[1]
        xs = centre[2] + np.linspace(-0.6, 0.6, nx) * semi[2] / vox[2]
        bumps = np.stack(np.meshgrid(ys, xs, indexing="ij"), axis=-1).reshape(-1, 2)
        vox_t = (float(vox[0]), float(vox[1]), float(vox[2]))
        return cls(shape, vox_t, centre, semi, sc.brain.tissue_e,
                   sc.brain.outside_e, sc.brain.edge_um, sc.brain.midline_depth, bumps,
                   sc.brain.neuropil_sigma_um)

    def inside(self, pos_vox: np.ndarray) -> np.ndarray:
        """Normalised ellipsoid radius of positions (n, 3) (< 1 inside the brain)."""
        d = (pos_vox - self.centre_vox) * np.asarray(self.voxel_size_um) / self.semi_axes_um
        return np.sqrt(np.sum(d * d, axis=1))

    def tissue(self, shift_vox: np.ndarray) -> np.ndarray:
        """Resting tissue signal (photo-electrons per voxel) displaced by ``shift_vox``."""
        vox = np.asarray(self.voxel_size_um)
        terms = []
        for axis, n in enumerate(self.shape_zyx):
            r = (np.arange(n) - shift_vox[axis] - self.centre_vox[axis]) * vox[axis]
            terms.append((r / self.semi_axes_um[axis]) ** 2)
        rho = np.sqrt(terms[0][:, None, None] + terms[1][None, :, None] + terms[2][None, None, :])
        edge = expit((1.0 - rho) * self.semi_axes_um[1] / self.edge_um)
        x_um = (np.arange(self.shape_zyx[2]) - shift_vox[2] - self.centre_vox[2]) * vox[2]
        groove = 1.0 - self.midline_depth * np.exp(-0.5 * (x_um / (2 * MIDLINE_GAP_UM)) ** 2)
        return self.outside_e + self.tissue_e * edge * groove[None, None, :]

    def bump_profiles(self, shift_vox: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Separable neuropil bumps at the displaced position: (R, ny) and (R, nx)."""
        vox = self.voxel_size_um
        out = []
        for k, axis in enumerate((1, 2)):
            r = np.arange(self.shape_zyx[axis]) - shift_vox[axis]
            d_um = (r[None, :] - self.bump_centres_vox[:, k, None]) * vox[axis]
            out.append(np.exp(-0.5 * (d_um / self.bump_sigma_um) ** 2))
        return out[0], out[1]

    def bump_weights(self, pos_vox: np.ndarray) -> np.ndarray:
        """Normalised weight of each cell in each neuropil region, (n_cells, R)."""
        vox = self.voxel_size_um
        dy = (pos_vox[:, 1, None] - self.bump_centres_vox[None, :, 0]) * vox[1]
        dx = (pos_vox[:, 2, None] - self.bump_centres_vox[None, :, 1]) * vox[2]
        w = np.exp(-0.5 * (dy ** 2 + dx ** 2) / self.bump_sigma_um ** 2)
        return w / np.maximum(w.sum(axis=0, keepdims=True), 1e-12)


def place_cells(sc: Scenario, brain: BrainModel, rng: np.random.Generator) -> pd.DataFrame:
    """Draw nuclei inside the brain with a minimum centre distance.

    Returns a table with id, z_vox, y_vox, x_vox, radius_um, sigma_{z,y,x}_vox and brightness
    (resting peak in photo-electrons per voxel).

    Raises
    ------
    ConfigError
        When ``cells.n_cells`` nuclei do not fit at ``cells.min_separation_um``.
    """
    c = sc.cells
    shape = np.asarray(sc.imaging.shape_zyx)
    vox = np.asarray(sc.imaging.voxel_size_um)
    margin = np.array([0.0, 3.0, 3.0])
    n_cand = 12 * c.n_cells
    pos = rng.uniform(margin, shape - 1 - margin, size=(n_cand, 3))
    x_um = (pos[:, 2] - brain.centre_vox[2]) * vox[2]
    ok = (brain.inside(pos) < 0.93) & (np.abs(x_um) > MIDLINE_GAP_UM)
    pos = pos[ok]
    pairs = cKDTree(pos * vox).query_pairs(c.min_separation_um, output_type="ndarray")
    keep = np.ones(len(pos), bool)
    for i, j in pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]:
        if keep[i] and keep[j]:
            keep[j] = False
    pos = pos[keep]
    if len(pos) < c.n_cells:
        raise ConfigError(f"cells.n_cells = {c.n_cells}: only {len(pos)} nuclei fit in the brain "
                          f"at cells.min_separation_um = {c.min_separation_um}; expected fewer "
                          "cells or a smaller separation")
    pos = pos[: c.n_cells]
    order = np.lexsort((pos[:, 2], pos[:, 1], np.round(pos[:, 0])))
    pos = pos[order]
    radius = rng.uniform(*c.radius_um, size=c.n_cells)
    sig_yx_um = 0.6 * radius
    sig_z_um = np.sqrt(sig_yx_um ** 2 + c.sheet_sigma_um ** 2)
    bright = c.brightness_e * np.exp(rng.normal(0.0, c.brightness_log_sd, size=c.n_cells))
    return pd.DataFrame({
        "id": np.arange(c.n_cells, dtype=np.int64),
        "z_vox": pos[:, 0], "y_vox": pos[:, 1], "x_vox": pos[:, 2],
        "plane": np.round(pos[:, 0]).astype(np.int64),
        "radius_um": radius,
        "sigma_z_vox": sig_z_um / vox[0], "sigma_y_vox": sig_yx_um / vox[1],
        "sigma_x_vox": sig_yx_um / vox[2],
        "brightness": bright,
    })


def _smooth_noise(rng: np.random.Generator, n: int, k: int, sigma_samples: float) -> np.ndarray:
    """Unit-sd Gaussian-filtered white noise, shape (n, k)."""
    w = gaussian_filter1d(rng.normal(size=(n + 8 * int(sigma_samples) + 8, k)),
                          sigma_samples, axis=0, mode="reflect")
    w = w[4 * int(sigma_samples) + 4:][:n]
    w -= w.mean(axis=0)
    return w / np.maximum(w.std(axis=0), 1e-12)


def motion_path(sc: Scenario, rng: np.random.Generator) -> np.ndarray:
    """Rigid content displacement per volume, (n_volumes, 3) voxels (z, y, x).

    A slow drift (Gaussian-filtered noise) plus occasional sub-voxel steps, clipped to
    ``motion.max_abs_vox``.
    """
    m, im = sc.motion, sc.imaging
    n = im.n_volumes
    drift = _smooth_noise(rng, n, 3, m.drift_timescale_s * im.volume_rate_hz)
    drift *= np.asarray(m.drift_sd_vox)
    jumps = rng.random(n) < m.jump_rate_hz / im.volume_rate_hz
    steps = rng.normal(size=(n, 3)) * np.asarray(m.jump_sd_vox) * jumps[:, None]
    shift = drift + np.cumsum(steps, axis=0)
    shift -= shift[: max(n // 10, 1)].mean(axis=0)
    return np.clip(shift, -np.asarray(m.max_abs_vox), np.asarray(m.max_abs_vox))


def slow_factor(sc: Scenario, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Global (bleaching x laser ripple) factor per volume and per-cell baseline drift factor.

    Returns ``global_factor`` (n_volumes,) and ``cell_factor`` (n_volumes, n_cells).
    """
    im, br = sc.imaging, sc.brain
    t_s = np.arange(im.n_volumes) / im.volume_rate_hz
    duration_s = im.n_volumes / im.volume_rate_hz
    bleach = (1.0 - br.bleach_fraction) ** (t_s / duration_s)
    phase = rng.uniform(0.0, 2 * np.pi)
    ripple = 1.0 + br.excitation_ripple * np.sin(2 * np.pi * t_s / br.excitation_period_s + phase)
    cell = 1.0 + br.cell_drift_sd * _smooth_noise(
        rng, im.n_volumes, sc.cells.n_cells, br.cell_drift_timescale_s * im.volume_rate_hz)
    return bleach * ripple, cell
