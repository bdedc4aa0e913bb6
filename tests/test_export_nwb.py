"""NWB export: round trip through pynwb and a clean bill from nwbinspector."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import zarr
from test_report_synthetic import TRUTH, build_synthetic_store

from pipeline.config import parse_config
from pipeline.errors import StoreError
from pipeline.export import export_nwb, voxel_masks
from pipeline.store import Store

pynwb = pytest.importorskip("pynwb")


def _settings(root: Path):
    table = {"session": {"output": str(root), "name": "synthetic", "subject": "larva-1",
                         "subject_age": "P6D", "subject_sex": "U"},
             "imaging": {"raw": "raw/*.tif", "voxel_size_um": list(TRUTH["voxel_um"]),
                         "volume_rate_hz": TRUTH["rate_hz"], "planes_per_volume": 3}}
    return parse_config(table, base_dir=root.parent, check_files=False)


@pytest.fixture
def exported(tmp_path, rng):
    store = build_synthetic_store(tmp_path / "out", rng)
    return store, export_nwb(_settings(store.root), store)


def test_voxel_masks_match_argwhere(rng):
    labels = rng.integers(0, 4, size=(3, 5, 6)).astype(np.int32)
    ids, masks, ends = voxel_masks(labels)
    np.testing.assert_array_equal(ids, [1, 2, 3])
    start = 0
    for cid, end in zip(ids, ends, strict=True):
        # reference: numpy.argwhere gives (z, y, x); NWB voxel masks are (x, y, z, weight)
        expected = np.argwhere(labels == cid)[:, ::-1]
        got = masks[start:end, :3].astype(int)
        np.testing.assert_array_equal(got[np.lexsort(got.T[::-1])],
                                      expected[np.lexsort(expected.T[::-1])])
        start = int(end)
    assert np.all(masks[:, 3] == 1.0)


def test_round_trip_values_shapes_units(exported):
    store, path = exported
    assert path == store.root / "session.nwb"
    assert not list(store.root.glob(".session*"))  # the temp file was moved into place
    n_c, n_t = TRUTH["n_cells"], TRUTH["n_t"]
    with pynwb.NWBHDF5IO(str(path), "r") as io:
        nwb = io.read()
        ophys = nwb.processing["ophys"]
        dff = ophys["DfOverF"]["dff"]
        want = zarr.open_array(store.array_path("traces/dff"), mode="r")[:]
        np.testing.assert_array_equal(dff.data[:], want.T)  # NWB is (t, rois)
        assert dff.rate == pytest.approx(TRUTH["rate_hz"]) and dff.starting_time == 0.0
        raw = ophys["Fluorescence"]["raw"]
        assert raw.unit == "a.u." and raw.data.shape == (n_t, n_c)
        ev = ophys["Deconvolved"]["events"]
        np.testing.assert_array_equal(
            ev.data[:], zarr.open_array(store.array_path("traces/events"), mode="r")[:].T)
        den = ophys["DfOverF"]["denoised_dff"]
        np.testing.assert_array_equal(
            den.data[:], zarr.open_array(store.array_path("traces/denoised"), mode="r")[:].T)
        # the label image rebuilt from the voxel masks equals the stored one
        ps = ophys["ImageSegmentation"]["cells"]
        rebuilt = np.zeros(TRUTH["shape_zyx"], np.int32)
        for i, cid in enumerate(ps.id[:]):
            for x, y, z, _w in ps["voxel_mask"][i]:
                rebuilt[int(z), int(y), int(x)] = cid
        np.testing.assert_array_equal(rebuilt, store.labels()[:])
        plane = nwb.imaging_planes["imaging_volume"]
        np.testing.assert_allclose(plane.grid_spacing[:], TRUTH["voxel_um"][::-1])
        assert plane.grid_spacing_unit == "micrometers" and plane.excitation_lambda == 488.0
        vol = nwb.acquisition["volumes"]
        assert vol.format == "external" and list(vol.external_file[:]) == ["volumes.ome.zarr"]
        nz, ny, nx = TRUTH["shape_zyx"]
        assert list(vol.dimension[:]) == [nx, ny, nz]
        offsets = ophys["plane_time_offsets"].data[:]
        np.testing.assert_allclose(offsets[0], np.arange(nz) / (TRUTH["rate_hz"] * nz))
        # behaviour: planted rig clock t_rig = 1.5 + (1 + 40e-6) t_scope, t_scope from 0
        beh = nwb.processing["behavior"]
        animal = beh["Position"]["animal"]
        assert animal.starting_time == pytest.approx(0.0, abs=1e-9)
        assert animal.rate == pytest.approx(TRUTH["rig_rate_hz"], rel=1e-9)
        assert animal.unit == "meters" and animal.conversion == 1e-3
        x_mm = store.read_table("behaviour.parquet")["x_mm"].to_numpy()
        np.testing.assert_allclose(animal.data[:, 0] * animal.conversion, x_mm * 1e-3)
        assert set(beh["Position"].spatial_series) == {"animal", "target_t0", "target_t1"}
        assert beh["CompassDirection"]["heading"].unit == "radians"
        bouts = beh["turn_bouts"].to_dataframe()
        t_scope = np.arange(0, n_t / TRUTH["rate_hz"], 1 / TRUTH["rig_rate_hz"])
        np.testing.assert_allclose(bouts["start_time"], t_scope[[20, 200]], atol=1e-9)
        trials = nwb.trials.to_dataframe()
        np.testing.assert_allclose(trials["split_time"], t_scope[[100, 330]], atol=1e-9)
        assert list(trials["chosen_target"]) == ["t0", "t1"]
        assert nwb.subject.age == "P6D" and nwb.subject.species == "Danio rerio"


def test_inspector_finds_no_critical_or_error(exported):
    from nwbinspector import Importance, inspect_nwbfile

    _store, path = exported
    msgs = [m for m in inspect_nwbfile(nwbfile_path=str(path)) if m is not None]
    bad = [f"{m.importance.name} {m.check_function_name}: {m.message}" for m in msgs
           if m.importance in (Importance.ERROR, Importance.PYNWB_VALIDATION,
                               Importance.CRITICAL, Importance.BEST_PRACTICE_VIOLATION)]
    assert bad == []


def test_embedded_volumes_are_in_nwb_axis_order(tmp_path, rng):
    store = build_synthetic_store(tmp_path / "out", rng, skip=("decode", "tuning"))
    path = export_nwb(_settings(store.root), store, embed_volumes=True)
    with pynwb.NWBHDF5IO(str(path), "r") as io:
        vol = io.read().acquisition["volumes"]
        # NWB ImageSeries axes are (t, x, y, z); the store is (t, z, y, x)
        np.testing.assert_array_equal(vol.data[:], np.transpose(store.volumes()[:],
                                                                (0, 3, 2, 1)))


def test_partial_store_exports_what_exists(tmp_path, rng):
    store = build_synthetic_store(tmp_path / "out", rng,
                                  skip=("traces", "behaviour", "align", "decode", "tuning"))
    path = export_nwb(_settings(store.root), store)
    with pynwb.NWBHDF5IO(str(path), "r") as io:
        nwb = io.read()
        assert "behavior" not in nwb.processing and nwb.trials is None
        assert "DfOverF" not in nwb.processing["ophys"].data_interfaces


def test_errors(tmp_path, rng):
    empty = Store(tmp_path / "empty")
    with pytest.raises(StoreError, match="no stage has run"):
        export_nwb(_settings(empty.root), empty)
    store = build_synthetic_store(tmp_path / "out", rng, skip=("decode", "tuning"))
    arr = zarr.open_array(store.array_path("traces/dff"), mode="r")
    zarr.create_array(store.array_path("traces/dff"), data=arr[:-1], overwrite=True)
    with pytest.raises(StoreError, match=r"traces/dff: 4 traces but 5 cells"):
        export_nwb(_settings(store.root), store)
    assert not (store.root / "session.nwb").exists()
