"""Summary images filled by the motion pass: registered mean and local correlation.

The local-correlation image is, per voxel, the Pearson correlation over time between the voxel
and the mean of its neighbours. It is computed from four running sums per voxel
(``sum x, sum x^2, sum x n, sum n^2``; ``sum n`` is the neighbour mean of ``sum x``, as the
neighbour mean is linear), which add across blocks of volumes: the motion stage fills one
:class:`SummaryAccumulator` per block of volumes in parallel and merges them, so cell detection
never reads the volumes again.

Speed: :meth:`SummaryAccumulator.update_shifted` registers a raw volume (trilinear, the same
float32 arithmetic as :func:`pipeline.volumes.motion.shift_volume`), forms the neighbour mean
and adds the products in one compiled pass, plane by plane and row by row, so no registered
or float64 copy of the volume is ever made (:mod:`pipeline.volumes.summary_kernels`).

Numerical note: the session's sums are float64 and the data can be offset by a per-voxel
constant (``offset``, e.g. the reference volume) before accumulation; correlations do not
change under such an offset, and it keeps ``sum x^2 - (sum x)^2 / n`` well conditioned over
thousands of volumes. A task accumulates its block of volumes in float32
(``SummaryAccumulator.empty(..., dtype="float32")``, at most :data:`BLOCK32_MAX_VOLUMES`
volumes) and the blocks are added into float64 sums in volume order. Each product is formed
in float64 and rounded once when added, so by the recursive-summation bound (Higham,
*Accuracy and Stability of Numerical Algorithms*, 2nd ed., section 4.2) a block sum of m
terms is off by at most ``(m - 1) u sum |terms| + m u |sum|`` with ``u = 2**-24``: a relative
error below ``2 * 64 * 6e-8 = 7.6e-6`` of ``sum |terms|`` for the non-negative ``sum x^2`` and
``sum n^2``, and, because the offset makes the block's terms small deviations, well below the
float32 rounding of the mean image for ``sum x``. The float64 session sums add the blocks
with float64 error only. The block partition depends on the session length and
``motion.block_volumes``, never on the worker count, so results are bit-identical on any
number of workers. The float32 blocks halve the memory traffic of the sums (the largest cost
of :meth:`SummaryAccumulator.update_shifted`), a task's memory and the spilled files.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from pipeline.errors import ConfigError
from pipeline.volumes.summary_kernels import accumulate

__all__ = ["SummaryAccumulator", "SpilledSums", "neighbour_mean", "BLOCK32_MAX_VOLUMES"]

#: Most volumes a float32 block accumulator takes (module note: relative error <= 64 u).
BLOCK32_MAX_VOLUMES = 64

_NEIGHBOURHOODS = (26, 6, 8)
_MODE = {26: 0, 6: 1, 8: 2}


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
        # times the reciprocal of the count (as the compiled accumulation, bit for bit)
        return np.where(count > 0, total * (1.0 / np.maximum(count, 1)), 0.0)
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

    Build with :meth:`empty`, call :meth:`update` once per registered volume (or
    :meth:`update_shifted` once per raw volume and its shift), combine blocks with
    :meth:`merge`, and read the images with :meth:`finalize`.

    Attributes
    ----------
    n : int
        Volumes accumulated.
    sum_x, sum_xx, sum_xn, sum_nn : ndarray of shape (z, y, x), float64
        Running sums of the voxel value x and its neighbour mean n (``sum n`` is not kept: it
        is the neighbour mean of ``sum_x``).
    neighbourhood : int
        26, 6 or 8 (see :func:`neighbour_mean`).
    offset : ndarray of shape (z, y, x) or None
        Subtracted from every volume before accumulating (added back to the mean); kept in
        its own floating dtype (a float32 reference is not widened).
    """

    n: int
    sum_x: np.ndarray
    sum_xx: np.ndarray
    sum_xn: np.ndarray
    sum_nn: np.ndarray
    neighbourhood: int = 26
    offset: np.ndarray | None = field(default=None)

    @classmethod
    def empty(cls, shape: tuple[int, ...], *, neighbourhood: int = 26,
              offset: np.ndarray | None = None,
              dtype: type[np.floating] | str = np.float64) -> SummaryAccumulator:
        """An accumulator of zero volumes for volumes of ``shape`` (z, y, x).

        ``dtype="float32"`` makes a block accumulator: half the memory and memory traffic of
        the float64 sums, for at most :data:`BLOCK32_MAX_VOLUMES` volumes, to be merged into
        a float64 accumulator (see the module's numerical note for the error bound).
        """
        dt = np.dtype(dtype)
        if dt not in (np.float32, np.float64):
            raise ConfigError(f"dtype = {dtype!r}: expected float32 or float64")
        if neighbourhood not in _NEIGHBOURHOODS:
            raise ConfigError(f"neighbourhood = {neighbourhood!r}: expected one of "
                              f"{_NEIGHBOURHOODS}")
        shape = tuple(int(s) for s in shape)  # type: ignore[assignment]
        if offset is not None and np.shape(offset) != shape:
            raise ConfigError(f"offset has shape {np.shape(offset)}; expected {shape}")
        def z() -> np.ndarray:
            return np.zeros(shape, dtype=dt)

        off = None
        if offset is not None:
            off = np.asarray(offset)
            if off.dtype not in (np.float32, np.float64):
                off = off.astype(np.float64)
        return cls(0, z(), z(), z(), z(), neighbourhood=neighbourhood, offset=off)

    @property
    def shape(self) -> tuple[int, ...]:
        return self.sum_x.shape

    def _add(self, volumes: np.ndarray, shifts_vox: np.ndarray | None) -> None:
        v = np.asarray(volumes)
        if v.shape[1:] != self.shape:
            raise ConfigError(f"volume has shape {v.shape[1:]}; expected {self.shape}")
        if not (np.issubdtype(v.dtype, np.integer) or np.issubdtype(v.dtype, np.floating)):
            v = v.astype(np.float64)
        nb = v.shape[0]
        self._check_room(nb)
        if shifts_vox is None:
            k = np.zeros((nb, 3), np.int64)
            f = np.zeros((nb, 3), np.float32)
        else:
            d = np.asarray(shifts_vox, dtype=np.float64)
            if d.shape != (nb, 3) or not np.all(np.isfinite(d)):
                raise ConfigError(f"shift_vox = {shifts_vox!r}: expected 3 finite values "
                                  f"(z, y, x) per volume")
            k = np.floor(d).astype(np.int64)
            # the fraction as motion._separable_linear_shift rounds it: float32(d - floor(d))
            f = (d - k).astype(np.float32)
        off = self.offset
        if off is None:
            off = np.broadcast_to(np.zeros((1, 1, 1), np.float32), self.shape)
        accumulate(np.ascontiguousarray(v), k, f, off, shifts_vox is None,
                   _MODE[self.neighbourhood], self.sum_x, self.sum_xx, self.sum_xn,
                   self.sum_nn)
        self.n += nb

    def update(self, registered_volume: np.ndarray) -> None:
        """Add one registered volume (z, y, x); its values are read as float64."""
        self._add(np.asarray(registered_volume)[None], None)

    def update_shifted(self, volume: np.ndarray, shift_vox: Sequence[float] | np.ndarray
                       ) -> None:
        """Add one raw volume registered on the fly by ``-shift_vox``.

        Equal to ``update(shift_volume(volume, shift_vox))`` (trilinear, edges extended, in
        float32, bit for bit) without making the registered copy.

        Parameters
        ----------
        volume : ndarray of shape (z, y, x)
            A raw volume (any real dtype).
        shift_vox : sequence of 3 float
            Its content shift against the reference (``volume(r) = reference(r - shift)``).

        Raises
        ------
        ConfigError
            Wrong shape or a non-finite shift.
        """
        self._add(np.asarray(volume)[None], np.asarray(shift_vox, dtype=np.float64)[None])

    _SUMS = ("sum_x", "sum_xx", "sum_xn", "sum_nn")

    def spill(self, path: str) -> SpilledSums:
        """Write the sums as ``<path>.<name>.npy`` files and return a small handle.

        A task on a process worker or a cluster returns the handle instead of the arrays: the
        client reads the files from the shared file system instead of receiving four float64
        volumes through the scheduler's messages (measured on the loaded 2-core machine: 16
        results of 64 MB took 9.5 s through a LocalCluster, 1.1 s as small results). Plain
        ``.npy`` files, not a zip archive, so that neither side computes checksums and the
        reader adds straight from the memory-mapped file.
        """
        for name in self._SUMS:
            np.save(f"{path}.{name}.npy", getattr(self, name))
        return SpilledSums(path=str(path), n=self.n, shape=tuple(self.shape),
                           neighbourhood=self.neighbourhood)

    def _check_room(self, extra: int) -> None:
        if self.sum_x.dtype == np.float32 and self.n + extra > BLOCK32_MAX_VOLUMES:
            raise ConfigError(f"a float32 block accumulator holds at most "
                              f"{BLOCK32_MAX_VOLUMES} volumes; got {self.n + extra} (merge "
                              f"blocks into a float64 accumulator)")

    def merge_spilled(self, spilled: SpilledSums) -> SummaryAccumulator:
        """:meth:`merge` the sums written by :meth:`spill` (same offset assumed) and delete
        the files; returns self."""
        if spilled.shape != self.shape or spilled.neighbourhood != self.neighbourhood:
            raise ConfigError(f"cannot merge accumulators of shape {spilled.shape} / "
                              f"neighbourhood {spilled.neighbourhood} into shape {self.shape} "
                              f"/ neighbourhood {self.neighbourhood}")
        self._check_room(spilled.n)
        for name in self._SUMS:
            file = f"{spilled.path}.{name}.npy"
            part = np.load(file, mmap_mode="r")
            getattr(self, name).__iadd__(part)
            del part
            os.remove(file)
        self.n += spilled.n
        return self

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
        self._check_room(other.n)
        for name in self._SUMS:
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
        s_x, s_xx, s_xn, s_nn = (np.asarray(getattr(self, k), dtype=np.float64)
                                 for k in self._SUMS)
        mx = s_x / n
        mn = neighbour_mean(s_x, neighbourhood=self.neighbourhood) / n
        cov = s_xn / n - mx * mn
        vx = np.maximum(s_xx / n - mx * mx, 0.0)
        vn = np.maximum(s_nn / n - mn * mn, 0.0)
        den = np.sqrt(vx * vn)
        tiny = 1e-12 * max(float(np.max(vx, initial=0.0)), 1e-300)
        with np.errstate(invalid="ignore", divide="ignore"):
            corr = np.where(den > tiny, cov / np.where(den > tiny, den, 1.0), 0.0)
        mean = mx if self.offset is None else mx + self.offset.astype(np.float64)
        return mean.astype(np.float32), np.clip(corr, -1.0, 1.0).astype(np.float32)


@dataclass(frozen=True)
class SpilledSums:
    """Handle of sums written by :meth:`SummaryAccumulator.spill`."""

    path: str
    n: int
    shape: tuple[int, ...]
    neighbourhood: int
