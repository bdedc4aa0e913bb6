"""Cell detection: planted blobs are found, tiling does not change the result, noise is quiet."""

from __future__ import annotations

import numpy as np
import pytest
from skimage.feature import blob_log

from pipeline.errors import ConfigError, InputError
from pipeline.volumes.cells import detect_cells, log_sigma_vox, robust_threshold

VOXEL_UM = (2.0, 1.0, 1.0)
CENTRES = np.array(
    [[3, 10, 10], [6, 30, 12], [8, 50, 50], [5, 20, 45], [4, 45, 25], [9, 12, 32],
     [6, 32, 34], [6, 32, 40]]
)


def _blobs(rng, shape=(12, 64, 64), noise=2.0):
    sig = log_sigma_vox(6.0, VOXEL_UM)
    zz, yy, xx = np.indices(shape)
    img = np.full(shape, 100.0)
    for c in CENTRES:
        r2 = ((zz - c[0]) / sig[0]) ** 2 + ((yy - c[1]) / sig[1]) ** 2 + ((xx - c[2]) / sig[2]) ** 2
        img += 50.0 * np.exp(-0.5 * r2)
    return img + rng.normal(0.0, noise, shape), sig


def _match(found, truth, tol_vox=1.0):
    d = np.linalg.norm(found[:, None, :] - truth[None, :, :], axis=2)
    return d.min(axis=0) <= tol_vox


def test_planted_cells_found_and_match_blob_log(rng):
    img, sig = _blobs(rng)
    det = detect_cells(img, voxel_size_um=VOXEL_UM, diameter_um=6.0, min_separation_um=4.0)
    seeds = det.table[["z_vox", "y_vox", "x_vox"]].to_numpy()
    assert len(det.table) == len(CENTRES)
    assert _match(seeds, CENTRES).all()
    # reference: skimage.feature.blob_log at the same (anisotropic) sigma finds the same centres
    ref = blob_log(img - 100.0, min_sigma=sig, max_sigma=sig, num_sigma=1, threshold=6.0)[:, :3]
    assert _match(seeds, ref).all() and _match(ref, seeds).all()
    # the two blobs 6 um apart in x (touching) are split by the watershed
    lab = det.labels
    assert lab[6, 32, 34] != lab[6, 32, 40] and lab[6, 32, 34] > 0 and lab[6, 32, 40] > 0
    assert det.labels.dtype == np.int32
    assert set(np.unique(lab)) == set(range(len(CENTRES) + 1))
    # every labelled voxel lies within one cell radius (3 um) of its own centre
    zz, yy, xx = np.nonzero(lab)
    cen = seeds[lab[zz, yy, xx] - 1]
    dist_um = np.linalg.norm((np.stack([zz, yy, xx], 1) - cen) * VOXEL_UM, axis=1)
    assert dist_um.max() <= 3.0 + 1.0  # centroid vs seed: within one voxel
    np.testing.assert_array_equal(det.table["plane"], np.rint(det.table["z_vox"]))


def test_tiling_does_not_change_result(rng):
    img, _ = _blobs(rng)
    corr = np.clip(img - 100.0, 0, None) / 60.0
    whole = detect_cells(img, corr, voxel_size_um=VOXEL_UM, tile_yx=(512, 512))
    tiled = detect_cells(img, corr, voxel_size_um=VOXEL_UM, tile_yx=(16, 24))
    np.testing.assert_array_equal(whole.labels, tiled.labels)
    np.testing.assert_allclose(whole.table.to_numpy(float), tiled.table.to_numpy(float), rtol=1e-9)
    assert np.isclose(whole.threshold, tiled.threshold)
    # local correlation averages over the cell's voxels
    lab = whole.labels
    first = lab == 1
    assert np.isclose(whole.table["local_corr"].iloc[0], corr[first].mean())
    assert np.isclose(whole.table["mean_intensity"].iloc[0], img[first].mean())


def test_pure_noise_gives_few_false_cells(rng):
    # median + 5 MAD on the noise-normalised filter: a handful at most in 1e5 voxels
    # (common practice: a robust k-sigma threshold keeps the false-positive rate tiny)
    img = rng.normal(100.0, 2.0, (12, 96, 96))
    det = detect_cells(img, voxel_size_um=VOXEL_UM, threshold_mad=5.0)
    assert len(det.table) <= 2


def test_robust_threshold_matches_scipy_mad(rng):
    from scipy.stats import median_abs_deviation

    v = rng.normal(3.0, 2.0, 10001)
    # reference: scipy.stats.median_abs_deviation(scale="normal") is 1.4826 * MAD
    expected = np.median(v) + 4.0 * median_abs_deviation(v, scale="normal")
    assert np.isclose(robust_threshold(v, 4.0), expected, rtol=1e-4)


