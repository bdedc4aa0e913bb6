"""Rigid 3-D motion: phase correlation with sub-voxel refinement, reference, shifts, flags.

Sign convention (DEVELOPERS.md): a shift is the displacement of a volume's content relative to
the reference, ``volume_t(r) = reference(r - shift)``; registering applies ``-shift``.
(``skimage.registration.phase_cross_correlation(reference, moving)`` returns ``-shift``.)

Speed: the reference is conditioned (binned, cropped, windowed) and transformed once by
:func:`prepare_reference`; its spectrum already carries the band-pass weights, so each volume
costs one real FFT, one inverse real FFT and a small matrix-multiply DFT around the peak.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numba
import numpy as np
import scipy.fft as sfft
import scipy.ndimage as ndi

from pipeline.errors import ConfigError
from pipeline.volumes.motion_dft import (
    apply_window,
    half_weights,
    local_peak,
    parabolic_offset,
    upsampled_peak,
)

__all__ = [
    "PreparedReference",
    "prepare_reference",
    "register_volume",
    "shift_volume",
    "registered_sum",
    "build_reference",
]

#: Least y and x size (pixels) of the plane binned ``2 * bin_yx`` times for the first pass of
#: :func:`register_volume` to run on it (see :func:`prepare_reference`). Measured on the
#: 30 x 256 x 256 benchmark session (bin_yx = 2, first pass on 64 x 64 planes): 9.4 instead
#: of 12.5 ms of CPU per volume, shift error unchanged (max 0.011-0.012 voxel on 40 volumes).
FIRST_PASS_MIN_PIXELS = 48


def _triple(value: float | Sequence[float], name: str) -> tuple[float, float, float]:
    arr = np.broadcast_to(np.asarray(value, dtype=float), (3,))
    if np.any(arr < 0) or not np.all(np.isfinite(arr)):
        raise ConfigError(f"{name} = {value!r}: expected non-negative finite values (z, y, x)")
    return (float(arr[0]), float(arr[1]), float(arr[2]))


def _prev_fast_len(n: int) -> int:
    """Largest length <= n for which a real FFT is fast (5-smooth)."""
    m = n
    while m > 1 and sfft.next_fast_len(m, real=True) != m:
        m -= 1
    return max(m, 1)


@dataclass(frozen=True)
class PreparedReference:
    """A reference volume conditioned and transformed once, for :func:`register_volume`.

    Attributes
    ----------
    spectrum : ndarray of complex64, shape (nz, ny, nx // 2 + 1)
        Conjugate half spectrum of the conditioned reference times the band-pass weights
        (phase-normalised when ``normalization == "phase"``).
    shape : tuple of int
        Shape of the conditioned volume (after binning and cropping).
    source_shape : tuple of int
        Shape (z, y, x) of the volumes this reference registers.
    bin_yx : int
        Binning factor in y and x.
    crop : tuple of (int, int)
        Per axis, start and stop of the conditioned region in binned voxels.
    tukey_alpha : float
        Taper fraction of the separable Tukey window.
    normalization : str
        ``"phase"`` or ``"none"``.
    bound : float
        Correlation of perfectly aligned phases under the weights (phase normalisation only);
        the quality is the refined peak divided by it.
    allowed : tuple of ndarray
        Per axis, the correlation indices searched for the coarse peak (``max_shift_vox``).
    first : PreparedReference or None
        The same reference binned ``first_pass_bin`` times more in y and x, for the pass
        that places the moving volume's window (see :func:`register_volume`); None: that
        pass runs at ``bin_yx``.
    """

    spectrum: np.ndarray
    shape: tuple[int, int, int]
    source_shape: tuple[int, int, int]
    bin_yx: int
    crop: tuple[tuple[int, int], ...]
    tukey_alpha: float
    normalization: str
    bound: float
    allowed: tuple[np.ndarray, ...]
    first: PreparedReference | None = None

    @property
    def full_search(self) -> bool:
        return all(len(a) == n for a, n in zip(self.allowed, self.shape, strict=True))


def _bin(volume: np.ndarray, b: int) -> np.ndarray:
    v = np.asarray(volume)
    if b > 1:
        if not (np.issubdtype(v.dtype, np.integer) or np.issubdtype(v.dtype, np.floating)):
            v = v.astype(np.float32)
        z, y, x = v.shape
        out = np.empty((z, y // b, x // b), np.float32)
        _bin_yx(np.ascontiguousarray(v), b, out)
        return out
    return np.asarray(v, dtype=np.float32)


@numba.njit(cache=True, nogil=True)
def _bin_yx(v, b, out):  # pragma: no cover - compiled
    """Mean of ``b x b`` blocks in y and x, read straight from the input dtype (float32 sums
    in the order i, j). Hand-written: converting a 30 x 256 x 256 uint16 volume to float32
    first and summing strided views cost 2.8 ms of CPU, this loop 1.5 ms, and unrolled for
    b = 2 (vectorised by the compiler; bit-identical) 0.24 ms (measured, one core)."""
    nz, nyb, nxb = out.shape
    scale = np.float32(1.0 / (b * b))
    if b == 2:  # the same additions in the same order, unrolled: 1.38 -> 0.24 ms
        for z in range(nz):
            for yb in range(nyb):
                r0 = v[z, 2 * yb]
                r1 = v[z, 2 * yb + 1]
                for xb in range(nxb):
                    t = np.float32(r0[2 * xb]) + np.float32(r0[2 * xb + 1])
                    t = t + np.float32(r1[2 * xb])
                    t = t + np.float32(r1[2 * xb + 1])
                    out[z, yb, xb] = t * scale
        return
    for z in range(nz):
        for yb in range(nyb):
            for xb in range(nxb):
                t = np.float32(0.0)
                for i in range(b):
                    for j in range(b):
                        t += np.float32(v[z, yb * b + i, xb * b + j])
                out[z, yb, xb] = t * scale


def _tukey(n: int, alpha: float, shift: float = 0.0) -> np.ndarray:
    """Tukey window of n samples, evaluated at ``i - shift`` (zero outside the frame)."""
    if n <= 2 or alpha <= 0:
        return np.ones(n, np.float32)
    u = (np.arange(n) - shift) / (n - 1)
    w = np.ones(n)
    lo, hi = u < alpha / 2, u > 1 - alpha / 2
    w[lo] = 0.5 * (1 + np.cos(np.pi * (2 * u[lo] / alpha - 1)))
    w[hi] = 0.5 * (1 + np.cos(np.pi * (2 * (u[hi] - 1) / alpha + 1)))
    w[(u < 0) | (u > 1)] = 0.0
    return w.astype(np.float32)


def _window(v: np.ndarray, crop: tuple[tuple[int, int], ...], alpha: float,
            shift: np.ndarray | None = None) -> np.ndarray:
    v = v[tuple(slice(a, b) for a, b in crop)]
    sh = np.zeros(3) if shift is None else shift
    w = [_tukey(n, alpha, float(d)) for n, d in zip(v.shape, sh, strict=True)]
    return apply_window(v, w[0], w[1], w[2])


def _cross_power(binned: np.ndarray, prepared: PreparedReference,
                 window_shift: np.ndarray | None) -> np.ndarray:
    """Cross-power spectrum of a binned volume and the reference; the moving volume's window
    is displaced by ``window_shift`` (conditioned voxels) so that it frames the same content."""
    F = sfft.rfftn(_window(binned, prepared.crop, prepared.tukey_alpha, window_shift),
                   workers=1)
    if prepared.normalization == "phase":
        F = F / (np.abs(F) + np.finfo(np.float32).tiny)
    if F.dtype == np.complex64:
        return np.multiply(F, prepared.spectrum, out=F)  # in place: no third spectrum
    return (F * prepared.spectrum).astype(np.complex64, copy=False)


def _bound(R: np.ndarray, prepared: PreparedReference) -> float:
    """Correlation of perfectly aligned phases for the cross-power spectrum ``R`` (the
    quality's denominator); only the final pass's is needed."""
    if prepared.normalization == "phase":
        return prepared.bound
    shape = prepared.shape
    per_x = np.abs(R).reshape(-1, R.shape[-1]).sum(axis=0, dtype=np.float64)
    return float(per_x @ half_weights(shape) / np.prod(shape))


def _coarse_peak(R: np.ndarray, prepared: PreparedReference) -> tuple[np.ndarray, np.ndarray]:
    """Integer peak of the correlation (within the allowed shifts) and a 3-point parabolic
    sub-voxel offset per axis (used only to place the window)."""
    shape = prepared.shape
    c = sfft.irfftn(R, s=shape, workers=1)
    sub = c if prepared.full_search else c[np.ix_(*prepared.allowed)]
    j = np.unravel_index(int(np.argmax(sub)), sub.shape)
    idx = [int(prepared.allowed[a][j[a]]) for a in range(3)]
    coarse = np.array([_signed(np.asarray(idx[a]), shape[a]) for a in range(3)], dtype=float)
    frac = np.zeros(3)
    for a in range(3):
        if shape[a] < 3:
            continue
        lo, hi = list(idx), list(idx)
        lo[a], hi[a] = (idx[a] - 1) % shape[a], (idx[a] + 1) % shape[a]
        frac[a] = parabolic_offset(c[tuple(lo)], c[tuple(idx)], c[tuple(hi)])
    return coarse, frac


def prepare_reference(
    reference: np.ndarray,
    *,
    bin_yx: int = 1,
    margin_vox: Sequence[int] = (0, 0, 0),
    highpass_sigma_vox: float | Sequence[float] = (0.0, 10.0, 10.0),
    lowpass_sigma_vox: float | Sequence[float] = (0.0, 1.0, 1.0),
    tukey_alpha: float = 0.25,
    normalization: str = "none",
    max_shift_vox: float | Sequence[float] | None = None,
    first_pass_bin: int | None = None,
) -> PreparedReference:
    """Condition a reference volume and precompute its conjugate spectrum.

    Parameters
    ----------
    reference : ndarray of shape (z, y, x)
        The reference volume.
    bin_yx : int, default=1
        Average ``bin_yx x bin_yx`` blocks in y and x before estimating (faster, smoother).
    margin_vox : sequence of 3 int, default=(0, 0, 0)
        Voxels cut from each side of each axis (bright or empty borders). The region is then
        trimmed to a fast FFT length.
    highpass_sigma_vox : float or sequence of 3 float, default=(0, 10, 10)
        Gaussian high-pass (weight ``1 - exp(-2 pi^2 sum sigma^2 k^2)``) in voxels; removes
        slow shading so that cells, not the brain outline, drive the estimate. 0 = off.
    lowpass_sigma_vox : float or sequence of 3 float, default=(0, 1, 1)
        Gaussian low-pass in voxels; down-weights shot-noise frequencies. 0 = off.
    tukey_alpha : float, default=0.25
        Taper fraction of the separable Tukey window (suppresses the wrap-around edge).
    normalization : {"phase", "none"}, default="none"
        ``"phase"``: phase correlation (cross-power spectrum divided by its magnitude);
        ``"none"``: plain cross-correlation.
    max_shift_vox : float or sequence of 3 float, optional
        Search only shifts up to this size per axis (in original voxels).
    first_pass_bin : int, optional
        Extra y/x binning of the first pass of :func:`register_volume`, which only places
        the moving volume's window (the shift itself is refined at ``bin_yx``). Default:
        2 when the plane binned ``2 * bin_yx`` times keeps >= ``FIRST_PASS_MIN_PIXELS``
        pixels in y and x, else 1 (the first pass runs at ``bin_yx``).

    Returns
    -------
    PreparedReference

    Raises
    ------
    ConfigError
        A bad option value (the message names it).

    References
    ----------
    .. [1] Kuglin, C. D. & Hines, D. C. (1975). The phase correlation image alignment method.
       Proc. IEEE Int. Conf. Cybernetics and Society, 163-165.
    """
    ref = np.asarray(reference)
    if ref.ndim != 3:
        raise ConfigError(f"reference has shape {ref.shape}; expected a (z, y, x) volume")
    if int(bin_yx) < 1:
        raise ConfigError(f"motion.bin_yx = {bin_yx}: expected an integer >= 1")
    if normalization not in ("phase", "none"):
        raise ConfigError(f"normalization = {normalization!r}: expected 'phase' or 'none'")
    if not 0.0 <= tukey_alpha <= 1.0:
        raise ConfigError(f"tukey_alpha = {tukey_alpha}: expected a value in [0, 1]")
    b = int(bin_yx)
    if first_pass_bin is None:
        small = min(ref.shape[1], ref.shape[2]) // (2 * b)
        first_pass_bin = 2 if small >= FIRST_PASS_MIN_PIXELS else 1
    if int(first_pass_bin) < 1:
        raise ConfigError(f"first_pass_bin = {first_pass_bin}: expected an integer >= 1")
    binned = (ref.shape[0], ref.shape[1] // b, ref.shape[2] // b)
    marg = [int(m) for m in np.broadcast_to(np.asarray(margin_vox), (3,))]
    marg = [marg[0], marg[1] // b, marg[2] // b]
    crop = []
    for n, m in zip(binned, marg, strict=True):
        avail = n - 2 * m
        if avail < 1:
            raise ConfigError(f"margin_vox = {tuple(margin_vox)} leaves no voxels of a volume of "
                              f"shape {ref.shape}")
        keep = _prev_fast_len(avail)
        start = m + (avail - keep) // 2
        crop.append((start, start + keep))
    shape = tuple(b_ - a for a, b_ in crop)
    scale = np.array([1.0, b, b])
    hp = np.asarray(_triple(highpass_sigma_vox, "highpass_sigma_vox")) / scale
    lp = np.asarray(_triple(lowpass_sigma_vox, "lowpass_sigma_vox")) / scale
    fz, fy = sfft.fftfreq(shape[0]), sfft.fftfreq(shape[1])
    fx = sfft.rfftfreq(shape[2])
    k2_hp = (hp[0] * fz[:, None, None]) ** 2 + (hp[1] * fy[None, :, None]) ** 2 \
        + (hp[2] * fx[None, None, :]) ** 2
    k2_lp = (lp[0] * fz[:, None, None]) ** 2 + (lp[1] * fy[None, :, None]) ** 2 \
        + (lp[2] * fx[None, None, :]) ** 2
    weight = np.exp(-4 * np.pi**2 * k2_lp)  # applied once to the product = squared filter
    if np.any(hp > 0):
        weight = weight * (1.0 - np.exp(-2 * np.pi**2 * k2_hp)) ** 2
    spec = sfft.rfftn(_window(_bin(ref, b), tuple(crop), tukey_alpha), workers=1)
    if normalization == "phase":
        spec = spec / (np.abs(spec) + np.finfo(np.float32).tiny)
    spectrum = (np.conj(spec) * weight).astype(np.complex64)
    n_total = float(np.prod(shape))
    bound = float((weight * half_weights(shape)).sum() / n_total)
    if max_shift_vox is None:
        ms = tuple(float(n) / 2 for n in shape)
    else:
        ms = tuple(np.asarray(_triple(max_shift_vox, "max_shift_vox")) / scale)
    first = None
    if int(first_pass_bin) > 1:
        first = prepare_reference(ref, bin_yx=b * int(first_pass_bin), margin_vox=margin_vox,
                                  highpass_sigma_vox=highpass_sigma_vox,
                                  lowpass_sigma_vox=lowpass_sigma_vox, tukey_alpha=tukey_alpha,
                                  normalization=normalization, max_shift_vox=max_shift_vox,
                                  first_pass_bin=1)
    return PreparedReference(spectrum=spectrum, shape=shape, source_shape=ref.shape,
                             first=first,
                             bin_yx=b, crop=tuple(crop), tukey_alpha=float(tukey_alpha),
                             normalization=normalization, bound=bound,
                             allowed=tuple(np.flatnonzero(np.abs(_signed(np.arange(n), n))
                                                          <= m + 1e-9)
                                           for n, m in zip(shape, ms, strict=True)))


def _signed(idx: np.ndarray, n: int) -> np.ndarray:
    return np.where(idx > n // 2, idx - n, idx)


def register_volume(volume: np.ndarray, prepared: PreparedReference, *,
                    upsample: int = 20, recentre: bool = True) -> tuple[np.ndarray, float]:
    """Rigid translation of one volume against a prepared reference.

    Parameters
    ----------
    volume : ndarray of shape (z, y, x)
        The moving volume (any real dtype), same shape as the reference.
    prepared : PreparedReference
        From :func:`prepare_reference`.
    upsample : int, default=20
        Sub-voxel precision 1 / upsample in original voxels (y and x are refined at
        ``upsample * bin_yx`` in binned voxels).
    recentre : bool, default=True
        Correlate a second time with the moving volume's window displaced by the first
        estimate (skipped when that estimate is below 0.1 voxel). The window is fixed in the
        frame, so a single pass pulls the peak towards zero: up to ~0.15 voxel in z for a
        2.5-plane shift of a 16-plane volume (measured on planted shifts, see the tests). It
        costs one more FFT pair; with ``prepared.first`` the first estimate comes from planes
        binned further and the pass at ``bin_yx`` always runs once, window placed.

    Returns
    -------
    shift_vox : ndarray of shape (3,), float64
        Content displacement (z, y, x) in voxels: ``volume(r) = reference(r - shift_vox)``.
    quality : float
        Refined correlation peak relative to perfectly aligned phases, in [0, 1]
        (1 = identical up to the shift; about 0 = no match).

    Raises
    ------
    ConfigError
        The volume's shape differs from the reference's, or ``upsample < 1``.

    References
    ----------
    .. [1] Guizar-Sicairos, M., Thurman, S. T. & Fienup, J. R. (2008). Efficient subpixel image
       registration algorithms. Optics Letters 33(2), 156-158. doi:10.1364/OL.33.000156
    .. [2] Kuglin, C. D. & Hines, D. C. (1975). The phase correlation image alignment method.
       Proc. IEEE Int. Conf. Cybernetics and Society, 163-165.
    """
    vol = np.asarray(volume)
    if vol.shape != prepared.source_shape:
        raise ConfigError(f"volume has shape {vol.shape}; expected the reference's shape "
                          f"{prepared.source_shape}")
    if int(upsample) < 1:
        raise ConfigError(f"motion.upsample = {upsample}: expected an integer >= 1")
    shape = prepared.shape
    b = prepared.bin_yx
    binned = _bin(vol, b)
    first = prepared.first if recentre and prepared.tukey_alpha > 0 else None
    if first is not None:
        # the first estimate only places the window: on planes binned further (4x fewer
        # voxels per extra factor 2), then the one pass at bin_yx with the window placed
        k = first.bin_yx // b
        R1 = _cross_power(_bin(binned, k), first, None)
        c1, f1 = _coarse_peak(R1, first)
        place = (c1 + f1) * np.array([1.0, k, k])
        R = _cross_power(binned, prepared,
                         place if np.abs(place).max() > 0.1 else None)
        # the peak lies near the window's placement: search whole voxels around it by
        # matrix-multiply DFTs, the full inverse FFT only if the peak is not inside that grid
        # (this trusts the binned pass's choice of peak; see DEVELOPERS.md)
        near = local_peak(R, shape, place, prepared.allowed)
        coarse, frac = near if near is not None else _coarse_peak(R, prepared)
    else:
        R = _cross_power(binned, prepared, None)
        coarse, frac = _coarse_peak(R, prepared)
        if recentre and prepared.tukey_alpha > 0 and np.abs(coarse + frac).max() > 0.1:
            # the window is fixed in the frame and pulls the peak towards zero; a window that
            # follows the first estimate frames the same content in both volumes
            R = _cross_power(binned, prepared, coarse + frac)
            coarse, frac = _coarse_peak(R, prepared)
    up = np.array([upsample, upsample * b, upsample * b], dtype=float)
    # the 3-point parabola is within ~0.1 voxel of the peak, so a +-0.3 voxel grid (2.5x
    # fewer points per axis than the +-0.75 of the original method) usually suffices; the
    # full grid is the fallback when the maximum lands on the small grid's border
    fine, peak, edge = upsampled_peak(R, shape, coarse + frac, up, 0.3, stride=4)
    if edge:
        fine, peak, _ = upsampled_peak(R, shape, coarse, up, 0.75)
    bound = _bound(R, prepared)
    quality = float(np.clip(peak / bound, 0.0, 1.0)) if bound > 0 else 0.0
    return fine * np.array([1.0, b, b]), quality


def shift_volume(volume: np.ndarray, shift_vox: Sequence[float] | np.ndarray, *, method: str = "linear",
                 mode: str = "nearest") -> np.ndarray:
    """Register a volume: apply ``-shift_vox`` so its content lands on the reference grid.

    Parameters
    ----------
    volume : ndarray of shape (z, y, x)
    shift_vox : sequence of 3 float
        The volume's shift as returned by :func:`register_volume`.
    method : {"linear", "fourier"}, default="linear"
        Trilinear interpolation (``scipy.ndimage.shift``, order 1: no ringing, slight blur) or
        an exact band-limited Fourier shift (circular at the borders).
    mode : str, default="nearest"
        Border handling of the linear method (see ``scipy.ndimage.shift``).

    Returns
    -------
    ndarray of shape (z, y, x), float32
        ``registered(r) = volume(r + shift_vox)``.

    Raises
    ------
    ConfigError
        Unknown method.
    """
    v = np.asarray(volume, dtype=np.float32)
    s = -np.asarray(shift_vox, dtype=float)
    if method == "linear":
        if mode == "nearest" and np.all(np.isfinite(s)):
            return _separable_linear_shift(v, -s)
        return ndi.shift(v, s, order=1, mode=mode, prefilter=False)
    if method == "fourier":
        spec = ndi.fourier_shift(sfft.fftn(v, workers=1), s)
        return sfft.ifftn(spec, workers=1).real.astype(np.float32)
    raise ConfigError(f"method = {method!r}: expected 'linear' or 'fourier'")


def _separable_linear_shift(v: np.ndarray, shift_vox: np.ndarray) -> np.ndarray:
    """``out(r) = v(r + shift_vox)`` by trilinear interpolation, edges extended (``nearest``).

    Equal to ``scipy.ndimage.shift(v, -shift_vox, order=1, mode="nearest")`` up to float32
    rounding: an order-1 spline is separable, so the shift is three passes of a 2-tap filter
    along one axis each (gathers of whole rows/planes). Hand-written because it is the inner
    loop of the motion pass: 30 ms instead of 116 ms for a 30 x 256 x 256 float32 volume
    (measured, 1 core), and an axis with a whole-voxel shift costs one gather.
    """
    out = v
    for ax, d in enumerate(shift_vox):
        n = out.shape[ax]
        k = int(np.floor(d))
        f = np.float32(d - k)
        idx = np.clip(np.arange(n) + k, 0, n - 1)
        if f == 0:
            if k != 0:
                out = np.take(out, idx, axis=ax)
            continue
        idx1 = np.clip(np.arange(n) + k + 1, 0, n - 1)
        lo = np.take(out, idx, axis=ax)
        lo *= np.float32(1.0) - f
        hi = np.take(out, idx1, axis=ax)
        hi *= f
        lo += hi
        out = lo
    return out if out is not v else v.copy()


def registered_sum(volumes: Iterable[np.ndarray], prepared: PreparedReference, *,
                   upsample: int = 20) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Register each volume and sum the registered volumes (one block of a reference pass).

    Returns
    -------
    total : ndarray of shape (z, y, x), float64
        Sum of the registered volumes.
    shifts_vox : ndarray of shape (n, 3)
    quality : ndarray of shape (n,)
    """
    from pipeline.volumes.summary_kernels import add_shifted

    total = np.zeros(prepared.source_shape, dtype=np.float64)
    zero = np.zeros((1, 1, 1), np.float32)
    shifts, quals = [], []
    for v in volumes:
        s, q = register_volume(v, prepared, upsample=upsample)
        # total += shift_volume(v, s), bit for bit, without the registered copy
        d = np.asarray(s, dtype=np.float64)
        k = np.floor(d).astype(np.int64)
        vol = np.asarray(v)
        if not (np.issubdtype(vol.dtype, np.integer) or np.issubdtype(vol.dtype, np.floating)):
            vol = vol.astype(np.float32)
        add_shifted(np.ascontiguousarray(vol), k, (d - k).astype(np.float32),
                    np.broadcast_to(zero, vol.shape), total)
        shifts.append(s)
        quals.append(q)
    return total, np.asarray(shifts).reshape(-1, 3), np.asarray(quals)


def build_reference(volumes: Sequence[np.ndarray], *, upsample: int = 20, n_refine: int = 1,
                    **options: object) -> tuple[np.ndarray, np.ndarray]:
    """Reference volume: the block's mean, refined by registering the block to it.

    Parameters
    ----------
    volumes : sequence of ndarray of shape (z, y, x)
        An early, quiet block of volumes (re-iterable: read ``1 + n_refine`` times).
    upsample : int, default=20
    n_refine : int, default=1
        Rounds of register-and-average.
    **options
        Passed to :func:`prepare_reference`.

    Returns
    -------
    reference : ndarray of shape (z, y, x), float32
    shifts_vox : ndarray of shape (n, 3)
        The block's shifts against the previous round's reference.
    """
    n = 0
    total = None
    for v in volumes:
        total = np.asarray(v, dtype=np.float64) + (0 if total is None else total)
        n += 1
    if total is None:
        raise ConfigError("build_reference: the reference block is empty; expected >= 1 volume")
    ref = (total / n).astype(np.float32)
    shifts = np.zeros((n, 3))
    for _ in range(int(n_refine)):
        prep = prepare_reference(ref, **options)  # type: ignore[arg-type]
        total, shifts, _q = registered_sum(volumes, prep, upsample=upsample)
        ref = (total / n).astype(np.float32)
    return ref, shifts
