"""TIFF discovery, header checks and volume reading (pipeline.volumes.tiffio)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import tifffile

from pipeline.errors import ConfigError, InputError
from pipeline.volumes.tiffio import (
    describe_inputs,
    discover_inputs,
    file_index,
    plane_slots,
    read_volume,
)

T, P, Y, X = 5, 4, 6, 7


def _volumes(rng: np.random.Generator) -> np.ndarray:
    return rng.integers(0, 4000, size=(T, P, Y, X), dtype=np.uint16)


def _write(path: Path, data: np.ndarray, **kw: object) -> Path:
    # minisblack: one page per plane, as microscopes write them
    tifffile.imwrite(path, data, photometric="minisblack", **kw)
    return path


def _per_volume(tmp_path: Path, vols: np.ndarray, *, width: int = 3) -> list[Path]:
    # written in an order that a plain string sort would get wrong (9 before 10)
    return [_write(tmp_path / f"vol_{t:0{width}d}.tif", vols[t]) for t in range(len(vols))]


# ---- layouts ----------------------------------------------------------------------------------
def test_per_volume_round_trip_and_natural_sort(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = rng.integers(0, 4000, size=(12, P, Y, X), dtype=np.uint16)
    files = [_write(tmp_path / f"vol_{t}.tif", vols[t]) for t in range(12)]  # unpadded names
    inp = discover_inputs(sorted(files, key=str), planes_per_volume=P)
    assert inp.shape == (12, P, Y, X)
    assert [Path(f).name for f in inp.files[9:11]] == ["vol_9.tif", "vol_10.tif"]
    for t in (0, 9, 10, 11):
        np.testing.assert_array_equal(read_volume(inp, t), vols[t])


def test_bigtiff_is_read(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    files = [_write(tmp_path / f"v{t:02d}.tif", vols[t], bigtiff=True) for t in range(T)]
    inp = discover_inputs(files, planes_per_volume=P)
    assert inp.bigtiff
    np.testing.assert_array_equal(read_volume(inp, 3), vols[3])


def test_per_plane_layout_one_based_planes(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    files = [_write(tmp_path / f"vol_{t:04d}_plane_{p + 1:02d}.tif", vols[t, p])
             for t in range(T) for p in range(P)]
    inp = discover_inputs(files[::-1], layout="per-plane", planes_per_volume=P)
    assert inp.shape == (T, P, Y, X)
    np.testing.assert_array_equal(read_volume(inp, 2), vols[2])


def test_stack_layout_across_files_with_flyback(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    pages = vols.reshape(T * P, Y, X)  # t-major
    # split mid-volume: a volume straddles the two files
    files = [_write(tmp_path / "stack_1.tif", pages[:9]), _write(tmp_path / "stack_2.tif",
                                                                  pages[9:])]
    inp = discover_inputs(files, layout="stack", planes_per_volume=P, flyback_planes=(3,))
    assert inp.shape == (T, P - 1, Y, X)
    np.testing.assert_array_equal(read_volume(inp, 2), vols[2, :3])


def test_descending_and_alternating_orders(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)  # vols[t, slot] as acquired
    files = _per_volume(tmp_path, vols)
    desc = discover_inputs(files, planes_per_volume=P, plane_order="descending")
    np.testing.assert_array_equal(read_volume(desc, 1), vols[1, ::-1])
    alt = discover_inputs(files, planes_per_volume=P, plane_order="alternating")
    np.testing.assert_array_equal(read_volume(alt, 2), vols[2])        # even: as acquired
    np.testing.assert_array_equal(read_volume(alt, 3), vols[3, ::-1])  # odd: reversed


def test_plane_slots_give_acquisition_order() -> None:
    # bidirectional scan, 5 planes: odd volumes are acquired top-down
    np.testing.assert_array_equal(plane_slots(1, planes_per_volume=5, plane_order="alternating"),
                                  [4, 3, 2, 1, 0])
    np.testing.assert_array_equal(plane_slots(0, planes_per_volume=5, flyback_planes=(0, 4),
                                              plane_order="alternating"), [1, 2, 3])
    np.testing.assert_array_equal(plane_slots(7, planes_per_volume=4, flyback_planes=(0,),
                                              plane_order="descending"), [3, 2, 1])


def test_uint8_input_is_widened(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = rng.integers(0, 255, size=(2, P, Y, X), dtype=np.uint8)
    files = _per_volume(tmp_path, vols)
    out = read_volume(discover_inputs(files, planes_per_volume=P), 1)
    assert out.dtype == np.uint16
    np.testing.assert_array_equal(out, vols[1])


def test_describe_inputs_summary(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    info = describe_inputs(files, planes_per_volume=P, flyback_planes=(0,))
    assert info["shape"] == [T, P - 1, Y, X]
    assert info["n_files"] == T and info["dtype"] == "uint16"
    assert info["bytes"] == sum(f.stat().st_size for f in files)


def test_stack_partial_last_volume_repair(tmp_path: Path, rng: np.random.Generator) -> None:
    pages = _volumes(rng).reshape(T * P, Y, X)[:-1]
    f = _write(tmp_path / "stack.tif", pages)
    inp = discover_inputs([f], layout="stack", planes_per_volume=P, drop_partial_volume=True)
    assert inp.n_volumes == T - 1
    assert "dropped the incomplete last volume" in inp.notes[0]


# ---- errors -----------------------------------------------------------------------------------
def test_missing_index(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    with pytest.raises(InputError, match=r"vol_003\.tif: file index jumps from 1 .* missing "
                                         r"file indices 2\.\.2"):
        discover_inputs(files[:2] + files[3:], planes_per_volume=P)


def test_duplicated_index(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    files = _per_volume(tmp_path, vols)
    dup = _write(tmp_path / "vol_0002_b.tif", vols[2])
    with pytest.raises(InputError, match=r"duplicated file index 2"):
        discover_inputs([*files, dup], planes_per_volume=P, index_regex=r"vol_(\d+)")


def test_name_without_index(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    odd = _write(tmp_path / "extra.tif", _volumes(rng)[0])
    with pytest.raises(InputError, match=r"extra\.tif: file name does not match"):
        discover_inputs([*files, odd], planes_per_volume=P)


def test_other_shape(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    _write(files[3], rng.integers(0, 10, size=(P, Y + 1, X), dtype=np.uint16))
    with pytest.raises(InputError, match=r"vol_003\.tif: page 0 has shape \(7, 7\) uint16; "
                                         r"expected \(6, 7\) uint16"):
        discover_inputs(files, planes_per_volume=P)


def test_other_dtype(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    _write(files[1], rng.random((P, Y, X)).astype(np.float32))
    with pytest.raises(InputError, match=r"vol_001\.tif: page 0 has shape \(6, 7\) float32"):
        discover_inputs(files, planes_per_volume=P)


def test_float_input_rejected(tmp_path: Path, rng: np.random.Generator) -> None:
    f = _write(tmp_path / "v_0.tif", rng.random((P, Y, X)).astype(np.float32))
    with pytest.raises(InputError, match=r"v_0\.tif: page 0 has dtype float32; expected"):
        discover_inputs([f], planes_per_volume=P)


def test_page_of_other_shape_inside_a_file(tmp_path: Path, rng: np.random.Generator) -> None:
    f = tmp_path / "vol_000.tif"
    with tifffile.TiffWriter(f) as w:
        for p in range(P):
            shape = (Y, X) if p != 2 else (Y, X + 2)
            w.write(rng.integers(0, 9, size=shape, dtype=np.uint16), photometric="minisblack")
    with pytest.raises(InputError, match=r"vol_000\.tif: page 2 has shape \(6, 9\)"):
        discover_inputs([f], planes_per_volume=P)


def test_zero_byte_file(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    files[2].write_bytes(b"")
    with pytest.raises(InputError, match=r"vol_002\.tif: the file is empty \(0 bytes\)"):
        discover_inputs(files, planes_per_volume=P)


def test_not_a_tiff(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    files[4].write_bytes(b"this is not an image file at all")
    with pytest.raises(InputError, match=r"vol_004\.tif: not a readable TIFF"):
        discover_inputs(files, planes_per_volume=P)


def test_truncated_file_names_the_page(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    # one write per page: each page's header precedes its pixels, so cutting the end leaves
    # the last header intact and its pixel data short (a copy interrupted mid-file)
    with tifffile.TiffWriter(files[1]) as w:
        for plane in _volumes(rng)[1]:
            w.write(plane, photometric="minisblack", contiguous=False)
    data = files[1].read_bytes()
    files[1].write_bytes(data[: len(data) - 20])
    with pytest.raises(InputError, match=r"vol_001\.tif: page 3 is truncated \(its data ends"):
        discover_inputs(files, planes_per_volume=P)


def test_damaged_header_names_the_page(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    data = files[1].read_bytes()  # contiguous pages: the last bytes are page 3's header,
    files[1].write_bytes(data[: len(data) - 20])  # whose link to a next page is now garbage
    with pytest.raises(InputError, match=r"vol_001\.tif: the header of page 4 \(after page 3\) "
                                         r"cannot be parsed"):
        discover_inputs(files, planes_per_volume=P)


def test_unreadable_page_at_read_time(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    inp = discover_inputs(files, planes_per_volume=P)
    files[0].write_bytes(files[0].read_bytes()[:100])  # damaged after discovery
    with pytest.raises(InputError, match=r"vol_000\.tif: page \d cannot be read"):
        read_volume(inp, 0)


def test_page_count_per_volume(tmp_path: Path, rng: np.random.Generator) -> None:
    files = _per_volume(tmp_path, _volumes(rng))
    _write(files[2], rng.integers(0, 9, size=(P + 1, Y, X), dtype=np.uint16))
    with pytest.raises(InputError, match=r"vol_002\.tif: 5 pages; expected "
                                         r"imaging\.planes_per_volume = 4"):
        discover_inputs(files, planes_per_volume=P)


def test_stack_not_a_multiple(tmp_path: Path, rng: np.random.Generator) -> None:
    f = _write(tmp_path / "stack.tif", _volumes(rng).reshape(T * P, Y, X)[:-3])
    with pytest.raises(InputError, match=r"stack\.tif: the stack holds 17 pages .* not a "
                                         r"multiple of imaging\.planes_per_volume = 4"):
        discover_inputs([f], layout="stack", planes_per_volume=P)


def test_per_plane_missing_plane(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    files = [_write(tmp_path / f"vol_{t:03d}_plane_{p:02d}.tif", vols[t, p])
             for t in range(T) for p in range(P) if (t, p) != (3, 2)]
    with pytest.raises(InputError, match=r"volume 3: plane 2 is missing"):
        discover_inputs(files, layout="per-plane", planes_per_volume=P)


def test_per_plane_needs_single_pages(tmp_path: Path, rng: np.random.Generator) -> None:
    vols = _volumes(rng)
    files = [_write(tmp_path / f"vol_{t:03d}_plane_{p:02d}.tif", vols[t, p])
             for t in range(2) for p in range(P)]
    _write(files[0], vols[0, :2])
    with pytest.raises(InputError, match=r"vol_000_plane_00\.tif: 2 pages; expected one page"):
        discover_inputs(files, layout="per-plane", planes_per_volume=P)


def test_no_files() -> None:
    with pytest.raises(InputError, match="no raw TIFF files"):
        discover_inputs([], planes_per_volume=P)


def test_config_errors() -> None:
    with pytest.raises(ConfigError, match=r"imaging\.layout = 'movie'"):
        discover_inputs(["a.tif"], layout="movie", planes_per_volume=P)
    with pytest.raises(ConfigError, match=r"imaging\.plane_order = 'random'"):
        plane_slots(0, planes_per_volume=4, plane_order="random")
    with pytest.raises(ConfigError, match=r"imaging\.flyback_planes = \[4\]: slots must lie"):
        plane_slots(0, planes_per_volume=4, flyback_planes=(4,))
    with pytest.raises(ConfigError, match=r"must be symmetric"):
        plane_slots(0, planes_per_volume=4, flyback_planes=(3,), plane_order="alternating")


def test_file_index_regexes() -> None:
    assert file_index("/data/run2/img_000123.tif", r"(\d+)(?!.*\d)") == 123
    assert file_index("vol_0042_plane_07.tif", r"(\d+)(?!.*\d)", remove=r"plane_?(\d+)") == 42


# ---- the ingest stage -------------------------------------------------------------------------
def _settings(tmp_path: Path, extra: str = "") -> object:
    from pipeline.config import load_config

    cfg = tmp_path / "forkmap.toml"
    cfg.write_text(f"""
