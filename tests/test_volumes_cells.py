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
