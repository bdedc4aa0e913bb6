"""Rigid motion kernels (pipeline.volumes.motion): planted shifts recovered."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.fft as sfft
import scipy.ndimage as ndi
from scipy.stats import median_abs_deviation
from skimage.registration import phase_cross_correlation

from pipeline.errors import ConfigError
from pipeline.volumes.motion import (
    build_reference,
    prepare_reference,
    register_volume,
    shift_volume,
)
from pipeline.volumes.motion_flags import flag_motion, robust_zscore

SHAPE = (16, 48, 48)


def _blobs(rng: np.random.Generator, shape: tuple[int, ...] = SHAPE, n: int = 150) -> np.ndarray:
    """Nucleus-like blobs on a background, as a whole-brain volume looks at low resolution."""
    v = np.zeros(shape, np.float64)
    v[tuple(rng.integers(0, s, n) for s in shape)] = rng.uniform(500, 1500, n)
    return ndi.gaussian_filter(v, (1.0, 1.5, 1.5)) * 20 + 100


def _fourier_shifted(vol: np.ndarray, shift: np.ndarray) -> np.ndarray:
    return sfft.ifftn(ndi.fourier_shift(sfft.fftn(vol), shift)).real


def _moved_crop(big: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """Content moved by ``shift`` and seen through a fixed field of view (not circular)."""
    moved = ndi.shift(big, shift, order=3, mode="nearest")
    return moved[4:-4, 8:-8, 8:-8]


def test_fourier_shift_recovered(rng: np.random.Generator) -> None:
    ref = _blobs(rng)
    # circular content: no window needed (a window is for a fixed field of view)
    prep = prepare_reference(ref, tukey_alpha=0.0, highpass_sigma_vox=(0, 4, 4))
    for _ in range(4):
        planted = rng.uniform(-3, 3, 3)
        est, quality = register_volume(_fourier_shifted(ref, planted), prep, upsample=20)
        # reference: scipy.ndimage.fourier_shift planted the shift
        np.testing.assert_allclose(est, planted, atol=0.05)
        assert quality > 0.95


def test_matches_skimage_phase_cross_correlation(rng: np.random.Generator) -> None:
    ref = _blobs(rng)
    prep = prepare_reference(ref, tukey_alpha=0.0, highpass_sigma_vox=0.0,
                             lowpass_sigma_vox=0.0, normalization="phase")
    for _ in range(3):
        moving = _fourier_shifted(ref, rng.uniform(-4, 4, 3)) + rng.normal(0, 1, SHAPE)
        ours, _ = register_volume(moving, prep, upsample=20)
        theirs, _, _ = phase_cross_correlation(ref, moving, upsample_factor=20)
        # reference: skimage.registration.phase_cross_correlation returns -shift (its shift
        # moves the moving image onto the reference); both on a 1/20 voxel grid
        np.testing.assert_allclose(ours, -theirs, atol=0.06)


def test_field_of_view_shift_with_window_and_binning(rng: np.random.Generator) -> None:
    big = _blobs(rng, (24, 64, 64), n=300)
    ref = _moved_crop(big, np.zeros(3))
    for bin_yx in (1, 2):
        prep = prepare_reference(ref, bin_yx=bin_yx, highpass_sigma_vox=(0, 4, 4))
        for _ in range(3):
            planted = rng.uniform(-2.5, 2.5, 3)
            est, _ = register_volume(_moved_crop(big, planted), prep, upsample=20)
            # reference: scipy.ndimage.shift (cubic spline) planted the shift; tolerance 0.1
            # voxel because the edges bring new content into the field of view
            np.testing.assert_allclose(est, planted, atol=0.1)


def test_recentre_removes_window_bias(rng: np.random.Generator) -> None:
    big = _blobs(rng, (24, 64, 64), n=300)
    ref = _moved_crop(big, np.zeros(3))
    prep = prepare_reference(ref, highpass_sigma_vox=(0, 4, 4))
    planted = np.array([2.4, -3.3, 2.7])
    moving = _moved_crop(big, planted)
    once, _ = register_volume(moving, prep, recentre=0)
    twice, _ = register_volume(moving, prep, recentre=1)
    assert np.abs(twice - planted).max() < np.abs(once - planted).max()
    # 0.12 voxel: with the window placed at the true shift the estimate is still ~0.05 voxel
    # off here (content entering the field of view), plus the 1/20 voxel grid
    np.testing.assert_allclose(twice, planted, atol=0.12)


def test_quality_separates_match_from_noise(rng: np.random.Generator) -> None:
    ref = _blobs(rng)
    prep = prepare_reference(ref)
    _, q_same = register_volume(ref, prep)
    _, q_noise = register_volume(rng.normal(100, 10, SHAPE), prep)
    assert q_same > 0.99
    assert 0.0 <= q_noise < 0.5


def test_max_shift_limits_the_search(rng: np.random.Generator) -> None:
    ref = _blobs(rng)
    moving = _fourier_shifted(ref, np.array([0.0, 6.0, 0.0]))
    free, _ = register_volume(moving, prepare_reference(ref, tukey_alpha=0.0))
    capped, _ = register_volume(moving, prepare_reference(ref, tukey_alpha=0.0,
                                                          max_shift_vox=(2, 3, 3)))
    assert abs(free[1] - 6.0) < 0.05
    assert abs(capped[1]) <= 3.0 + 0.75


def test_shift_volume_registers(rng: np.random.Generator) -> None:
    ref = _blobs(rng, (15, 47, 47))  # odd sizes: no Nyquist bin, the Fourier shift inverts
    planted = np.array([0.6, -1.3, 2.2])
    moving = _fourier_shifted(ref, planted)
    back = shift_volume(moving, planted, method="fourier")
    np.testing.assert_allclose(back, ref, atol=1e-3 * ref.max())
    lin = shift_volume(moving, planted, method="linear")
    # reference: scipy.ndimage.shift with the opposite sign is the same interpolation
    np.testing.assert_allclose(lin, ndi.shift(moving.astype(np.float32), -planted, order=1,
                                              mode="nearest"), rtol=1e-5)
    inner = (slice(2, -2), slice(4, -4), slice(4, -4))
    err = np.abs(lin[inner] - ref[inner]).mean()
    assert err < 0.1 * ref[inner].std()  # order-1 interpolation blurs sharp blobs a little


def test_build_reference_refines_the_mean(rng: np.random.Generator) -> None:
    truth = _blobs(rng)
    planted = rng.uniform(-1.5, 1.5, (8, 3))
    block = [_fourier_shifted(truth, s) + rng.normal(0, 5, SHAPE) for s in planted]
    plain = np.mean(block, axis=0)
    ref, shifts = build_reference(block, tukey_alpha=0.0, highpass_sigma_vox=(0, 4, 4))
    # the reference sits at the block's mean position; it is sharper than the plain mean
    centred = _fourier_shifted(truth, planted.mean(0))
    err_plain = np.abs(plain - centred).mean()
    err_ref = np.abs(ref - centred).mean()
    assert err_ref < 0.5 * err_plain
    # shifts are relative to the first mean (centred on the block's mean position)
    np.testing.assert_allclose(shifts - shifts.mean(0), planted - planted.mean(0), atol=0.1)


def test_robust_zscore_uses_normal_mad(rng: np.random.Generator) -> None:
    x = rng.normal(3.0, 2.0, 501)
    z = robust_zscore(x)
    # reference: scipy.stats.median_abs_deviation(scale="normal") (1.4826 * MAD)
    expected = (x - np.median(x)) / median_abs_deviation(x, scale="normal")
    np.testing.assert_allclose(z, expected, rtol=1e-4)


def test_flag_motion_planted_events(rng: np.random.Generator) -> None:
    t = 200
    shifts = np.cumsum(rng.normal(0, 0.02, (t, 3)), axis=0)  # slow drift, voxels
    quality = rng.normal(0.9, 0.01, t)
    shifts[50, 1:] += 6.0        # one-volume jerk in y, x
    quality[120] = 0.5           # a volume that matched badly
    shifts[150:160, 0] = 0.8     # the animal sank by most of a plane
    shifts[180, 2] = 60.0        # implausibly far
    flags = flag_motion(shifts, quality, voxel_size_um=(5.0, 0.6, 0.6), max_shift_um=20.0,
                        z_drift_fraction=0.5)
    assert np.flatnonzero(flags.jump).tolist() == [50, 180]
    assert np.flatnonzero(flags.low_quality).tolist() == [120]
    assert np.flatnonzero(flags.z_drift).tolist() == list(range(150, 160))
    assert np.flatnonzero(flags.too_large).tolist() == [180]
    assert flags.as_array().shape == (t, 4)
    assert flags.counts()["z_drift"] == 10


def test_still_session_has_no_flags(rng: np.random.Generator) -> None:
    shifts = rng.normal(0, 0.05, (300, 3))
    quality = rng.normal(0.9, 0.01, 300)
    flags = flag_motion(shifts, quality, voxel_size_um=(5.0, 0.6, 0.6))
    # a 5-MAD rule on Gaussian noise flags essentially nothing (common practice)
    assert flags.any.sum() <= 1


def test_errors(rng: np.random.Generator) -> None:
    ref = _blobs(rng)
    prep = prepare_reference(ref)
    with pytest.raises(ConfigError, match=r"volume has shape \(16, 48, 40\); expected the "
                                          r"reference's shape \(16, 48, 48\)"):
        register_volume(ref[:, :, :40], prep)
    with pytest.raises(ConfigError, match=r"motion\.upsample = 0"):
        register_volume(ref, prep, upsample=0)
    with pytest.raises(ConfigError, match=r"normalization = 'magic'"):
        prepare_reference(ref, normalization="magic")
    with pytest.raises(ConfigError, match=r"motion\.bin_yx = 0"):
        prepare_reference(ref, bin_yx=0)
    with pytest.raises(ConfigError, match=r"margin_vox = \(8, 0, 0\) leaves no voxels"):
        prepare_reference(ref, margin_vox=(8, 0, 0))
    with pytest.raises(ConfigError, match=r"tukey_alpha = 2"):
        prepare_reference(ref, tukey_alpha=2)
    with pytest.raises(ConfigError, match=r"highpass_sigma_vox = -1"):
        prepare_reference(ref, highpass_sigma_vox=-1)
    with pytest.raises(ConfigError, match=r"reference has shape \(48, 48\)"):
        prepare_reference(ref[0])
    with pytest.raises(ConfigError, match=r"method = 'cubic'"):
        shift_volume(ref, (0, 0, 0), method="cubic")
    with pytest.raises(ConfigError, match=r"reference block is empty"):
        build_reference([])
    with pytest.raises(ConfigError, match=r"shifts_vox has shape \(4, 2\)"):
        flag_motion(np.zeros((4, 2)), np.zeros(4), voxel_size_um=(1, 1, 1))


# ---- the motion stage -------------------------------------------------------------------------
def test_motion_stage_matches_kernels(tmp_path: Path, rng: np.random.Generator) -> None:
    from pipeline.compute import Compute
    from pipeline.config import parse_config, section_hash
    from pipeline.store import Store
    from pipeline.volumes.motion_stage import estimation_options, run_motion
    from pipeline.volumes.summary import SummaryAccumulator

    big = _blobs(rng, (24, 64, 64), n=300)
    planted = rng.uniform(-1.5, 1.5, (12, 3))
    planted[:4] *= 0.1  # a quiet reference block
    vols = np.stack([_moved_crop(big, s) for s in planted]).clip(0, 65535).astype(np.uint16)
    settings = parse_config({
        "session": {"output": str(tmp_path / "out")},
        "imaging": {"raw": "x", "voxel_size_um": [5.0, 1.0, 1.0], "volume_rate_hz": 2.0,
                    "planes_per_volume": vols.shape[1]},
        "motion": {"reference_count": 4, "highpass_sigma_um": 4.0, "block_volumes": 3},
        "compute": {"workers": 2},
    }, base_dir=tmp_path, check_files=False)
    store = Store(settings.session.output)
    ing = store.stage_store("ingest", "h", resumable=False)
    ing.create_volumes(shape=vols.shape, chunks=(1, *vols.shape[1:]), voxel_size_um=(5, 1, 1),
                       interval_s=0.5)[...] = vols
    ing.commit()
    sub = store.stage_store("motion", section_hash(settings, ("imaging", "motion")),
                            resumable=False)
    with Compute(settings.compute, quiet=True) as compute:
        run_motion(settings, sub, compute)
    sub.commit()
    shifts = store.read_array("motion/shifts_vox")[...]
    reference = store.read_array("motion/reference")[...]
    # the reference sits at the reference block's mean position
    np.testing.assert_allclose(shifts, planted - planted[:4].mean(0), atol=0.15)
    # the wrapper equals the kernels run eagerly on the same reference
    prep = prepare_reference(reference, **estimation_options(settings))
    acc = SummaryAccumulator.empty(reference.shape, offset=reference)
    for t in (0, 7, 11):
        s, q = register_volume(vols[t], prep, upsample=settings.motion.upsample)
        np.testing.assert_allclose(shifts[t], s, atol=1e-9)
        np.testing.assert_allclose(store.read_array("motion/quality")[t], q, atol=1e-9)
    for t in range(12):
        acc.update(shift_volume(vols[t], shifts[t]))
    mean, corr = acc.finalize()
    np.testing.assert_allclose(store.read_array("motion/mean")[...], mean, rtol=1e-6)
    np.testing.assert_allclose(store.read_array("motion/local_corr")[...], corr, atol=1e-6)
    assert store.read_array("motion/flags").shape == (12, 4)
    np.testing.assert_allclose(store.read_array("motion/shifts_um")[...],
                               shifts * np.array([5.0, 1.0, 1.0]))
    # the stored reference carries the hash of its bytes (the workers' cache key)
    from pipeline.volumes.motion_stage import content_hash
    assert store.read_array("motion/reference").attrs["content_hash"] == content_hash(reference)


def test_reference_cache_is_keyed_on_content(tmp_path: Path, rng: np.random.Generator) -> None:
    import zarr

    from pipeline.volumes.motion_stage import clear_reference_cache, content_hash, load_reference

    ref = _blobs(rng, (6, 32, 32), n=40).astype(np.float32)
    path = str(tmp_path / "ref.zarr")
    arr = zarr.create_array(path, shape=ref.shape, dtype="float32")
    arr[...] = ref
    opts = {"bin_yx": 1}
    # no hash: read and conditioned at every call
    a, pa = load_reference(path, opts)
    b, pb = load_reference(path, opts)
    assert a is not b and pb is not pa
    arr.attrs["content_hash"] = content_hash(ref)
    c, pc = load_reference(path, opts)
    d, pd_ = load_reference(path, opts)
    assert c is d and pc is pd_                      # kept: conditioned once
    assert not c.flags.writeable                     # shared between tasks, so read-only
    with pytest.raises(ValueError):
        c[0, 0, 0] = 1.0
    # same spectrum as a fresh conditioning (the cache changes nothing)
    np.testing.assert_array_equal(pc.spectrum, prepare_reference(ref, **opts).spectrum)
    # a new reference at the same path has a new hash, so it is read again
    ref2 = ref + 1.0
    arr[...] = ref2
    arr.attrs["content_hash"] = content_hash(ref2)
    e, _ = load_reference(path, opts)
    np.testing.assert_array_equal(e, ref2)
    # other options, other conditioning
    _, pf = load_reference(path, {"bin_yx": 2})
    assert pf is not pc and pf.bin_yx == 2
    assert content_hash(ref) != content_hash(ref2) != content_hash(ref2.astype(np.float64))
    clear_reference_cache()
    g, _ = load_reference(path, {"bin_yx": 2})
    assert g is not e


def test_motion_stage_reference_start_beyond_session(tmp_path: Path) -> None:
    from pipeline.compute import Compute
    from pipeline.config import parse_config
    from pipeline.store import Store
    from pipeline.volumes.motion_stage import run_motion

    settings = parse_config({
        "session": {"output": str(tmp_path / "out")},
        "imaging": {"raw": "x", "voxel_size_um": [5.0, 1.0, 1.0], "volume_rate_hz": 2.0,
                    "planes_per_volume": 2},
        "motion": {"reference_start": 5},
    }, base_dir=tmp_path, check_files=False)
    store = Store(settings.session.output)
    ing = store.stage_store("ingest", "h", resumable=False)
    ing.create_volumes(shape=(3, 2, 8, 8), chunks=(1, 2, 8, 8), voxel_size_um=(5, 1, 1),
                       interval_s=0.5)
    ing.commit()
    with Compute(settings.compute, quiet=True) as compute, pytest.raises(
            ConfigError, match=r"motion\.reference_start = 5: the session has only 3 volumes"):
        run_motion(settings, store.stage_store("motion", "h", resumable=False), compute)


@pytest.mark.parametrize("shift", [(0.3, -1.7, 2.25), (0.0, 0.0, 0.0), (-0.5, 3.0, 0.0),
                                   (1.2, -0.01, -7.9), (9.0, 0.5, 0.5)])
def test_linear_shift_matches_scipy(rng: np.random.Generator, shift) -> None:
    v = rng.normal(100.0, 10.0, (5, 12, 14)).astype(np.float32)
    # reference: scipy.ndimage.shift, order 1, edges extended (mode "nearest")
    expected = ndi.shift(v, np.negative(shift), order=1, mode="nearest", prefilter=False)
    got = shift_volume(v, shift)
    assert got.dtype == np.float32 and got is not v
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-3)


def test_first_pass_on_coarser_planes_keeps_the_accuracy(rng: np.random.Generator) -> None:
    big = _blobs(rng, (24, 144, 144), n=2800)
    ref = _moved_crop(big, np.zeros(3))  # 16 x 128 x 128: the first pass runs on 64 x 64
    prep = prepare_reference(ref, highpass_sigma_vox=(0, 4, 4))
    single = prepare_reference(ref, highpass_sigma_vox=(0, 4, 4), first_pass_bin=1)
    assert prep.first is not None and prep.first.shape[1:] == (64, 64)
    assert single.first is None
    for _ in range(3):
        # z within 1.5 of 16 planes: larger z shifts bring new planes into view and pull
        # both estimates (with or without the coarse first pass alike) by > 0.1 voxel
        planted = rng.uniform([-1.5, -3.5, -3.5], [1.5, 3.5, 3.5])
        moving = _moved_crop(big, planted)
        est, _ = register_volume(moving, prep, upsample=20)
        one, _ = register_volume(moving, single, upsample=20)
        # reference: scipy.ndimage.shift (cubic spline) planted the shift; 0.1 voxel as in
        # the field-of-view test above (content entering the field of view)
        np.testing.assert_allclose(est, planted, atol=0.1)
        np.testing.assert_allclose(est, one, atol=0.06)  # same peak, 1/20 voxel grid
    with pytest.raises(ConfigError, match=r"first_pass_bin = 0: expected an integer >= 1"):
        prepare_reference(ref, first_pass_bin=0)


def test_registered_sum_equals_the_sum_of_registered_copies(rng: np.random.Generator) -> None:
    from pipeline.volumes.motion import registered_sum

    big = _blobs(rng, (24, 64, 64), n=300)
    ref = _moved_crop(big, np.zeros(3))
    vols = [_moved_crop(big, s).astype(np.uint16) for s in rng.uniform(-2, 2, (4, 3))]
    vols.append(ref.astype(np.float32))  # a zero shift and a float input
    prep = prepare_reference(ref, highpass_sigma_vox=(0, 4, 4))
    total, shifts, _ = registered_sum(vols, prep)
    copies = np.zeros(ref.shape)
    for v, s in zip(vols, shifts, strict=True):
        copies += shift_volume(v, s)
    # the fused sum makes no registered copy but must add the same float32 values
    np.testing.assert_array_equal(total, copies)
    # and the copy itself is scipy.ndimage.shift (order 1, edges extended) up to rounding
    np.testing.assert_allclose(shift_volume(vols[0], shifts[0]),
                               ndi.shift(vols[0].astype(np.float32), -shifts[0], order=1,
                                         mode="nearest", prefilter=False), rtol=1e-5, atol=0.02)


def test_grid_searches_match_the_full_inverse_fft(rng: np.random.Generator) -> None:
    from pipeline.volumes.motion import _cross_power
    from pipeline.volumes.motion_dft import local_peak, upsampled_peak

    ref = _blobs(rng)
    prep = prepare_reference(ref, tukey_alpha=0.0, highpass_sigma_vox=(0, 4, 4))
    for _ in range(3):
        planted = rng.uniform(-3, 3, 3)
        R = _cross_power(_fourier_shifted(ref, planted).astype(np.float32), prep, None)
        # reference: scipy.fft.irfftn of the cross-power spectrum, searched whole
        c = sfft.irfftn(R, s=prep.shape)
        peak = np.array(np.unravel_index(int(np.argmax(c)), c.shape))
        peak = np.where(peak > np.array(prep.shape) // 2, peak - np.array(prep.shape), peak)
        near = local_peak(R, prep.shape, planted + rng.uniform(-0.5, 0.5, 3), prep.allowed)
        assert near is not None
        np.testing.assert_array_equal(near[0], peak)
        # a centre three voxels off puts the peak on the 5 x 5 x 5 grid's border: no answer
        assert local_peak(R, prep.shape, peak + np.array([0.0, 3.0, 0.0]), prep.allowed) is None
        up = np.array([20.0, 20.0, 20.0])
        whole = upsampled_peak(R, prep.shape, near[0] + near[1], up, 0.3)
        coarse_fine = upsampled_peak(R, prep.shape, near[0] + near[1], up, 0.3, stride=4)
        np.testing.assert_array_equal(coarse_fine[0], whole[0])
        np.testing.assert_allclose(coarse_fine[0], planted, atol=0.05)


def test_compiled_window_equals_the_numpy_expression(rng: np.random.Generator) -> None:
    from pipeline.volumes.motion import _tukey
    from pipeline.volumes.motion_dft import apply_window

    v = rng.uniform(0, 3000, (7, 20, 18)).astype(np.float32)
    for view in (v, v[1:6, 2:19, 3:15]):  # contiguous and a strided crop
        w = [_tukey(n, 0.25, s) for n, s in zip(view.shape, (0.3, 1.7, -2.2), strict=True)]
        # reference: the NumPy broadcast expression, float32 throughout
        expected = ((view - view.mean(dtype=np.float32)) * w[0][:, None, None]
                    * w[1][None, :, None] * w[2][None, None, :])
        np.testing.assert_array_equal(apply_window(view, *w), expected)
