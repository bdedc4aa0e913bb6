"""Kernels of :func:`pipeline.volumes.motion.register_volume`: the analysis window and the
correlation evaluated by matrix-multiply DFTs on small grids (sub-voxel and local peaks).

Speed notes (CPU per 30 x 256 x 256 volume, 2 x 2 binning, one core of the shared 2-core
machine, best of 7-15, measured): the window of the 30 x 128 x 128 binned volume took 0.74 ms as
NumPy expressions (a centred copy and three broadcast products, each a new array), 0.22 ms in
:func:`apply_window` (bit-identical). When the first pass has placed the moving volume's
window, the correlation peak lies within a voxel or two of that estimate, so
:func:`local_peak` evaluates the correlation on a 5 x 5 x 5 grid of whole voxels around it by
matrix-multiply DFTs (0.32 ms) instead of the full inverse FFT (1.5 ms); a peak on the grid's
border or outside the allowed shifts falls back to the full inverse FFT.
"""

from __future__ import annotations

import numba
import numpy as np
import scipy.fft as sfft

__all__ = ["apply_window", "dft_grid", "upsampled_peak", "local_peak", "half_weights",
           "parabolic_offset"]


@numba.njit(cache=True, nogil=True)
def _window_kernel(v, mean, wz, wy, wx, out):  # pragma: no cover - compiled
    """``out = (((v - mean) * wz) * wy) * wx`` in float32, the broadcast products' order."""
    nz, ny, nx = out.shape
    for z in range(nz):
        a = wz[z]
        for y in range(ny):
            b = wy[y]
            for x in range(nx):
                out[z, y, x] = ((v[z, y, x] - mean) * a) * b * wx[x]


def apply_window(v: np.ndarray, wz: np.ndarray, wy: np.ndarray, wx: np.ndarray) -> np.ndarray:
    """``(v - v.mean()) * wz[:, None, None] * wy[None, :, None] * wx[None, None, :]``.

    Bit-identical to the NumPy expression for float32 input and windows (the mean is NumPy's
    float32 mean; the products are formed in the same order, without FMA contraction) in one
    pass and one output array; other dtypes take the NumPy expression.
    """
    if v.dtype != np.float32 or not all(w.dtype == np.float32 for w in (wz, wy, wx)):
        v = v - v.mean(dtype=np.float32)
        return v * wz[:, None, None] * wy[None, :, None] * wx[None, None, :]
    out = np.empty(v.shape, np.float32)
    _window_kernel(v, np.float32(v.mean(dtype=np.float32)), wz, wy, wx, out)
    return out


