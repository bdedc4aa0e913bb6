"""Summary images filled by the motion pass: registered mean and local correlation.

The local-correlation image is, per voxel, the Pearson correlation over time between the voxel
and the mean of its neighbours. It is computed from five running sums per voxel
(``sum x, sum x^2, sum x n, sum n, sum n^2``), which add across blocks of volumes: the motion
stage fills one :class:`SummaryAccumulator` per block of volumes in parallel and merges them,
so cell detection never reads the volumes again.

Numerical note: the sums are float64 and the data can be offset by a per-voxel constant
(``offset``, e.g. the reference volume) before accumulation; correlations do not change under
such an offset, and it keeps ``sum x^2 - (sum x)^2 / n`` well conditioned over thousands of
volumes.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from pipeline.errors import ConfigError

__all__ = ["SummaryAccumulator", "neighbour_mean"]

_NEIGHBOURHOODS = (26, 6, 8)


def neighbour_mean(volume: np.ndarray, *, neighbourhood: int = 26) -> np.ndarray:
    """Mean of each voxel's neighbours (the voxel itself excluded; borders use those present).

    Parameters
    ----------
    volume : ndarray of shape (z, y, x)
    neighbourhood : {26, 6, 8}, default=26
        26: the 3x3x3 cube; 6: face neighbours; 8: the 3x3 square in the same plane (for
        volumes whose plane spacing is much larger than the pixel size).

    Returns
    -------
    ndarray of shape (z, y, x), float64

    Raises
    ------
    ConfigError
        Unknown neighbourhood.
    """
    v = np.asarray(volume, dtype=np.float64)
    if neighbourhood not in _NEIGHBOURHOODS:
        raise ConfigError(f"neighbourhood = {neighbourhood!r}: expected one of "
                          f"{_NEIGHBOURHOODS}")
    if neighbourhood == 6:
        total = np.zeros_like(v)
        count = np.zeros(v.shape, dtype=np.float64)
        for axis in range(3):
            n = v.shape[axis]
            if n < 2:
                continue
            lo = [slice(None)] * 3
            hi = [slice(None)] * 3
            lo[axis], hi[axis] = slice(0, n - 1), slice(1, n)
            total[tuple(lo)] += v[tuple(hi)]
            total[tuple(hi)] += v[tuple(lo)]
            count[tuple(lo)] += 1
            count[tuple(hi)] += 1
    else:
        # separable 3-tap box sums with zero padding, then remove the centre voxel; the count
        # of neighbours present is the outer product of the per-axis counts (3, or 2 at an
        # edge) minus one. Equal to uniform_filter(mode="constant") * box volume, and ~2x
        # faster on a 30 x 256 x 256 float64 volume (measured: 36-50 ms against 82-134 ms).
        axes = (0, 1, 2) if neighbourhood == 26 else (1, 2)
        total = v
        per_axis = []
        for axis in range(3):
            n = v.shape[axis]
            c = np.ones(n)
            if axis in axes:
                c = c + (np.arange(n) > 0) + (np.arange(n) < n - 1)
                total = _box3(total, axis)
            per_axis.append(c)
        total = total - v
        count = (per_axis[0][:, None, None] * per_axis[1][None, :, None]
                 * per_axis[2][None, None, :]) - 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), 0.0)


def _box3(a: np.ndarray, axis: int) -> np.ndarray:
    """``a[i-1] + a[i] + a[i+1]`` along ``axis`` with zeros beyond the edges."""
    out = a.copy()
    n = a.shape[axis]
    if n < 2:
        return out
    lo = [slice(None)] * a.ndim
    hi = [slice(None)] * a.ndim
    lo[axis], hi[axis] = slice(0, n - 1), slice(1, n)
    out[tuple(lo)] += a[tuple(hi)]
    out[tuple(hi)] += a[tuple(lo)]
    return out


@dataclass
class SummaryAccumulator:
    """Running sums for the mean and local-correlation images of registered volumes.

    Build with :meth:`empty`, call :meth:`update` once per registered volume, combine blocks
    with :meth:`merge`, and read the images with :meth:`finalize`.

    Attributes
    ----------
    n : int
        Volumes accumulated.
    sum_x, sum_xx, sum_xn, sum_n, sum_nn : ndarray of shape (z, y, x), float64
        Running sums of the voxel value x and its neighbour mean n.
    neighbourhood : int
        26, 6 or 8 (see :func:`neighbour_mean`).
    offset : ndarray of shape (z, y, x) or None
        Subtracted from every volume before accumulating (added back to the mean).
    """

    n: int
    sum_x: np.ndarray
    sum_xx: np.ndarray
    sum_xn: np.ndarray
    sum_n: np.ndarray
    sum_nn: np.ndarray
    neighbourhood: int = 26
    offset: np.ndarray | None = field(default=None)

    @classmethod
    def empty(cls, shape: tuple[int, ...], *, neighbourhood: int = 26,
              offset: np.ndarray | None = None) -> SummaryAccumulator:
        """An accumulator of zero volumes for volumes of ``shape`` (z, y, x)."""
        if neighbourhood not in _NEIGHBOURHOODS:
            raise ConfigError(f"neighbourhood = {neighbourhood!r}: expected one of "
                              f"{_NEIGHBOURHOODS}")
        shape = tuple(int(s) for s in shape)  # type: ignore[assignment]
        if offset is not None and np.shape(offset) != shape:
            raise ConfigError(f"offset has shape {np.shape(offset)}; expected {shape}")
        def z() -> np.ndarray:
            return np.zeros(shape, dtype=np.float64)

        off = None if offset is None else np.asarray(offset, dtype=np.float64)
        return cls(0, z(), z(), z(), z(), z(), neighbourhood=neighbourhood, offset=off)

    @property
    def shape(self) -> tuple[int, ...]:
        return self.sum_x.shape

    def update(self, registered_volume: np.ndarray) -> None:
        """Add one registered volume (z, y, x)."""
        x = np.asarray(registered_volume, dtype=np.float64)
        if x.shape != self.shape:
            raise ConfigError(f"volume has shape {x.shape}; expected {self.shape}")
        if self.offset is not None:
            x = x - self.offset
        nb = neighbour_mean(x, neighbourhood=self.neighbourhood)
        self.sum_x += x
        self.sum_xx += x * x
        self.sum_xn += x * nb
        self.sum_n += nb
        self.sum_nn += nb * nb
        self.n += 1

    def merge(self, other: SummaryAccumulator) -> SummaryAccumulator:
        """Add another block's sums into this one (in place); returns self.

        Raises
        ------
        ConfigError
            The blocks differ in shape, neighbourhood or offset.
        """
        if other.shape != self.shape or other.neighbourhood != self.neighbourhood:
            raise ConfigError(f"cannot merge accumulators of shape {other.shape} / "
                              f"neighbourhood {other.neighbourhood} into shape {self.shape} / "
                              f"neighbourhood {self.neighbourhood}")
        same_offset = (self.offset is None and other.offset is None) or (
            self.offset is not None and other.offset is not None
            and np.array_equal(self.offset, other.offset))
        if not same_offset:
            raise ConfigError("cannot merge accumulators built with different offsets")
        for name in ("sum_x", "sum_xx", "sum_xn", "sum_n", "sum_nn"):
            getattr(self, name).__iadd__(getattr(other, name))
        self.n += other.n
        return self

    def finalize(self) -> tuple[np.ndarray, np.ndarray]:
        """The registered mean image and the local-correlation image.

        Returns
        -------
        mean : ndarray of shape (z, y, x), float32
        local_corr : ndarray of shape (z, y, x), float32
            Pearson correlation in [-1, 1]; 0 where a voxel or its neighbourhood is constant.

        Raises
        ------
        ConfigError
            No volume was accumulated.

        References
        ----------
        .. [1] Smith, S. L. & Haeusser, M. (2010). Parallel processing of visual space by
           neighboring neurons in mouse visual cortex. Nature Neuroscience 13, 1144-1149.
           doi:10.1038/nn.2620 (correlation of each pixel with its neighbours)
        """
        if self.n == 0:
            raise ConfigError("no volume accumulated: the summary images are undefined")
        n = float(self.n)
        mx, mn = self.sum_x / n, self.sum_n / n
        cov = self.sum_xn / n - mx * mn
        vx = np.maximum(self.sum_xx / n - mx * mx, 0.0)
        vn = np.maximum(self.sum_nn / n - mn * mn, 0.0)
        den = np.sqrt(vx * vn)
        tiny = 1e-12 * max(float(np.max(vx, initial=0.0)), 1e-300)
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = np.where(den > tiny, cov / np.where(den > tiny, den, 1.0), 0.0)
        mean = mx if self.offset is None else mx + self.offset
        return mean.astype(np.float32), np.clip(corr, -1.0, 1.0).astype(np.float32)