[session]
output = "out"
[imaging]
raw = "raw/*.tif"
voxel_size_um = [5.0, 1.0, 1.0]
volume_rate_hz = 2.0
planes_per_volume = {P}
chunk_planes = 2
{extra}
[compute]
workers = 1
""", encoding="utf-8")
    return load_config(cfg)


def test_ingest_stage_writes_and_resumes(tmp_path: Path, rng: np.random.Generator) -> None:
    from pipeline.compute import Compute
    from pipeline.config import section_hash
    from pipeline.store import Store
    from pipeline.volumes.ingest import run_ingest

    vols = rng.integers(0, 4000, size=(11, P, Y, X), dtype=np.uint16)
    (tmp_path / "raw").mkdir()
    for t in range(11):
        _write(tmp_path / "raw" / f"vol_{t:03d}.tif", vols[t])
    settings = _settings(tmp_path, 'plane_order = "alternating"')
    store = Store(settings.session.output)
    h = section_hash(settings, ("imaging",))
    with Compute(settings.compute, quiet=True) as compute:
        run_ingest(settings, store.stage_store("ingest", h, resumable=True), compute)
        staged = tmp_path / "out" / ".staging" / "ingest"
        # simulate a run killed after blocks 0-7 were written: block 8-11 has no marker and
        # block 0-8 holds data that a resumed run must not read again
        (staged / "done" / "8-11").unlink()
        arr = __import__("zarr").open_array(str(staged / "volumes.ome.zarr" / "0"), mode="r+")
        arr[0] = 0
        arr[9] = 0
        sub = store.stage_store("ingest", h, resumable=True)
        run_ingest(settings, sub, compute)
        assert sub.record_extras()["info"]["resumed_volumes"] == 8
        sub.commit()
    out = store.volumes()
    assert out.shape == (11, P, Y, X) and out.chunks == (1, 2, Y, X)
    np.testing.assert_array_equal(out[9], vols[9, ::-1])   # rewritten; odd volume reversed
    np.testing.assert_array_equal(out[0], 0)                # skipped: the marker said done
    np.testing.assert_array_equal(out[4], vols[4])
    slots = store.read_array("ingest/plane_slot")[...]
    np.testing.assert_array_equal(slots[1], [3, 2, 1, 0])
