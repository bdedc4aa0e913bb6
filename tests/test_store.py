"""Session store: OME-NGFF metadata checked by an outside validator, and round trips."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import zarr

from pipeline.errors import StoreError
from pipeline.store import Store, VolumeReader, blosc


def _ingest_like(root: Path) -> Store:
    store = Store(root)
    st = store.stage_store("ingest", "h", resumable=False)
    arr = st.create_volumes(shape=(3, 2, 8, 8), chunks=(1, 2, 8, 8),
                            voxel_size_um=(4.0, 1.5, 1.5), interval_s=0.5)
    arr[:] = np.arange(3 * 2 * 64, dtype=np.uint16).reshape(3, 2, 8, 8)
    st.commit()
    st = store.stage_store("cells", "h", resumable=False)
    labels = np.zeros((2, 8, 8), np.int32)
    labels[1, 2:4, 2:4] = 1
    st.create_labels(labels, voxel_size_um=(4.0, 1.5, 1.5))
    st.commit()
    return store


def test_ome_ngff_metadata_validates(tmp_path: Path) -> None:
    # reference: the ome-zarr-models package's OME-NGFF 0.5 validators (outside the project)
    from ome_zarr_models.v05.image import Image
    from ome_zarr_models.v05.image_label import ImageLabel

    store = _ingest_like(tmp_path)
    image = Image.from_zarr(zarr.open_group(str(tmp_path / "volumes.ome.zarr"), mode="r"))
    axes = image.attributes.ome.multiscales[0].axes
    assert [(a.name, a.unit) for a in axes] == [
        ("t", "second"), ("z", "micrometer"), ("y", "micrometer"), ("x", "micrometer")]
    ImageLabel.from_zarr(zarr.open_group(str(tmp_path / "volumes.ome.zarr/labels/cells"),
                                         mode="r"))
    vol = store.volumes()
    assert vol.metadata.dimension_names == ("t", "z", "y", "x")
    assert vol.dtype == np.uint16 and vol.chunks == (1, 2, 8, 8)
    assert store.labels()[1, 2, 2] == 1


def test_array_table_json_round_trip(tmp_path: Path, rng: np.random.Generator) -> None:
    store = Store(tmp_path)
    st = store.stage_store("traces", "h", resumable=False)
    data = rng.normal(size=(7, 50)).astype(np.float32)
    st.write_array("traces/dff", data, chunks=(1, 50), attrs={"unit": "dF/F"},
                   dimension_names=("cell", "t"))
    df = pd.DataFrame({"id": np.arange(3, dtype=np.int64), "z_um": [0.5, 1.0, 2.0],
                       "cls": ["a", "b", "c"]})
    st.write_table("cells.parquet", df, metadata={"units": {"z_um": "micrometer"}})
    st.write_json("x.json", {"a": np.float32(1.5), "b": np.arange(3)})
    st.commit()
    back = store.read_array("traces/dff")
    assert back.dtype == np.float32 and back.chunks == (1, 50)
    np.testing.assert_array_equal(back[:], data)
    assert back.attrs["unit"] == "dF/F"
    pd.testing.assert_frame_equal(store.read_table("cells.parquet"), df)
    meta = pq.read_schema(tmp_path / "cells.parquet").metadata
    assert b"micrometer" in meta[b"forkmap"]
    assert store.read_json("x.json") == {"a": 1.5, "b": [0, 1, 2]}


def test_missing_output_names_the_stage_to_run(tmp_path: Path) -> None:
    store = Store(tmp_path)
    with pytest.raises(StoreError, match=r"array .*motion/shifts_vox is missing: run the stage"):
        store.read_array("motion/shifts_vox")
    with pytest.raises(StoreError, match=r"session store .* does not exist"):
        Store(tmp_path / "nothing", create=False)


def test_resumable_staging_kept_only_for_same_config(tmp_path: Path) -> None:
    store = Store(tmp_path)
    st = store.stage_store("ingest", "hash-1", resumable=True)
    (st.staging_path("partial.txt")).write_text("3 volumes done")
    again = store.stage_store("ingest", "hash-1", resumable=True)
    assert again.staging_path("partial.txt").read_text() == "3 volumes done"
    other = store.stage_store("ingest", "hash-2", resumable=True)
    assert not other.staging_path("partial.txt").exists()


@pytest.mark.parametrize("chunk_planes", [4, 0])
def test_volume_reader_matches_zarr_indexing(tmp_path: Path, rng: np.random.Generator,
                                             chunk_planes: int) -> None:
    # zarr's own arr[t] is the reference; volumes chunked whole or a few planes at a time
    data = rng.integers(0, 4000, (5, 6, 7, 9)).astype(np.uint16)
    chunks = (1, chunk_planes or 6, 7, 9)
    arr = zarr.create_array(str(tmp_path / "v.zarr"), shape=data.shape, chunks=chunks,
                            dtype="uint16", compressors=blosc("lz4", 5))
    arr[...] = data
    read = VolumeReader(zarr.open_array(str(tmp_path / "v.zarr"), mode="r"))
    first = read(0)
    for t in (3, 0, 4):
        got = read(t)
        assert got is first                          # one buffer, overwritten by each call
        np.testing.assert_array_equal(got, data[t])
        np.testing.assert_array_equal(got, np.asarray(arr[t]))
