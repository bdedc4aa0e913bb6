"""Neuropil correction, exact running percentile, dF/F, and shifted sampling of volumes."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage as ndi

from pipeline.errors import ConfigError, InputError
from pipeline.volumes.sampling import build_weights, sample_volume
from pipeline.volumes.traces import (
    delta_f_over_f,
    running_percentile,
    running_percentile_masked,
    subtract_neuropil,
    window_samples,
)


@pytest.mark.parametrize("mode", ["reflect", "mirror", "nearest", "wrap"])
@pytest.mark.parametrize(("percentile", "window"), [(8.0, 15), (20.0, 16), (50.0, 7), (100.0, 5),
                                                    (0.0, 9), (33.3, 1)])
def test_running_percentile_equals_scipy(rng, mode, percentile, window):
    x = rng.normal(size=(5, 80))
    x[:, 10:20] = 1.5  # ties
    ours = running_percentile(x, percentile, window, mode=mode)
    # reference: scipy.ndimage.percentile_filter with the same window and edge mode
    ref = ndi.percentile_filter(x, percentile, size=(1, window), mode=mode)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)


def test_running_percentile_1d_and_errors(rng):
    x = rng.normal(size=50)
    # reference: scipy.ndimage.percentile_filter on a 1-d signal
    np.testing.assert_allclose(running_percentile(x, 20, 11), ndi.percentile_filter(x, 20, 11))
    with pytest.raises(ConfigError, match="baseline_percentile"):
        running_percentile(x, 120, 11)
    with pytest.raises(ConfigError, match="baseline_window"):
        running_percentile(x, 20, 0)
    with pytest.raises(ConfigError, match="mode"):
        running_percentile(x, 20, 5, mode="constant")
    x[7] = np.nan
    with pytest.raises(InputError, match="trace 0 has a non-finite value at sample 7"):
        running_percentile(x, 20, 5)


@pytest.mark.parametrize("mode", ["reflect", "mirror", "nearest", "wrap"])
@pytest.mark.parametrize(("percentile", "window"), [(20.0, 15), (50.0, 8), (0.0, 5), (100.0, 9)])
def test_running_percentile_masked_equals_generic_filter(rng, mode, percentile, window):
    x = rng.normal(size=(4, 90))
    x[:, 10:18] = 0.5  # ties
    x[rng.random(x.shape) < 0.3] = np.nan  # samples left out
    x[1, 40:60] = np.nan  # a window with no sample at all

    def rank(values):  # scipy.ndimage.percentile_filter's rank rule on the samples present
        v = np.sort(values[np.isfinite(values)])
        if v.size < 2:
            return np.nan
        return v[min(v.size - 1, int(v.size * percentile / 100.0))]

    ours = running_percentile_masked(x, percentile, window, min_count=2, mode=mode)
    # reference: scipy.ndimage.generic_filter (its window placement and edge extension)
    ref = np.stack([ndi.generic_filter(row, rank, size=window, mode=mode) for row in x])
    np.testing.assert_array_equal(np.isnan(ours), np.isnan(ref))
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)
    full = rng.normal(size=(3, 60))
    # without NaN it is scipy.ndimage.percentile_filter
    np.testing.assert_allclose(running_percentile_masked(full, 20.0, 11, mode=mode),
                               ndi.percentile_filter(full, 20.0, size=(1, 11), mode=mode))
    with pytest.raises(InputError, match="trace 0 is infinite at sample 3"):
        running_percentile_masked(np.array([[0.0, 1.0, 2.0, np.inf]]), 20.0, 3)


def test_dff_baseline_leaves_sustained_activity_out(rng):
    # a cell active (dF/F 0.8) for 85 % of every 60 s window: a plain running 20th
    # percentile sits inside the activity; leaving out the samples 2 sigma above a first
    # baseline brings F0 back to rest (the planted F0 = 100, noise sd 3)
    rate_hz, n_t = 2.0, 1200
    active = np.ones(n_t, bool)
    for start in range(0, n_t, 120):
        active[start: start + 18] = False  # 9 s of rest per minute
    f = 100.0 * (1.0 + 0.8 * active) + rng.normal(0.0, 3.0, n_t)
    _, f0_plain = delta_f_over_f(f[None], rate_hz=rate_hz, exclude_sigma=0.0)
    dff, f0 = delta_f_over_f(f[None], rate_hz=rate_hz, exclude_sigma=2.0)
    inner = slice(120, n_t - 120)
    assert np.median(f0_plain[0, inner]) > 150.0  # the plain baseline is lifted
    assert abs(np.median(f0[0, inner]) - 100.0) < 3.0
    assert abs(np.median(dff[0, inner][active[inner]]) - 0.8) < 0.05
    # pure noise with slow drift: ~16 % of the samples lie 2 sigma above a 20th percentile
    # (1.16 sigma above the mean), so the baseline drops a little, to about the 16th
    # percentile of the noise (measured median -0.17 sigma on 3 seeds), and still follows
    # the drift
    g = 100.0 + 5.0 * np.sin(np.arange(n_t) / 60.0) + rng.normal(0.0, 3.0, (20, n_t))
    plain = delta_f_over_f(g, rate_hz=rate_hz, exclude_sigma=0.0)[1]
    masked = delta_f_over_f(g, rate_hz=rate_hz)[1]
    shift = (masked - plain) / 3.0
    assert -0.3 < np.median(shift) < -0.05 and np.percentile(np.abs(shift), 99) < 0.8
    with pytest.raises(ConfigError, match="baseline_exclude_sigma"):
        delta_f_over_f(g, rate_hz=rate_hz, exclude_sigma=-1.0)


def test_neuropil_and_dff_recover_planted_transient(rng):
    rate_hz, n_t = 5.0, 1500
    # slow drift; a 20th-percentile baseline of a ramp lags by 0.3 window (0.45 counts here)
    f0_true = 200.0 + 0.005 * np.arange(n_t)
    transient = np.zeros(n_t)
    transient[700:720] = 1.0  # dF/F = 1 for 4 s
    neuropil = 50.0 + 5.0 * np.sin(np.arange(n_t) / 40.0)
    cell = f0_true * (1.0 + transient) + 0.7 * neuropil
    corrected = subtract_neuropil(cell[None], neuropil[None], ratio=0.7)
    np.testing.assert_allclose(corrected[0], f0_true * (1.0 + transient), rtol=1e-5)
    dff, f0 = delta_f_over_f(corrected, rate_hz=rate_hz, window_s=60.0, percentile=20.0)
    assert dff.dtype == np.float32 and dff.shape == (1, n_t)
    np.testing.assert_allclose(f0[0], f0_true, rtol=0.01)
    np.testing.assert_allclose(dff[0, 700:720], 1.0, atol=0.02)
    assert np.abs(dff[0, :690]).max() < 0.02


def test_dff_guards_small_baseline():
    f = np.zeros((1, 200))
    f[0, 100] = 5.0
    dff, _ = delta_f_over_f(f, rate_hz=1.0, window_s=21.0, f0_floor=1.0)
    assert np.isfinite(dff).all() and np.isclose(dff.max(), 5.0)
    with pytest.raises(ConfigError, match="traces.f0_floor"):
        delta_f_over_f(f, rate_hz=1.0, f0_floor=0.0)
    with pytest.raises(ConfigError, match="baseline_window_s"):
        window_samples(-1.0, 5.0)
    assert window_samples(60.0, 2.0) == 121 and window_samples(1.0, 1.0) == 1


def test_neuropil_errors():
    with pytest.raises(ConfigError, match="traces.neuropil_ratio"):
        subtract_neuropil(np.ones((2, 3)), np.ones((2, 3)), ratio=-0.1)
    with pytest.raises(InputError, match="cell traces have shape"):
        subtract_neuropil(np.ones((2, 3)), np.ones((2, 4)))


VOXEL_UM = (2.0, 1.0, 1.0)


def _labels():
    lab = np.zeros((8, 40, 40), dtype=np.int32)
    zz, yy, xx = np.indices(lab.shape)
    for i, (z, y, x) in enumerate([(3, 10, 10), (4, 25, 28), (2, 30, 8), (5, 12, 30)], start=1):
        inside = ((zz - z) * 2.0) ** 2 + (yy - y) ** 2 + (xx - x) ** 2 <= 9.0
        lab[inside] = i
    return lab


def test_weights_cells_and_rings():
    lab = _labels()
    w = build_weights(lab, voxel_size_um=VOXEL_UM, ring_inner_um=1.0, ring_outer_um=5.0,
                      cell_margin_um=1.0, max_ring_voxels=10_000)
    assert w.cell.shape[0] == 4 and w.neuropil.shape[0] == 4
    np.testing.assert_allclose(np.asarray(w.cell.sum(axis=1)).ravel(), 1.0)
    np.testing.assert_allclose(np.asarray(w.neuropil.sum(axis=1)).ravel(), 1.0)
    flat = np.ravel_multi_index(tuple(w.coords), lab.shape)
    dist_um = ndi.distance_transform_edt(lab == 0, sampling=VOXEL_UM).ravel()
    for i in range(4):
        cols = w.neuropil[i].indices
        assert (lab.ravel()[flat[cols]] == 0).all()  # no cell voxels in a ring
        assert (dist_um[flat[cols]] > 1.0).all()  # and nothing within the margin
        cell_cols = w.cell[i].indices
        assert (lab.ravel()[flat[cell_cols]] == i + 1).all()
        assert cell_cols.size == (lab == i + 1).sum()
    capped = build_weights(lab, voxel_size_um=VOXEL_UM, max_ring_voxels=20)
    assert capped.ring_count.max() == 20


@pytest.mark.parametrize("shift", [(0.0, 0.0, 0.0), (0.3, -1.7, 2.25), (-1.0, 3.0, 0.5),
                                   (0.6, 38.5, -2.2)])
def test_sample_volume_equals_masks_on_registered_copy(rng, shift):
    lab = _labels()
    w = build_weights(lab, voxel_size_um=VOXEL_UM)
    reference = rng.uniform(100, 1000, lab.shape)
    # volume_t(r) = reference(r - shift): build it with scipy.ndimage.shift
    volume = ndi.shift(reference, shift, order=1, mode="nearest")
    cell, neuropil = sample_volume(volume.astype(np.float32), shift, w)
    # reference: boolean-mask means on a copy registered by scipy.ndimage.shift(order=1)
    registered = ndi.shift(volume.astype(np.float32), np.negative(shift), order=1,
                           mode="nearest")
    flat = np.ravel_multi_index(tuple(w.coords), lab.shape)
    for i in range(4):
        assert np.isclose(cell[i], registered[lab == i + 1].mean(), rtol=1e-5)
        ring_mask = np.zeros(lab.size, bool)
        ring_mask[flat[w.neuropil[i].indices]] = True
        assert np.isclose(neuropil[i], registered.ravel()[ring_mask].mean(), rtol=1e-5)
    if shift[1] < 10:  # away from the border the registration undoes the planted shift
        assert np.isclose(cell[0], reference[lab == 1].mean(), rtol=0.05)


def test_sampling_errors():
    lab = _labels()
    w = build_weights(lab, voxel_size_um=VOXEL_UM)
    with pytest.raises(InputError, match="differs from the label volume shape"):
        sample_volume(np.zeros((2, 2, 2)), (0, 0, 0), w)
    with pytest.raises(InputError, match="finite"):
        sample_volume(np.zeros(lab.shape), (0, np.nan, 0), w)
    with pytest.raises(InputError, match="3-d integer volume"):
        build_weights(lab.astype(float), voxel_size_um=VOXEL_UM)
    with pytest.raises(ConfigError, match="ring_inner_um"):
        build_weights(lab, voxel_size_um=VOXEL_UM, ring_inner_um=5.0, ring_outer_um=2.0)


def test_stages_cells_and_traces_match_kernels(rng, tmp_path):
    """The two stage functions against the kernels run eagerly on a tiny session."""
    from types import SimpleNamespace

    import zarr

    from pipeline.compute import Compute
    from pipeline.config import CellsSettings, ComputeSettings, TracesSettings
    from pipeline.store import Store
    from pipeline.volumes.cells import detect_cells, run_cells
    from pipeline.volumes.oasis import ar1_gamma, deconvolve_many, denoise_many
    from pipeline.volumes.traces import run_traces

    vs = (2.0, 1.0, 1.0)
    lab_true = _labels()
    reference = 100.0 + 400.0 * (lab_true > 0) + rng.normal(0, 5, lab_true.shape)
    n_t = 40
    shifts = np.column_stack([np.zeros(n_t), rng.uniform(-1, 1, n_t), rng.uniform(-1, 1, n_t)])
    gain = 1.0 + 0.5 * (np.arange(n_t) % 10 == 3)
    vols = np.stack([ndi.shift(reference * g, s, order=1, mode="nearest")
                     for g, s in zip(gain, shifts, strict=True)]).astype(np.uint16)
    base = Store(tmp_path / "out")
    setup = base.stage_store("motion", "h", resumable=False)
    arr = setup.create_volumes(shape=vols.shape, chunks=(1, *vols.shape[1:]), voxel_size_um=vs,
                               interval_s=0.5)
    arr[...] = vols
    setup.write_array("motion/shifts_vox", shifts)
    setup.write_array("motion/mean", reference.astype(np.float32))
    setup.commit()
    settings = SimpleNamespace(
        imaging=SimpleNamespace(voxel_size_um=vs, volume_rate_hz=2.0, decay_s=1.5),
        cells=CellsSettings(use_local_correlation=False),
        traces=TracesSettings(block_volumes=16, block_cells=3, baseline_window_s=5.0),
    )
    with Compute(ComputeSettings(workers=2), quiet=True) as compute:
        st = base.stage_store("cells", "h", resumable=False)
        run_cells(settings, st, compute)
        st.commit()
        st = base.stage_store("traces", "h", resumable=True)
        run_traces(settings, st, compute)
        st.commit()
    det = detect_cells(reference, voxel_size_um=vs)
    np.testing.assert_array_equal(np.asarray(base.labels()[...]), det.labels)
    assert len(base.read_table("cells.parquet")) == 4
    group = zarr.open_group(str(tmp_path / "out/volumes.ome.zarr/labels/cells"), mode="r")
    assert group.attrs["ome"]["version"] == "0.5" and "image-label" in group.attrs["ome"]
    w = build_weights(det.labels, voxel_size_um=vs,
                      centroids_vox=base.read_table("cells.parquet")[["z_vox", "y_vox",
                                                                      "x_vox"]].to_numpy())
    raw = np.stack([sample_volume(v, s, w)[0] for v, s in zip(vols, shifts, strict=True)], 1)
    np.testing.assert_allclose(base.read_array("traces/raw")[...], raw, rtol=1e-6)
    dff = np.asarray(base.read_array("traces/dff")[...])
    neu = np.asarray(base.read_array("traces/neuropil")[...])
    corrected = raw - 0.7 * neu
    np.testing.assert_allclose(base.read_array("traces/corrected")[...], corrected, rtol=1e-5)
    ref_dff, _ = delta_f_over_f(corrected, rate_hz=2.0, window_s=5.0, percentile=20.0)
    np.testing.assert_allclose(dff, ref_dff, rtol=1e-5, atol=1e-6)
    # traces.decay_s unset: the AR(1) decay is the indicator's (imaging.decay_s = 1.5 here)
    _, ev, _ = deconvolve_many(ref_dff, gamma=ar1_gamma(1.5, 2.0))
    np.testing.assert_allclose(base.read_array("traces/events")[...], ev, rtol=1e-4, atol=1e-5)
    den, _, _ = denoise_many(ref_dff, gamma=ar1_gamma(1.5, 2.0))
    np.testing.assert_allclose(base.read_array("traces/denoised")[...], den, rtol=1e-4,
                               atol=1e-5)
    assert base.read_array("traces/denoised").attrs["unit"] == "dF/F"
    assert base.read_array("traces/dff").chunks == (3, n_t)
    # the planted gain steps are events in every cell
    assert (np.asarray(base.read_array("traces/events")[...])[:, 3::10] > 0.1).all()
