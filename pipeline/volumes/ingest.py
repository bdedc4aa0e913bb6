"""Stage ``ingest``: raw TIFF files -> ``volumes.ome.zarr`` (t, z, y, x uint16).

One task per block of consecutive volumes; each task opens its TIFF files itself (a tifffile
handle cannot be sent to a process worker) and writes whole volumes, so no two tasks share a
zarr chunk (chunks are one volume deep in t).

Resuming: each finished block leaves a marker file ``done/<start>-<stop>`` in the stage's
staging folder. A re-run with the same ``[imaging]`` section and the same raw files (same names,
page counts and sizes) skips the blocks already written; anything else starts afresh.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import numpy as np
import zarr

from pipeline.compute import Compute
from pipeline.config import ImagingSettings, Settings
from pipeline.stages import stage
from pipeline.store import VOLUMES, StageStore
from pipeline.volumes.tiffio import TiffInputs, discover_inputs, iter_volumes, plane_slots

__all__ = ["run_ingest", "inputs_from_settings", "ingest_blocks"]

_BLOCK_VOLUMES = 8
_DONE = "done"


def inputs_from_settings(imaging: ImagingSettings, files: list[Path]) -> TiffInputs:
    """:func:`~pipeline.volumes.tiffio.discover_inputs` with the ``[imaging]`` options."""
    return discover_inputs(
        files, layout=imaging.layout, planes_per_volume=imaging.planes_per_volume,
        flyback_planes=imaging.flyback_planes, plane_order=imaging.plane_order,
        index_regex=imaging.index_regex, plane_regex=imaging.plane_regex,
        drop_partial_volume=bool(getattr(imaging, "drop_partial_volume", False)),
    )


def _fingerprint(inp: TiffInputs) -> str:
    sizes = [Path(f).stat().st_size for f in inp.files]
    text = json.dumps([inp.files, inp.pages, sizes, inp.shape], default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def ingest_blocks(n_volumes: int, done: set[int], *, block: int = _BLOCK_VOLUMES
                  ) -> list[tuple[int, int]]:
    """Blocks ``(start, stop)`` of at most ``block`` consecutive volumes not yet written."""
    out: list[tuple[int, int]] = []
    t = 0
    while t < n_volumes:
        if t in done:
            t += 1
            continue
        stop = t
        while stop < n_volumes and stop - t < block and stop not in done:
            stop += 1
        out.append((t, stop))
        t = stop
    return out


def _done_volumes(folder: Path) -> set[int]:
    out: set[int] = set()
    if folder.is_dir():
        for p in folder.iterdir():
            m = re.fullmatch(r"(\d+)-(\d+)", p.name)
            if m:
                out.update(range(int(m.group(1)), int(m.group(2))))
    return out


def _ingest_block(block: tuple[int, int], inp: TiffInputs, array_path: str,
                  done_dir: str) -> tuple[int, int]:
    """Task: read volumes ``start..stop-1`` from TIFF and write them; returns the block."""
    start, stop = block
    arr = zarr.open_array(array_path, mode="r+")
    for t, vol in zip(range(start, stop), iter_volumes(inp, range(start, stop)), strict=True):
        arr[t] = vol
    Path(done_dir, f"{start}-{stop}").touch()  # only after every volume of the block is written
    return block


@stage("ingest", sections=("imaging",), inputs=("imaging",), resumable=True)
def run_ingest(settings: Settings, store: StageStore, compute: Compute) -> None:
    """Convert the raw TIFF files into the chunked OME-Zarr volume image (resumable)."""
    im = settings.imaging
    inp = inputs_from_settings(im, settings.raw_files())
    for note in inp.notes:
        store.warn(note)
    fp = _fingerprint(inp)
    marker = store.staging_path("inputs.sha256")
    done_dir = store.staging_path(_DONE)
    resume = marker.exists() and marker.read_text().strip() == fp
    if not resume and done_dir.exists():
        for p in done_dir.iterdir():
            p.unlink()
    done_dir.mkdir(parents=True, exist_ok=True)
    marker.write_text(fp)
    T, Z, Y, X = inp.shape
    chunk_z = min(im.chunk_planes or Z, Z)
    arr = store.create_volumes(shape=inp.shape, chunks=(1, chunk_z, Y, X),
                               voxel_size_um=im.voxel_size_um,
                               interval_s=1.0 / im.volume_rate_hz, codec=im.codec,
                               level=im.codec_level, name=settings.session.name, resume=resume)
    done = _done_volumes(done_dir) if resume else set()
    blocks = ingest_blocks(T, done)
    del arr  # tasks open the array themselves
    compute.map(_ingest_block, blocks, inp, str(store.staging_path(f"{VOLUMES}/0")),
                str(done_dir), desc="ingest")
    slots = np.stack([plane_slots(t, planes_per_volume=inp.planes_per_volume,
                                  flyback_planes=inp.flyback_planes,
                                  plane_order=inp.plane_order) for t in range(T)])
    store.write_array("ingest/plane_slot", slots.astype(np.int16),
                      attrs={"doc": "acquisition slot (0 .. planes_per_volume - 1) of output "
                                    "plane z of volume t", "planes_per_volume":
                             inp.planes_per_volume},
                      dimension_names=("t", "z"))
    store.set_info({"n_volumes": T, "shape": list(inp.shape), "layout": inp.layout,
                    "n_files": len(inp.files), "bigtiff": inp.bigtiff,
                    "resumed_volumes": len(done), "first_file": Path(inp.files[0]).name,
                    "last_file": Path(inp.files[-1]).name})