def test_errors(rng):
    img = rng.normal(size=(4, 8, 8))
    with pytest.raises(InputError, match=r"mean image must be \(z, y, x\)"):
        detect_cells(img[0], voxel_size_um=VOXEL_UM)
    with pytest.raises(InputError, match="local-correlation image shape"):
        detect_cells(img, img[:2], voxel_size_um=VOXEL_UM)
    with pytest.raises(ConfigError, match="cells.corr_weight"):
        detect_cells(img, img, voxel_size_um=VOXEL_UM, corr_weight=1.5)
    with pytest.raises(ConfigError, match="cells.diameter_um"):
        detect_cells(img, voxel_size_um=VOXEL_UM, diameter_um=-1.0)


def _stacked_pair(rng, dim=0.4):
    """A bright nucleus and a dimmer one 6.4 um above it (light-sheet geometry, 4 um planes).

    First pass misses and residual pass finds the dim one for 21 of 21 noise draws tried; at
    6.0 um above, the residual maximum falls on the plane next to the bright seed (4.1 um
    away, under the 4.8 um residual separation) for 2 of 21.
    """
    vs = (4.0, 1.5, 1.5)
    shape = (10, 64, 64)
    # the pair, then isolated nuclei from which the detector measures the blob footprint
    isolated = [[z, y, x] for z, y, x in zip(
        (2.2, 4.0, 6.3, 3.1, 5.5, 7.0, 2.8, 4.6), (8, 8, 8, 30, 52, 52, 52, 40),
        (8, 30, 52, 52, 8, 30, 52, 30), strict=True)]
    centres = np.array([[3.0, 20.0, 20.0], [4.6, 20.5, 20.3], *isolated], dtype=float)
    amps = np.array([60.0, 60.0 * dim] + [50.0] * len(isolated))
    sd = np.array([np.hypot(0.6 * 2.7, 2.0) / 4.0, 0.6 * 2.7 / 1.5, 0.6 * 2.7 / 1.5])
    zz, yy, xx = np.indices(shape)
    img = np.full(shape, 100.0)
    for c, a in zip(centres, amps, strict=True):
        r2 = ((zz - c[0]) / sd[0]) ** 2 + ((yy - c[1]) / sd[1]) ** 2 + ((xx - c[2]) / sd[2]) ** 2
        img += a * np.exp(-0.5 * r2)
    return img + rng.normal(0.0, 1.0, shape), vs, centres


def test_residual_pass_finds_the_stacked_neighbour(rng):
    img, vs, centres = _stacked_pair(rng)
    # threshold 6 MAD: no noise maximum of this nearly empty image gets through
    without = detect_cells(img, voxel_size_um=vs, residual_separation=0.0, threshold_mad=6.0)
    with_pass = detect_cells(img, voxel_size_um=vs, threshold_mad=6.0)
    um = np.asarray(vs)
    assert len(without.table) == len(centres) - 1  # the dim one is on the bright one's flank
    found = with_pass.table[["z_vox", "y_vox", "x_vox"]].to_numpy()
    assert len(found) == len(centres)
    d_um = np.linalg.norm((found[:, None, :] - centres[None]) * um, axis=2)
    assert (d_um.min(axis=0) < 2.5).all()  # each planted centre within 2.5 um (< one radius)


def test_axial_column_keeps_a_maximum_the_cube_loses(rng):
    from pipeline.volumes.cells import local_maxima

    r = np.zeros((3, 5, 5))
    r[1, 2, 2] = 1.0  # a peak on plane 1 ...
    r[0, 1, 1] = 2.0  # ... next to a stronger one diagonally on plane 0
    assert not local_maxima(r, axial_column=False)[1, 2, 2]
    assert local_maxima(r, axial_column=True)[1, 2, 2]
    # reference: scipy.ndimage.maximum_filter with the full cube, by hand
    r[0, 2, 2] = 3.0  # directly below: rejected by the column as well
    assert not local_maxima(r, axial_column=True)[1, 2, 2]


def test_new_options_are_checked(rng):
    img, vs, _ = _stacked_pair(rng)
    with pytest.raises(ConfigError, match="cells.residual_separation"):
        detect_cells(img, voxel_size_um=vs, residual_separation=-1.0)
    with pytest.raises(ConfigError, match="cells.sigma_factor_yx"):
        detect_cells(img, voxel_size_um=vs, sigma_factor_yx=0.0)
