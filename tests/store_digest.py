"""Content digests of a session store's outputs, for comparing two runs."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import zarr


def array_digest(path: Path) -> str:
    arr = zarr.open_array(str(path), mode="r")
    data = np.ascontiguousarray(arr[...])
    h = hashlib.sha256(f"{data.shape}{data.dtype}".encode())
    h.update(data.tobytes())
    return h.hexdigest()


def store_digests(root: Path, outputs: list[str] | None = None) -> dict[str, str]:
    """Digest of every zarr array and Parquet table under ``root`` (or under ``outputs``)."""
    root = Path(root)
    bases = [root / o for o in outputs] if outputs is not None else [root]
    out: dict[str, str] = {}
    for base in bases:
        if base.suffix == ".parquet":
            df = pd.read_parquet(base)
            h = hashlib.sha256(",".join(map(str, df.columns)).encode())
            h.update(pd.util.hash_pandas_object(df, index=False).to_numpy().tobytes())
            out[str(base.relative_to(root))] = h.hexdigest()
            continue
        if not base.is_dir():
            continue
        for meta in sorted(base.rglob("zarr.json")):
            if ".staging" in meta.parts:
                continue
            text = meta.read_text()
            if '"node_type": "array"' in text or '"node_type":"array"' in text:
                out[str(meta.parent.relative_to(root))] = array_digest(meta.parent)
        if base == root:
            for pq in sorted(root.glob("*.parquet")):
                out.update(store_digests(root, [pq.name]))
    return out