def half_weights(shape: tuple[int, ...]) -> np.ndarray:
    """Multiplicity of each rfft bin along x in the full spectrum (1 or 2)."""
    nx = shape[2]
    w = np.full(nx // 2 + 1, 2.0)
    w[0] = 1.0
    if nx % 2 == 0:
        w[-1] = 1.0
    return w


def dft_grid(R: np.ndarray, shape: tuple[int, int, int], grids: list[np.ndarray]) -> np.ndarray:
    """The inverse real DFT of the half spectrum ``R`` at the positions ``grids`` (one array
    of voxel positions per axis), by three matrix products (one BLAS call each).

    Returns ``c`` of shape ``(len(grids[0]), len(grids[1]), len(grids[2]))``, equal (up to
    float32 rounding) to ``scipy.fft.irfftn(R, s=shape)`` at those positions.

    References
    ----------
    .. [1] Guizar-Sicairos, M., Thurman, S. T. & Fienup, J. R. (2008). Efficient subpixel image
       registration algorithms. Optics Letters 33(2), 156-158. doi:10.1364/OL.33.000156
    """
    freqs = (sfft.fftfreq(shape[0]), sfft.fftfreq(shape[1]), sfft.rfftfreq(shape[2]))
    kern = [np.exp(2j * np.pi * g[:, None] * f[None, :]).astype(np.complex64)
            for g, f in zip(grids, freqs, strict=True)]
    kx = np.ascontiguousarray((kern[2] * half_weights(shape)[None, :]).T.astype(np.complex64))
    nz, ny, nxh = R.shape
    uz, uy = len(grids[0]), len(grids[1])
    # z first: a short, wide product suits BLAS better than a tall, thin one (0.16 against
    # 0.21 ms for 5 points of a 30 x 128 x 65 spectrum, measured, one core)
    t = (kern[0] @ R.reshape(nz, ny * nxh)).reshape(uz, ny, nxh)   # (uz, ny, nxh)
    t = kern[1] @ t                                                  # (uz, uy, nxh)
    c = (t.reshape(uz * uy, nxh) @ kx).real                          # (uz * uy, ux)
    return c.reshape(uz, uy, -1) / float(np.prod(shape))


def upsampled_peak(R: np.ndarray, shape: tuple[int, int, int], centre: np.ndarray,
                   up: np.ndarray, half_width: float = 0.75, stride: int = 1
                   ) -> tuple[np.ndarray, float, bool]:
    """Refine the correlation peak by a matrix-multiply DFT on a small grid around ``centre``.

    The grid has a step of ``1 / up`` per axis and spans ``+-half_width``. With ``stride``
    > 1 it is searched coarse to fine: every ``stride``-th point (both ends included), then
    the grid points strictly between the best point's two coarse neighbours. Near the peak the
    correlation is unimodal along each axis, so both ways find the same point, and the two
    small grids cost less than the whole one (the first product scales with the points along
    x: 25 -> 7 + 7 for the default +-0.3 voxel grid at 2 x 2 binning; 0.89 -> 0.49 ms per
    30 x 128 x 128 spectrum, measured, one core, best of 20).

    Returns the refined position, the correlation there, and whether the maximum lies on the
    grid's border (the true peak may lie outside it).
    """
    grids = []
    for a in range(3):
        if shape[a] == 1:
            grids.append(np.array([0.0]))
            continue
        h = int(np.ceil(half_width * up[a]))
        grids.append(centre[a] + np.arange(-h, h + 1) / up[a])
    if stride > 1:
        picks = [np.unique(np.r_[np.arange(0, len(g), stride), len(g) - 1]) for g in grids]
        c = dft_grid(R, shape, [g[p] for g, p in zip(grids, picks, strict=True)])
        i = np.unravel_index(int(np.argmax(c)), c.shape)
        if any(len(p) > 1 and i[a] in (0, len(p) - 1) for a, p in enumerate(picks)):
            return np.array([grids[a][picks[a][i[a]]] for a in range(3)]), float(c[i]), True
        grids = [g[p[k - 1] + 1:p[k + 1]] if len(p) > 1 else g
                 for g, p, k in zip(grids, picks, i, strict=True)]
        c = dft_grid(R, shape, grids)
        i = np.unravel_index(int(np.argmax(c)), c.shape)
        return np.array([grids[a][i[a]] for a in range(3)]), float(c[i]), False
    c = dft_grid(R, shape, grids)
    i = np.unravel_index(int(np.argmax(c)), c.shape)
    edge = any(len(g) > 1 and i[a] in (0, len(g) - 1) for a, g in enumerate(grids))
    return np.array([grids[a][i[a]] for a in range(3)]), float(c[i]), edge


def local_peak(R: np.ndarray, shape: tuple[int, int, int], centre: np.ndarray,
               allowed: tuple[np.ndarray, ...], half: int = 2
               ) -> tuple[np.ndarray, np.ndarray] | None:
    """Integer correlation peak and 3-point parabolic offsets, searched on whole voxels within
    ``half`` of ``round(centre)`` by :func:`dft_grid`.

    Returns None (the caller searches the full correlation) when the maximum lies on the
    grid's border, outside the ``allowed`` indices, or an axis is too short for the grid.
    """
    base = np.rint(centre).astype(int)
    grids = []
    for a in range(3):
        if shape[a] == 1:
            grids.append(np.array([0.0]))
            continue
        if shape[a] < 2 * half + 3:
            return None
        grids.append((base[a] + np.arange(-half, half + 1)).astype(float))
    c = dft_grid(R, shape, grids)
    i = np.unravel_index(int(np.argmax(c)), c.shape)
    coarse = np.zeros(3)
    frac = np.zeros(3)
    for a in range(3):
        g = grids[a]
        if len(g) == 1:
            continue
        if i[a] in (0, len(g) - 1):
            return None
        if int(g[i[a]]) % shape[a] not in allowed[a]:
            return None
        coarse[a] = g[i[a]]
        lo, hi = list(i), list(i)
        lo[a], hi[a] = i[a] - 1, i[a] + 1
        frac[a] = parabolic_offset(c[tuple(lo)], c[tuple(i)], c[tuple(hi)])
    return coarse, frac


def parabolic_offset(cm: float, c0: float, cp: float) -> float:
    """Sub-voxel offset of the vertex of the parabola through three neighbouring correlation
    values (left, centre, right), within +-0.5; 0 when they do not curve downwards."""
    den = cm - 2 * c0 + cp
    if den < 0:
        return float(np.clip(0.5 * (cm - cp) / den, -0.5, 0.5))
    return 0.0
