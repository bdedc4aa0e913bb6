"""Summary-image accumulators (pipeline.volumes.summary)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from pipeline.errors import ConfigError
from pipeline.volumes.summary import SummaryAccumulator, neighbour_mean

SHAPE = (3, 4, 5)


def _offsets(neighbourhood: int) -> list[tuple[int, int, int]]:
    cube = [d for d in itertools.product((-1, 0, 1), repeat=3) if d != (0, 0, 0)]
    if neighbourhood == 26:
        return cube
    if neighbourhood == 8:
        return [d for d in cube if d[0] == 0]
    return [d for d in cube if sum(map(abs, d)) == 1]


def _direct_local_corr(stack: np.ndarray, neighbourhood: int) -> np.ndarray:
    """Pearson correlation of each voxel with its neighbours' mean, voxel by voxel."""
    t, nz, ny, nx = stack.shape
    out = np.zeros((nz, ny, nx))
    for z, y, x in itertools.product(range(nz), range(ny), range(nx)):
        nbrs = [stack[:, z + dz, y + dy, x + dx] for dz, dy, dx in _offsets(neighbourhood)
                if 0 <= z + dz < nz and 0 <= y + dy < ny and 0 <= x + dx < nx]
        # reference: numpy.corrcoef (Pearson correlation)
        out[z, y, x] = np.corrcoef(stack[:, z, y, x], np.mean(nbrs, axis=0))[0, 1]
    return out


@pytest.mark.parametrize("neighbourhood", [26, 6, 8])
def test_local_correlation_matches_direct_computation(rng: np.random.Generator,
                                                      neighbourhood: int) -> None:
    common = rng.normal(0, 1, (40, 1, 1, 1))
    stack = 100 + rng.normal(0, 1, (40, *SHAPE)) + common * rng.uniform(0, 2, SHAPE)
    acc = SummaryAccumulator.empty(SHAPE, neighbourhood=neighbourhood)
    for vol in stack:
        acc.update(vol)
    mean, corr = acc.finalize()
    np.testing.assert_allclose(mean, stack.mean(0), rtol=1e-6)
    np.testing.assert_allclose(corr, _direct_local_corr(stack, neighbourhood), atol=1e-5)


