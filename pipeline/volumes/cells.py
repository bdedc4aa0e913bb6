"""Detection and segmentation of nuclear-labelled cells on the summary images.

Pipeline (all pure NumPy/SciPy/scikit-image on arrays):

1. robust-normalise the mean image (and the local-correlation image) and mix them linearly;
2. filter with a scale-normalised, anisotropic Laplacian of Gaussian tuned to the cell size,
   divided by its white-noise standard deviation at each voxel (constant inside, larger at the
   borders where the reflect edge mode repeats samples; without this most false detections
   on pure noise sit on the borders);
3. keep local maxima above ``median + k * 1.4826 * MAD`` of the filtered image; on volumes whose
   plane spacing is much coarser than the pixel size the maximum is taken over the 3 x 3
   in-plane square plus the voxel straight above and below (the "axial column"), not the full
   3 x 3 x 3 cube (see :func:`local_maxima`);
4. suppress maxima closer than a minimum separation (KD-tree, strongest first);
5. residual pass: subtract each seed's measured footprint from the filtered image and take the
   maxima of the residual far enough from every seed as more seeds (nuclei stacked on a
   brighter neighbour's axial flank; :mod:`pipeline.volumes.cell_residual`);
6. grow each seed by a watershed on the filtered image, restricted to the voxels within one
   cell radius of a seed and with a positive filter response.

Steps 2, 3, 5 and 6 run on (y, x) tiles with a halo, so working memory is a few tile-sized float32
arrays plus the candidates; only the output label volume (int32, 4 bytes per voxel) and the
input images are volume-sized. Nothing is quadratic in the number of cells.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.ndimage as ndi
from scipy.spatial import cKDTree
from skimage.segmentation import watershed

from pipeline.errors import ConfigError, InputError, StoreError
from pipeline.volumes.cell_residual import residual_seeds

__all__ = [
    "CellDetection",
    "local_maxima",
    "log_response",
    "log_sigma_vox",
    "robust_threshold",
    "detect_cells",
    "run_cells",
]

_MAD_TO_SIGMA = 1.4826  # consistency constant of the MAD for a Gaussian (common practice)


@dataclass(frozen=True)
class CellDetection:
    """Result of :func:`detect_cells`.

    Attributes
    ----------
    labels : ndarray of shape (z, y, x), int32
        0 = background, cell ``i`` has label ``i`` (ids start at 1).
    table : pandas.DataFrame
        One row per cell: ``id``, ``z_vox``, ``y_vox``, ``x_vox`` (centre of mass of the
        positive filter response over the cell's voxels), ``z_um``,
        ``y_um``, ``x_um``, ``n_voxels``, ``mean_intensity``, ``local_corr``, ``plane``,
        ``score`` (filter response at the seed).
    threshold : float
        Detection threshold on the filtered image.
    """

    labels: np.ndarray
    table: pd.DataFrame
    threshold: float


def log_sigma_vox(diameter_um, voxel_size_um):
    """Per-axis LoG sigma in voxels: ``radius / sqrt(3)`` (common practice for 3-d blobs)."""
    vs = np.asarray(voxel_size_um, dtype=np.float64)
    return (diameter_um / 2.0) / math.sqrt(3.0) / vs


def log_response(image, *, sigma_vox, truncate=4.0):
    """Negative scale-normalised anisotropic Laplacian of Gaussian (bright blobs > 0).

    ``-sum_i sigma_i^2 * d^2/dx_i^2 (G_sigma * image)``: each axis' second derivative is
    scaled by its own sigma^2, which makes the response of an ellipsoidal blob matched to
    ``sigma`` independent of the voxel anisotropy.

    Parameters
    ----------
    image : ndarray of shape (z, y, x)
    sigma_vox : sequence of 3 float
        Gaussian sigma per axis in voxels.
    truncate : float, default=4.0
        Kernel half-width in sigmas (scipy.ndimage's default).

    Returns
    -------
    ndarray of shape (z, y, x), float32

    References
    ----------
    Lindeberg T (1998). Feature detection with automatic scale selection. Int J Comput Vis
    30:79-116. doi:10.1023/A:1008045108935
    """
    img = np.asarray(image, dtype=np.float32)
    out = np.zeros(img.shape, dtype=np.float32)
    for ax in range(img.ndim):
        order = [0] * img.ndim
        order[ax] = 2
        out -= np.float32(sigma_vox[ax] ** 2) * ndi.gaussian_filter(
            img, sigma_vox, order=order, truncate=truncate, mode="reflect"
        )
    return out


def _axis_gain_terms(n, sigma, truncate=4.0):
    """Inner products of the edge-folded 1-d kernels of derivative orders 0 and 2.

    Row i of ``gaussian_filter1d(eye(n), order=p)`` is the kernel (folded by the reflect edge
    mode) that produces output sample i; ``out[p, q, i]`` is the dot product of the order-p and
    order-q kernels at i. Used to normalise the filter response by its white-noise standard
    deviation, which grows near the borders because the reflection repeats samples.
    """
    eye = np.eye(n)
    k = {
        p: ndi.gaussian_filter1d(eye, sigma, axis=0, order=p, mode="reflect", truncate=truncate)
        for p in (0, 2)
    }
    out = np.empty((3, 3, n))
    for p in (0, 2):
        for q in (0, 2):
            out[p, q] = np.einsum("ij,ij->i", k[p], k[q])
    return out


def _noise_gain(terms, sigma_vox, zs, ys, xs):
    """White-noise standard deviation of :func:`log_response` at the given index ranges."""
    gain2 = 0.0
    for a in range(3):
        for b in range(3):
            oa = [2 if ax == a else 0 for ax in range(3)]
            ob = [2 if ax == b else 0 for ax in range(3)]
            pz = terms[0][oa[0], ob[0], zs][:, None, None]
            py = terms[1][oa[1], ob[1], ys][None, :, None]
            px = terms[2][oa[2], ob[2], xs][None, None, :]
            gain2 = gain2 + (sigma_vox[a] ** 2 * sigma_vox[b] ** 2) * pz * py * px
    return np.sqrt(gain2).astype(np.float32)


def robust_threshold(values, k):
    """``median + k * 1.4826 * MAD`` of ``values`` (robust noise level, common practice)."""
    v = np.asarray(values, dtype=np.float64).ravel()
    med = float(np.median(v))
    return med + k * _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))


def _axial_column_footprint():
    fp = np.zeros((3, 3, 3), dtype=bool)
    fp[1] = True
    fp[0, 1, 1] = fp[2, 1, 1] = True
    return fp


def local_maxima(response, *, axial_column=True):
    """Voxels equal to the maximum of their neighbourhood and > 0.

    Parameters
    ----------
    response : ndarray of shape (z, y, x)
    axial_column : bool, default=True
        True: the neighbourhood is the 3 x 3 in-plane square plus the voxels directly above and
        below (11 voxels). False: the full 3 x 3 x 3 cube.

    Returns
    -------
    ndarray of shape (z, y, x), bool

    Notes
    -----
    With planes 4 um apart and pixels 1.5 um wide, the cube compares a voxel with voxels
    4.3 um away diagonally across planes, i.e. with the flank of a neighbour stacked above it.
    On the small demo session (seed 0: 200 nuclei, centres >= 5.5 um apart, axial blur 2 um)
    the cube kept maxima at 144-154 of the 200 nuclei and the axial column at 170-196
    (measured on the mean image with LoG sigmas 0.35-0.8 plane); a blob's own flank on the next
    plane, directly above its centre, is still rejected by the column.
    """
    fp = _axial_column_footprint() if axial_column else np.ones((3, 3, 3), dtype=bool)
    return (response == ndi.maximum_filter(response, footprint=fp, mode="nearest")) & (
        response > 0)


def _robust_scale(image, max_samples=2_000_000):
    """Median and 1.4826 * MAD of an image from a regular subsample."""
    step = max(1, int(math.ceil((image.size / max_samples) ** (1 / 3))))
    sub = np.asarray(image[::step, ::step, ::step], dtype=np.float64)
    med = float(np.median(sub))
    mad = _MAD_TO_SIGMA * float(np.median(np.abs(sub - med)))
    return med, mad if mad > 0 else 1.0


def _tiles(ny, nx, tile_yx):
    for y0 in range(0, ny, tile_yx[0]):
        for x0 in range(0, nx, tile_yx[1]):
            yield y0, min(y0 + tile_yx[0], ny), x0, min(x0 + tile_yx[1], nx)


def _suppress(points_um, score, min_sep_um):
    """Greedy non-maximum suppression: keep the strongest, drop neighbours within min_sep."""
    order = np.argsort(-score, kind="stable")
    pts = points_um[order]
    pairs = cKDTree(pts).query_pairs(min_sep_um, output_type="ndarray")
    keep = np.ones(len(pts), dtype=bool)
    if len(pairs):
        # pairs (i, j) in sorted order: j is weaker when j > i
        lo = np.minimum(pairs[:, 0], pairs[:, 1])
        hi = np.maximum(pairs[:, 0], pairs[:, 1])
        srt = np.argsort(lo, kind="stable")
        lo, hi = lo[srt], hi[srt]
        bounds = np.searchsorted(lo, np.arange(len(pts) + 1))
        for i in np.unique(lo):
            if keep[i]:
                keep[hi[bounds[i] : bounds[i + 1]]] = False
    return order[keep]


def detect_cells(
    mean_image,
    corr_image=None,
    *,
    voxel_size_um,
    diameter_um=6.0,
    min_separation_um=4.0,
    threshold_mad=4.0,
    corr_weight=0.0,
    sigma_factor_yx=0.75,
    axial_column=None,
    residual_separation=0.8,
    tile_yx=(256, 256),
):
    """Find nuclear-labelled cells and segment them into a label volume.

    Parameters
    ----------
    mean_image : ndarray of shape (z, y, x)
        Registered mean image.
    corr_image : ndarray of shape (z, y, x), optional
        Local-correlation image; mixed in with weight ``corr_weight`` after both images are
        robust-normalised (median / MAD), since active cells stand out there even when dim.
    voxel_size_um : sequence of 3 float
        Voxel size (z, y, x) in um.
    diameter_um : float, default=6.0
        Expected nucleus diameter (larval zebrafish neurons: ~5-7 um, from memory).
    min_separation_um : float, default=4.0
        Minimum distance between two cell centres.
    threshold_mad : float, default=4.0
        ``k`` of the threshold ``median + k * 1.4826 * MAD`` of the filtered image.
    corr_weight : float, default=0.0
        Weight of the local-correlation image in [0, 1] (ignored without ``corr_image``).
    sigma_factor_yx : float, default=0.75
        In-plane LoG sigma as a fraction of the blob-matched ``radius / sqrt(3)``. A narrower
        filter separates touching nuclei at the cost of some noise (small demo session, mean
        image, before the residual pass: 170 of 200 nuclei with factor 1.0, 181 with 0.8
        combined with 1.0 by scale selection, 186 with 0.75, 1 false detection in each case;
        default session 1023 -> 1056 of 1100 going from 1.0 to 0.75, false 5 -> 3).
    axial_column : bool, optional
        Local-maximum neighbourhood (see :func:`local_maxima`); default: True when the plane
        spacing is more than twice the pixel size.
    residual_separation : float, default=0.8
        Residual pass (see :mod:`pipeline.volumes.cell_residual`): a maximum of the residual
        becomes a cell when it is farther than this many diameters from every first-pass cell
        (0 = no residual pass). Demo sessions, seed 0, nuclei matched within one radius /
        false detections: small 185 / 1 of 200 without the pass, 194 / 1 at 0.8 and 0.83,
        194 / 6 at 0.75; default 1056 / 3 of 1100 without, 1084 / 3 at 0.8, 1086 / 25 at 0.75
        (the ghost of a nucleus on the next plane is 4 um from it, so the separation must stay
        clear of one plane spacing).
    tile_yx : tuple of 2 int, default=(256, 256)
        Core tile size; each tile is processed with a halo wide enough that the result does
        not depend on the tiling.

    Returns
    -------
    CellDetection

    Raises
    ------
    InputError
        If the images are not 3-d or differ in shape.
    ConfigError
        If a size or weight is out of range.

    References
    ----------
    Lindeberg T (1998). Int J Comput Vis 30:79-116. doi:10.1023/A:1008045108935 (scale-normalised
    LoG blob detection). Beucher S, Meyer F (1993). The morphological approach to segmentation:
    the watershed transformation. In: Mathematical Morphology in Image Processing, pp. 433-481
    (seeded watershed).
    """
    mean_image = np.asarray(mean_image)
    if mean_image.ndim != 3:
        raise InputError(f"cells: mean image must be (z, y, x), got shape {mean_image.shape}")
    if corr_image is not None:
        corr_image = np.asarray(corr_image)
        if corr_image.shape != mean_image.shape:
            raise InputError(
                f"cells: local-correlation image shape {corr_image.shape} differs from the "
                f"mean image shape {mean_image.shape}"
            )
    if not 0.0 <= corr_weight <= 1.0:
        raise ConfigError(f"cells.corr_weight: expected a value in [0, 1], got {corr_weight}")
    if diameter_um <= 0 or min_separation_um <= 0 or min(tile_yx) < 1:
        raise ConfigError(
            f"cells.diameter_um, cells.min_separation_um and cells.tile_yx must be > 0, got "
            f"{diameter_um}, {min_separation_um}, {tile_yx}"
        )
    if not 0.0 <= residual_separation <= 2.0:
        raise ConfigError(
            f"cells.residual_separation: expected a value in [0, 2], got {residual_separation}")
    if not 0.0 < sigma_factor_yx <= 2.0:
        raise ConfigError(
            f"cells.sigma_factor_yx: expected a value in (0, 2], got {sigma_factor_yx}")
    vs = np.asarray(voxel_size_um, dtype=np.float64)
    sigma = log_sigma_vox(diameter_um, vs) * np.array([1.0, sigma_factor_yx, sigma_factor_yx])
    if axial_column is None:
        axial_column = bool(vs[0] > 2.0 * max(vs[1], vs[2]))
    radius_um = diameter_um / 2.0
    nz, ny, nx = mean_image.shape
    m_med, m_mad = _robust_scale(mean_image)
    w_corr = corr_weight if corr_image is not None else 0.0
    if corr_image is not None:
        c_med, c_mad = _robust_scale(corr_image)

    def combined(ys, xs):
        out = (1.0 - w_corr) * (mean_image[:, ys, xs].astype(np.float32) - m_med) / m_mad
        if w_corr > 0:
            out += w_corr * (corr_image[:, ys, xs].astype(np.float32) - c_med) / c_mad
        return out.astype(np.float32)

    terms = [_axis_gain_terms(n_ax, s_ax) for n_ax, s_ax in zip((nz, ny, nx), sigma, strict=True)]
    halo_f = np.ceil(4.0 * sigma[1:]).astype(int) + 2
    halo_w = halo_f + np.ceil(2.0 * radius_um / vs[1:]).astype(int)

    def response(y0, y1, x0, x1, halo):
        ya, yb = max(0, y0 - halo[0]), min(ny, y1 + halo[0])
        xa, xb = max(0, x0 - halo[1]), min(nx, x1 + halo[1])
        resp = log_response(combined(slice(ya, yb), slice(xa, xb)), sigma_vox=sigma)
        resp /= _noise_gain(terms, sigma, slice(None), slice(ya, yb), slice(xa, xb))
        return resp, ya, xa

    # pass 1: candidates (local maxima > 0) and a regular subsample for the noise statistics
    cand, cand_val, sample = [], [], []
    for y0, y1, x0, x1 in _tiles(ny, nx, tile_yx):
        resp, ya, xa = response(y0, y1, x0, x1, halo_f)
        is_max = local_maxima(resp, axial_column=axial_column)
        core = (slice(None), slice(y0 - ya, y1 - ya), slice(x0 - xa, x1 - xa))
        zz, yy, xx = np.nonzero(is_max[core])
        cand.append(np.stack([zz, yy + y0, xx + x0], axis=1))
        cand_val.append(resp[core][zz, yy, xx])
        sample.append(resp[core][:, (-y0) % 4 :: 4, (-x0) % 4 :: 4].ravel())
    threshold = robust_threshold(np.concatenate(sample), threshold_mad)
    pts = np.concatenate(cand)
    val = np.concatenate(cand_val)
    above = val > threshold
    pts, val = pts[above], val[above]
    kept = _suppress(pts * vs, val, min_separation_um)
    seeds, seed_val = pts[kept], val[kept]
    if residual_separation > 0 and len(seeds):
        # footprint support: the nucleus radius plus the filter's reach (2 sigma)
        half = tuple(int(h) for h in np.maximum(np.ceil(radius_um / vs + 2.0 * sigma), 1))
        new, new_val = residual_seeds(
            response, seeds, seed_val, half=half, threshold=threshold,
            separation_um=residual_separation * diameter_um, voxel_size_um=vs,
            tiles=list(_tiles(ny, nx, tile_yx)), halo=halo_f, axial_column=axial_column)
        seeds, seed_val = np.concatenate([seeds, new]), np.concatenate([seed_val, new_val])
    order = np.lexsort((seeds[:, 2], seeds[:, 1], seeds[:, 0]))  # ids in z, y, x order
    seeds, seed_val = seeds[order], seed_val[order]
    n = len(seeds)

    # pass 2: watershed per tile, markers carry global ids
    labels = np.zeros(mean_image.shape, dtype=np.int32)
    sums = np.zeros((7, n + 1))
    for y0, y1, x0, x1 in _tiles(ny, nx, tile_yx):
        resp, ya, xa = response(y0, y1, x0, x1, halo_w)
        tz, ty, tx = resp.shape
        inside = (
            (seeds[:, 1] >= ya) & (seeds[:, 1] < ya + ty)
            & (seeds[:, 2] >= xa) & (seeds[:, 2] < xa + tx)
        )
        core = (slice(None), slice(y0 - ya, y1 - ya), slice(x0 - xa, x1 - xa))
        if not inside.any():
            continue
        markers = np.zeros(resp.shape, dtype=np.int32)
        s = seeds[inside]
        markers[s[:, 0], s[:, 1] - ya, s[:, 2] - xa] = np.flatnonzero(inside) + 1
        near = ndi.distance_transform_edt(markers == 0, sampling=vs) <= radius_um
        lab = watershed(-resp, markers, mask=near & ((resp > 0) | (markers > 0)))
        lab_core = lab[core].astype(np.int32)
        labels[:, y0:y1, x0:x1] = lab_core
        zz, yy, xx = np.indices(lab_core.shape, dtype=np.float64)
        flat = lab_core.ravel()
        # positions: centre of mass of the positive filter response over the cell's voxels
        # (small demo session: median in-plane error 0.26 / 0.18 um against 0.37 / 0.33 um
        # for the plain centroid, which is pulled towards the neighbour a region touches)
        wt = np.maximum(resp[core], 0.0).astype(np.float64).ravel()
        sums[0] += np.bincount(flat, minlength=n + 1)
        sums[6] += np.bincount(flat, weights=wt, minlength=n + 1)
        sums[1] += np.bincount(flat, weights=wt * zz.ravel(), minlength=n + 1)
        sums[2] += np.bincount(flat, weights=wt * (yy + y0).ravel(), minlength=n + 1)
        sums[3] += np.bincount(flat, weights=wt * (xx + x0).ravel(), minlength=n + 1)
        sums[4] += np.bincount(flat, weights=mean_image[:, y0:y1, x0:x1].ravel(), minlength=n + 1)
        if corr_image is not None:
            sums[5] += np.bincount(
                flat, weights=corr_image[:, y0:y1, x0:x1].ravel(), minlength=n + 1
            )
    count = np.maximum(sums[0, 1:], 1)
    wsum = np.where(sums[6, 1:] > 0, sums[6, 1:], 1.0)
    cz, cy, cx = (sums[i, 1:] / wsum for i in (1, 2, 3))
    unweighted = sums[6, 1:] <= 0  # a region with no positive response: its seed voxel
    if unweighted.any():
        cz[unweighted], cy[unweighted], cx[unweighted] = seeds[unweighted].T.astype(float)
    table = pd.DataFrame(
        {
            "id": np.arange(1, n + 1, dtype=np.int32),
            "z_vox": cz,
            "y_vox": cy,
            "x_vox": cx,
            "z_um": cz * vs[0],
            "y_um": cy * vs[1],
            "x_um": cx * vs[2],
            "n_voxels": sums[0, 1:].astype(np.int64),
            "mean_intensity": sums[4, 1:] / count,
            "local_corr": sums[5, 1:] / count if corr_image is not None else np.nan,
            "plane": np.rint(cz).astype(np.int32),
            "score": seed_val.astype(np.float64),
        }
    )
    return CellDetection(labels=labels, table=table, threshold=float(threshold))


# ---- stage ----------------------------------------------------------------------------------
MEAN_IMAGE_NAMES = ("motion/mean", "motion/mean_image")
CORR_IMAGE_NAMES = ("motion/local_corr", "motion/local_correlation", "motion/corr_image")


def _read_first(store, names):
    for name in names:
        if store.has(f"session.zarr/{name}"):
            return np.asarray(store.read_array(name)[...])
    return None


def run_cells(settings, store, compute):
    """Stage ``cells``: summary images -> ``cells.parquet`` + ``labels/cells`` label image.

    Register with ``stage("cells", requires=("motion",), sections=("imaging", "cells"))``.
    """

    mean = _read_first(store, MEAN_IMAGE_NAMES)
    if mean is None:
        raise StoreError(
            f"cells: no mean image in session.zarr (looked for {', '.join(MEAN_IMAGE_NAMES)}); "
            "run the motion stage first"
        )
    cs = settings.cells
    corr = _read_first(store, CORR_IMAGE_NAMES) if cs.use_local_correlation else None
    vs = tuple(float(v) for v in settings.imaging.voxel_size_um)
    det = detect_cells(
        mean, corr, voxel_size_um=vs, diameter_um=cs.diameter_um,
        min_separation_um=cs.min_separation_um, threshold_mad=cs.threshold_mad,
        corr_weight=cs.corr_weight, sigma_factor_yx=cs.sigma_factor_yx,
        residual_separation=cs.residual_separation,
        tile_yx=tuple(cs.tile_yx),
    )
    store.write_table("cells.parquet", det.table, metadata={
        "units": {"z_um": "um", "y_um": "um", "x_um": "um", "z_vox": "voxel", "y_vox": "voxel",
                  "x_vox": "voxel", "n_voxels": "voxel"},
        "threshold": det.threshold,
    })
    store.create_labels(det.labels, voxel_size_um=vs, name="cells")
    if len(det.table) == 0:
        store.warn("no cells detected: check cells.diameter_um and cells.threshold_mad")
    store.set_info({"n_cells": int(len(det.table)), "threshold": det.threshold})

