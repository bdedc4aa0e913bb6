"""The session store: one output folder per session.

```
<output>/
  volumes.ome.zarr/     OME-NGFF 0.5 image (zarr v3), labels/cells as an OME label image
  session.zarr/         one group per stage: motion/, traces/, align/, decode/, tuning/ ...
  *.parquet, *.json     tables and summaries
  report/               the HTML report
  manifest.json         config, versions, inputs with SHA-256, one record per finished stage
  .staging/<stage>/     what a running stage writes; moved into place when it completes
  .forkmap.lock         held by the running process
```

A stage sees a :class:`StageStore`: it reads the committed outputs of earlier stages and writes
only into its own staging folder. :meth:`StageStore.commit` moves every staged output into place
and only then is the stage's record written, so an interrupted stage never looks finished.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import logging
import os
import shutil
import socket
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import zarr
from zarr.codecs import BloscCodec, BloscShuffle

from pipeline.errors import LockError, StoreError

__all__ = [
    "Store",
    "StageStore",
    "blosc",
    "file_sha256",
    "ome_multiscales",
    "atomic_write_text",
]

log = logging.getLogger("forkmap")

MANIFEST = "manifest.json"
LOCK = ".forkmap.lock"
STAGING = ".staging"
VOLUMES = "volumes.ome.zarr"
SESSION = "session.zarr"


def blosc(codec: str = "lz4", level: int = 5) -> list[Any]:
    """Blosc with bit-shuffle: fast for uint16 images (lz4) or compact for archives (zstd)."""
    if codec == "none":
        return []
    return [BloscCodec(cname=codec, clevel=level, shuffle=BloscShuffle.bitshuffle)]  # type: ignore[arg-type]


class VolumeReader:
    """Volumes of a (t, z, y, x) zarr array, read one at a time into one reused buffer.

    ``reader(t)`` returns volume ``t`` in a buffer that the next call overwrites: copy it to
    keep it. zarr's ``arr[t]`` allocates a new array for every volume; writing into the same
    one (``get_basic_selection(out=...)``) took the benchmark's fused task (read, register,
    summary sums, sampling of a 30 x 256 x 256 uint16 volume) from 20.8-21.1 to 20.3-20.9 ms
    per volume (100 volumes, four alternating runs each), while a pass that only reads
    shows no difference (1.23 against 1.24 s for 400 volumes): the fresh 4 MB buffer costs
    page faults only where the kernels keep the memory busy (DEVELOPERS.md "Imaging path per
    volume").
    """

    def __init__(self, arr: zarr.Array) -> None:
        from zarr.core.buffer.cpu import NDBuffer

        self.arr = arr
        self._buffer = np.empty(arr.shape[1:], dtype=arr.dtype)
        self._out = NDBuffer.from_numpy_array(self._buffer)

    def __call__(self, t: int) -> np.ndarray:
        sel = (int(t),) + (slice(None),) * (self.arr.ndim - 1)
        self.arr.get_basic_selection(sel, out=self._out)
        return self._buffer


def file_sha256(path: Path, *, block_bytes: int = 1 << 22) -> str:
    """SHA-256 of a file, streamed in blocks (never the whole file in memory)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(block_bytes):
            h.update(chunk)
    return h.hexdigest()


def atomic_write_text(path: Path, text: str) -> None:
    """Write a text file so that readers see the old or the new content, never half."""
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def ome_multiscales(voxel_size_um: tuple[float, float, float], interval_s: float,
                    name: str) -> dict[str, Any]:
    """OME-NGFF 0.5 ``multiscales`` entry for a single-resolution (t, z, y, x) image."""
    return {
        "version": "0.5",
        "multiscales": [{
            "name": name,
            "axes": [
                {"name": "t", "type": "time", "unit": "second"},
                {"name": "z", "type": "space", "unit": "micrometer"},
                {"name": "y", "type": "space", "unit": "micrometer"},
                {"name": "x", "type": "space", "unit": "micrometer"},
            ],
            "datasets": [{
                "path": "0",
                "coordinateTransformations": [
                    {"type": "scale", "scale": [float(interval_s), *map(float, voxel_size_um)]}
                ],
            }],
        }],
    }


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds")


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def dumps(obj: Any) -> str:
    """JSON text for the store's files (NumPy scalars and arrays allowed)."""
    return json.dumps(obj, indent=1, default=_json_default, allow_nan=True)


class Store:
    """Read access to a session store, plus the manifest and the lock.

    Parameters
    ----------
    root : Path
        The output folder; created when missing.
    """

    def __init__(self, root: str | Path, *, create: bool = True) -> None:
        self.root = Path(root)
        if create:
            self.root.mkdir(parents=True, exist_ok=True)
            if not (self.root / SESSION / "zarr.json").exists():
                zarr.open_group(str(self.root / SESSION), mode="a",
                                attributes={"forkmap": "session store"})
        elif not self.root.is_dir():
            raise StoreError(f"session store {self.root} does not exist; run `forkmap run` first")

    # ---- manifest ---------------------------------------------------------------------------
    @property
    def manifest_path(self) -> Path:
        return self.root / MANIFEST

    def manifest(self) -> dict[str, Any]:
        """The manifest as a dict (empty skeleton when none has been written)."""
        if not self.manifest_path.exists():
            return {"stages": {}, "inputs": {}}
        return json.loads(self.manifest_path.read_text(encoding="utf-8"))

    def update_manifest(self, **parts: Any) -> None:
        """Replace top-level parts of the manifest atomically."""
        m = self.manifest()
        m.update(parts)
        atomic_write_text(self.manifest_path, dumps(m))

    def record(self, stage: str) -> dict[str, Any] | None:
        """The finished-stage record of ``stage``, or None."""
        rec = self.manifest().get("stages", {}).get(stage)
        return rec if isinstance(rec, dict) else None

    def write_record(self, stage: str, record: Mapping[str, Any]) -> None:
        m = self.manifest()
        m.setdefault("stages", {})[stage] = dict(record)
        atomic_write_text(self.manifest_path, dumps(m))

    def drop_record(self, stage: str) -> None:
        m = self.manifest()
        if m.get("stages", {}).pop(stage, None) is not None:
            atomic_write_text(self.manifest_path, dumps(m))

    # ---- reading ----------------------------------------------------------------------------
    def _require(self, rel: str, what: str) -> Path:
        path = self.root / rel
        if not path.exists():
            raise StoreError(f"{what} {path} is missing: run the stage that writes it first")
        return path

    def volumes(self) -> zarr.Array:
        """The ingested volumes (t, z, y, x), read only."""
        return zarr.open_array(str(self._require(f"{VOLUMES}/0", "volume array")), mode="r")

    @property
    def volumes_path(self) -> str:
        return str(self.root / VOLUMES / "0")

    def array_path(self, name: str) -> str:
        """Path of a committed session.zarr array, for tasks that open it themselves."""
        return str(self.root / SESSION / name)

    def read_array(self, name: str) -> zarr.Array:
        """A committed array ``group/name`` under session.zarr, read only (lazy)."""
        return zarr.open_array(str(self._require(f"{SESSION}/{name}", "array")), mode="r")

    def has(self, rel: str) -> bool:
        """True when ``rel`` (``"cells.parquet"``, ``"session.zarr/motion"``...) exists."""
        return (self.root / rel).exists()

    def read_table(self, rel: str) -> pd.DataFrame:
        return pd.read_parquet(self._require(rel, "table"))

    def read_json(self, rel: str) -> Any:
        return json.loads(self._require(rel, "file").read_text(encoding="utf-8"))

    def labels(self) -> zarr.Array:
        """The cell label volume (z, y, x) int32 written by the cells stage."""
        return zarr.open_array(str(self._require(f"{VOLUMES}/labels/cells/0", "label image")),
                               mode="r")

    def warnings(self) -> list[dict[str, str]]:
        """Every warning recorded by a finished stage, in stage order."""
        out: list[dict[str, str]] = []
        for name, rec in self.manifest().get("stages", {}).items():
            out.extend({"stage": name, "message": w} for w in rec.get("warnings", []))
        return out

    # ---- lock -------------------------------------------------------------------------------
    @contextlib.contextmanager
    def lock(self) -> Iterator[None]:
        """Hold the output folder's lock; refuse when another live process holds it."""
        path = self.root / LOCK
        me = {"pid": os.getpid(), "host": socket.gethostname(), "since": _now()}
        for _attempt in range(2):
            try:
                fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = _read_lock(path)
                if holder and holder.get("host") == me["host"] and not _alive(holder["pid"]):
                    path.unlink(missing_ok=True)  # the holder died: a stale lock
                    continue
                who = (f"pid {holder.get('pid')} on host {holder.get('host')} since "
                       f"{holder.get('since')}") if holder else "an unknown process"
                raise LockError(f"output folder {self.root} is in use by {who}; wait for it to "
                                f"finish, or delete {path} if no run is active") from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            break
        try:
            yield
        finally:
            path.unlink(missing_ok=True)

    def stage_store(self, stage: str, config_hash: str, *, resumable: bool) -> StageStore:
        return StageStore(self, stage, config_hash, resumable=resumable)


def _read_lock(path: Path) -> dict[str, Any] | None:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return None


def _alive(pid: int) -> bool:
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class StageStore(Store):
    """What one running stage sees: reads of committed outputs, writes into its staging.

    Every write registers the top-level output it belongs to (``session.zarr/<group>``, a
    table, ``volumes.ome.zarr`` ...). :meth:`commit` moves them into place.
    """

    def __init__(self, base: Store, stage: str, config_hash: str, *, resumable: bool) -> None:
        super().__init__(base.root, create=False)
        self.stage = stage
        self.config_hash = config_hash
        self.staging = base.root / STAGING / stage
        self.outputs: list[str] = []
        self._warnings: list[str] = []
        self._info: dict[str, Any] = {}
        marker = self.staging / ".config_hash"
        keep = resumable and marker.exists() and marker.read_text().strip() == config_hash
        if not keep and self.staging.exists():
            shutil.rmtree(self.staging)
        self.staging.mkdir(parents=True, exist_ok=True)
        marker.write_text(config_hash)
        zarr.open_group(str(self.staging / SESSION), mode="a")

    # ---- bookkeeping ------------------------------------------------------------------------
    def _register(self, rel: str) -> None:
        if rel not in self.outputs:
            self.outputs.append(rel)

    def warn(self, message: str) -> None:
        """Record a warning for the report (and log it)."""
        log.warning("%s: %s", self.stage, message)
        self._warnings.append(message)

    def set_info(self, info: Mapping[str, Any]) -> None:
        """Attach JSON-able facts to the stage record (clock model, counts...)."""
        self._info.update(info)

    def staging_path(self, rel: str) -> Path:
        """A path inside the staging folder (for resumable partial work)."""
        return self.staging / rel

    # ---- writing ----------------------------------------------------------------------------
    def _group_of(self, name: str) -> str:
        parts = name.strip("/").split("/")
        if len(parts) < 2:
            raise ValueError(f"array name {name!r} must be 'group/name'")
        for i in range(1, len(parts)):
            zarr.open_group(str(self.staging / SESSION / "/".join(parts[:i])), mode="a")
        self._register(f"{SESSION}/{parts[0]}")
        return str(self.staging / SESSION / name)

    def create_array(self, name: str, *, shape: tuple[int, ...], dtype: Any,
                     chunks: tuple[int, ...], attrs: Mapping[str, Any] | None = None,
                     fill_value: Any = 0, dimension_names: tuple[str, ...] | None = None,
                     compressors: Any = "auto", overwrite: bool = True) -> zarr.Array:
        """Create an (empty) array ``group/name`` in staging; tasks may fill it in parallel."""
        path = self._group_of(name)
        if not overwrite and Path(path, "zarr.json").exists():
            return zarr.open_array(path, mode="r+")
        return zarr.create_array(
            path, shape=shape, dtype=dtype, chunks=chunks, fill_value=fill_value,
            attributes=dict(attrs or {}), dimension_names=dimension_names,
            compressors=compressors, overwrite=True,
        )

    def staged_array_path(self, name: str) -> str:
        return str(self.staging / SESSION / name)

    def write_array(self, name: str, data: Any, *, chunks: tuple[int, ...] | None = None,
                    attrs: Mapping[str, Any] | None = None,
                    dimension_names: tuple[str, ...] | None = None) -> zarr.Array:
        """Write a NumPy array as ``session.zarr/group/name`` (staged)."""
        data = np.asarray(data)
        arr = self.create_array(name, shape=data.shape, dtype=data.dtype,
                                chunks=chunks or _auto_chunks(data),
                                attrs=attrs, dimension_names=dimension_names)
        arr[...] = data
        return arr

    def write_table(self, rel: str, df: pd.DataFrame,
                    metadata: Mapping[str, Any] | None = None) -> None:
        """Write a Parquet table; ``metadata`` (units...) goes into the file's key-value store."""
        import pyarrow as pa
        import pyarrow.parquet as pq

        table = pa.Table.from_pandas(df, preserve_index=False)
        if metadata:
            meta = dict(table.schema.metadata or {})
            meta[b"forkmap"] = dumps(dict(metadata)).encode()
            table = table.replace_schema_metadata(meta)
        path = self.staging / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(table, path)
        self._register(rel)

    def write_json(self, rel: str, obj: Any) -> None:
        path = self.staging / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(dumps(obj), encoding="utf-8")
        self._register(rel)

    def write_file(self, rel: str) -> Path:
        """Register a staged file or folder the stage writes itself; returns its path."""
        path = self.staging / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        self._register(rel)
        return path

    def create_volumes(self, *, shape: tuple[int, int, int, int], chunks: tuple[int, ...],
                       voxel_size_um: tuple[float, float, float], interval_s: float,
                       codec: str = "lz4", level: int = 5, name: str = "volumes",
                       resume: bool = False) -> zarr.Array:
        """Create the staged ``volumes.ome.zarr`` image (uint16, t, z, y, x) with OME metadata."""
        root = self.staging / VOLUMES
        self._register(VOLUMES)
        if resume and (root / "0" / "zarr.json").exists():
            arr = zarr.open_array(str(root / "0"), mode="r+")
            if arr.shape == tuple(shape):
                return arr
        if root.exists():
            shutil.rmtree(root)
        zarr.open_group(str(root), mode="w",
                        attributes={"ome": ome_multiscales(voxel_size_um, interval_s, name)})
        return zarr.create_array(
            str(root / "0"), shape=shape, dtype="uint16", chunks=chunks, fill_value=0,
            compressors=blosc(codec, level), dimension_names=("t", "z", "y", "x"),
            attributes={"unit": "camera counts"},
        )

    def create_labels(self, labels: np.ndarray, *, voxel_size_um: tuple[float, float, float],
                      name: str = "cells") -> None:
        """Write a (z, y, x) int32 label volume as an OME-NGFF 0.5 label image."""
        root = self.staging / VOLUMES / "labels"
        self._register(f"{VOLUMES}/labels")
        zarr.open_group(str(root), mode="w", attributes={"ome": {"version": "0.5",
                                                                  "labels": [name]}})
        ms = ome_multiscales(voxel_size_um, 1.0, name)
        ms["multiscales"][0]["axes"] = ms["multiscales"][0]["axes"][1:]
        ms["multiscales"][0]["datasets"][0]["coordinateTransformations"][0]["scale"] = [
            float(v) for v in voxel_size_um]
        ms["image-label"] = {"version": "0.5", "source": {"image": "../../"}}
        zarr.open_group(str(root / name), mode="w", attributes={"ome": ms})
        arr = zarr.create_array(
            str(root / name / "0"), shape=labels.shape, dtype="int32", fill_value=0,
            chunks=_auto_chunks(labels), compressors=blosc("zstd", 5),
            dimension_names=("z", "y", "x"),
        )
        arr[...] = labels.astype(np.int32, copy=False)

    # ---- completion -------------------------------------------------------------------------
    def commit(self) -> list[str]:
        """Move every staged output into place; returns the outputs' paths."""
        trash = self.root / STAGING / f".trash-{self.stage}"
        if trash.exists():
            shutil.rmtree(trash)
        trash.mkdir(parents=True)
        for i, rel in enumerate(self.outputs):
            src, dst = self.staging / rel, self.root / rel
            if not src.exists():
                raise StoreError(f"stage {self.stage} registered {rel} but did not write it")
            dst.parent.mkdir(parents=True, exist_ok=True)
            if dst.exists():
                os.replace(dst, trash / str(i))
            os.replace(src, dst)
        shutil.rmtree(trash)
        shutil.rmtree(self.staging)
        return list(self.outputs)

    def record_extras(self) -> dict[str, Any]:
        return {"warnings": list(self._warnings), "info": dict(self._info)}


def _auto_chunks(data: np.ndarray) -> tuple[int, ...]:
    """Chunks of at most ~8 MB, split along the first axis."""
    if data.ndim == 0:
        return ()
    row = max(1, int(np.prod(data.shape[1:])) * data.dtype.itemsize)
    first = max(1, min(data.shape[0], (8 << 20) // row))
    return (first, *data.shape[1:])