def test_merged_blocks_equal_one_pass(rng: np.random.Generator) -> None:
    stack = rng.normal(500, 20, (30, *SHAPE))
    offset = stack[:5].mean(0)
    one = SummaryAccumulator.empty(SHAPE, offset=offset)
    for v in stack:
        one.update(v)
    blocks = []
    for start in (0, 7, 19):  # blocks of unequal size, merged out of order
        acc = SummaryAccumulator.empty(SHAPE, offset=offset)
        for v in stack[start:{0: 7, 7: 19, 19: 30}[start]]:
            acc.update(v)
        blocks.append(acc)
    merged = blocks[2].merge(blocks[0]).merge(blocks[1])
    assert merged.n == one.n == 30
    for a, b in zip(merged.finalize(), one.finalize(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-6, atol=1e-6)


def test_offset_does_not_change_the_images(rng: np.random.Generator) -> None:
    stack = rng.normal(3000, 5, (25, *SHAPE)) + rng.normal(0, 3, (25, 1, 1, 1))
    plain = SummaryAccumulator.empty(SHAPE)
    shifted = SummaryAccumulator.empty(SHAPE, offset=stack[0])
    for v in stack:
        plain.update(v)
        shifted.update(v)
    for a, b in zip(plain.finalize(), shifted.finalize(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-4)


def test_planted_active_cell_stands_out(rng: np.random.Generator) -> None:
    shape = (3, 12, 12)
    stack = rng.normal(100, 2, (60, *shape))
    activity = np.abs(rng.normal(0, 1, 60)).cumsum() % 7  # a slow, varying signal
    stack[:, 1, 5:8, 5:8] += 4 * activity[:, None, None]   # a 3x3 "cell" in plane 1
    acc = SummaryAccumulator.empty(shape, neighbourhood=8)
    for v in stack:
        acc.update(v)
    _, corr = acc.finalize()
    assert corr[1, 6, 6] > 0.9
    assert np.median(corr[0]) < 0.3


def test_constant_voxels_give_zero_correlation() -> None:
    acc = SummaryAccumulator.empty(SHAPE)
    for _ in range(3):
        acc.update(np.full(SHAPE, 7.0))
    mean, corr = acc.finalize()
    assert np.all(corr == 0) and np.all(mean == 7.0)


def test_neighbour_mean_of_a_ramp() -> None:
    ramp = np.arange(5.0)[None, None, :] * np.ones((3, 3, 1))
    nb = neighbour_mean(ramp, neighbourhood=6)
    # interior: mean of x-1, x+1 and four equal values = x (a linear function is harmonic)
    np.testing.assert_allclose(nb[1, 1, 1:-1], ramp[1, 1, 1:-1])


def test_errors(rng: np.random.Generator) -> None:
    with pytest.raises(ConfigError, match=r"neighbourhood = 18"):
        SummaryAccumulator.empty(SHAPE, neighbourhood=18)
    with pytest.raises(ConfigError, match=r"neighbourhood = 4"):
        neighbour_mean(np.zeros(SHAPE), neighbourhood=4)
    with pytest.raises(ConfigError, match=r"offset has shape \(3, 4\)"):
        SummaryAccumulator.empty(SHAPE, offset=np.zeros((3, 4)))
    acc = SummaryAccumulator.empty(SHAPE)
    with pytest.raises(ConfigError, match=r"volume has shape \(3, 4, 4\); expected \(3, 4, 5\)"):
        acc.update(np.zeros((3, 4, 4)))
    with pytest.raises(ConfigError, match="no volume accumulated"):
        acc.finalize()
    with pytest.raises(ConfigError, match=r"cannot merge accumulators of shape \(2, 4, 5\)"):
        acc.merge(SummaryAccumulator.empty((2, 4, 5)))
    with pytest.raises(ConfigError, match="different offsets"):
        acc.merge(SummaryAccumulator.empty(SHAPE, offset=np.ones(SHAPE)))


@pytest.mark.parametrize("shape", [(4, 9, 11), (1, 5, 7), (3, 1, 4)])
@pytest.mark.parametrize(("neighbourhood", "size"), [(26, (3, 3, 3)), (8, (1, 3, 3))])
def test_neighbour_mean_matches_box_filter(rng: np.random.Generator, shape, neighbourhood,
                                           size) -> None:
    import scipy.ndimage as ndi

    v = rng.normal(100.0, 10.0, shape)
    k = float(np.prod(size))
    # reference: scipy.ndimage.uniform_filter (zero padding) times the box volume
    total = ndi.uniform_filter(v, size=size, mode="constant") * k - v
    count = np.rint(ndi.uniform_filter(np.ones_like(v), size=size, mode="constant") * k - 1)
    expected = np.where(count > 0, total / np.maximum(count, 1), 0.0)
    np.testing.assert_allclose(neighbour_mean(v, neighbourhood=neighbourhood), expected,
                               rtol=0, atol=1e-9)


@pytest.mark.parametrize("neighbourhood", [26, 6, 8])
def test_update_shifted_equals_registered_copy(rng: np.random.Generator,
                                               neighbourhood: int) -> None:
    import scipy.ndimage as ndi

    from pipeline.volumes.motion import shift_volume

    shape = (4, 9, 11)
    vols = rng.integers(100, 4000, (5, *shape)).astype(np.uint16)
    shifts = [(0.3, -1.7, 2.25), (0.0, 0.0, 0.0), (-0.5, 3.0, 0.0), (1.2, -0.01, -7.9),
              (9.0, 0.5, 0.5)]
    offset = vols[0].astype(np.float32)
    fused = SummaryAccumulator.empty(shape, neighbourhood=neighbourhood, offset=offset)
    copied = SummaryAccumulator.empty(shape, neighbourhood=neighbourhood, offset=offset)
    scipy_acc = SummaryAccumulator.empty(shape, neighbourhood=neighbourhood, offset=offset)
    for v, s in zip(vols, shifts, strict=True):
        fused.update_shifted(v, s)
        copied.update(shift_volume(v, s))
        # reference: scipy.ndimage.shift, order 1, edges extended (registering applies -shift)
        scipy_acc.update(ndi.shift(v.astype(np.float32), np.negative(s), order=1,
                                   mode="nearest", prefilter=False))
    for name in ("sum_x", "sum_xx", "sum_xn", "sum_nn"):
        np.testing.assert_array_equal(getattr(fused, name), getattr(copied, name))
    for a, b in zip(fused.finalize(), scipy_acc.finalize(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-4)
    with pytest.raises(ConfigError, match=r"shift_vox = .*expected 3 finite values"):
        fused.update_shifted(vols[0], (0.0, np.nan, 0.0))


def test_spilled_sums_merge_like_the_arrays(rng: np.random.Generator, tmp_path) -> None:
    stack = rng.normal(500, 20, (12, *SHAPE))
    offset = stack[:3].mean(0)
    blocks = []
    for lo, hi in ((0, 5), (5, 12)):
        acc = SummaryAccumulator.empty(SHAPE, offset=offset)
        for v in stack[lo:hi]:
            acc.update(v)
        blocks.append(acc)
    direct = SummaryAccumulator.empty(SHAPE, offset=offset).merge(blocks[0]).merge(blocks[1])
    handle = blocks[1].spill(str(tmp_path / "sums"))
    assert handle.n == 7 and len(list(tmp_path.glob("sums.*.npy"))) == 4
    via_file = SummaryAccumulator.empty(SHAPE, offset=offset).merge(blocks[0])
    via_file.merge_spilled(handle)
    assert via_file.n == direct.n == 12 and not list(tmp_path.glob("sums.*"))
    for name in ("sum_x", "sum_xx", "sum_xn", "sum_nn"):
        np.testing.assert_array_equal(getattr(via_file, name), getattr(direct, name))
    other = SummaryAccumulator.empty((2, 4, 5)).spill(str(tmp_path / "other"))
    with pytest.raises(ConfigError, match=r"cannot merge accumulators of shape \(2, 4, 5\)"):
        via_file.merge_spilled(other)


def test_float32_blocks_within_the_summation_bound(rng: np.random.Generator) -> None:
    from pipeline.volumes.summary import BLOCK32_MAX_VOLUMES

    stack = rng.normal(800, 60, (BLOCK32_MAX_VOLUMES + 8, *SHAPE)).astype(np.float32)
    offset = stack[:4].mean(0)
    exact = SummaryAccumulator.empty(SHAPE, offset=offset)
    block = SummaryAccumulator.empty(SHAPE, offset=offset, dtype="float32")
    for v in stack[:BLOCK32_MAX_VOLUMES]:
        exact.update(v)
        block.update(v)
    assert block.sum_xx.dtype == np.float32
    # recursive summation bound (Higham, Accuracy and Stability of Numerical Algorithms,
    # 2nd ed., eq. 4.4): |error| <= (m - 1) u sum |terms| + rounding of the stored sum;
    # sum |x - offset| is bounded by m * max |x - offset|
    u, m = 2.0**-24, BLOCK32_MAX_VOLUMES
    dev = np.abs(stack[:m].astype(np.float64) - offset).max(0)
    for name, scale in (("sum_x", dev), ("sum_xx", dev**2)):
        err = np.abs(getattr(block, name) - getattr(exact, name))
        assert np.all(err <= 2 * m * u * m * scale + 1e-12)
    total = SummaryAccumulator.empty(SHAPE, offset=offset).merge(block)
    for a, b in zip(total.finalize(), exact.finalize(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-5)
    with pytest.raises(ConfigError, match=r"float32 block accumulator holds at most 64 "
                                          r"volumes; got 65"):
        block.update(stack[-1])
    with pytest.raises(ConfigError, match=r"dtype = 'int8': expected float32 or float64"):
        SummaryAccumulator.empty(SHAPE, dtype="int8")


@pytest.mark.parametrize("band", [1, 2, 3, 5, 0])
@pytest.mark.parametrize("neighbourhood", [26, 6, 8])
def test_row_bands_change_no_bit(rng: np.random.Generator, band: int, neighbourhood: int
                                 ) -> None:
    """The kernel forms the sums band of rows by band of rows (cache blocking; one band for
    volumes this small unless ``band`` is given): any band size gives the same bits."""
    from pipeline.volumes.motion import shift_volume
    from pipeline.volumes.summary import _MODE
    from pipeline.volumes.summary_kernels import accumulate

    shape = (4, 11, 9)
    vols = rng.integers(100, 4000, (3, *shape)).astype(np.uint16)
    shifts = np.array([(0.3, -1.7, 2.25), (-0.5, 3.0, 0.0), (1.2, -0.01, -7.9)])
    offset = vols[0].astype(np.float32)
    # reference: a registered copy (shift_volume, itself checked against
    # scipy.ndimage.shift(order=1, mode="nearest") in test_volumes_motion.py) added whole
    copied = SummaryAccumulator.empty(shape, neighbourhood=neighbourhood, offset=offset)
    for v, s in zip(vols, shifts, strict=True):
        copied.update(shift_volume(v, s))
    k = np.floor(shifts).astype(np.int64)
    f = (shifts - k).astype(np.float32)
    one_by_one = [np.zeros(shape) for _ in range(4)]
    for i in range(3):
        accumulate(vols[i:i + 1], k[i:i + 1], f[i:i + 1], offset, False, _MODE[neighbourhood],
                   *one_by_one, band)
    together = [np.zeros(shape) for _ in range(4)]
    accumulate(vols, k, f, offset, False, _MODE[neighbourhood], *together, band)
    for i, name in enumerate(("sum_x", "sum_xx", "sum_xn", "sum_nn")):
        np.testing.assert_array_equal(one_by_one[i], getattr(copied, name))
        np.testing.assert_array_equal(together[i], getattr(copied, name))
