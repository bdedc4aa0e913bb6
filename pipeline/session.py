"""The Python results API: open a finished session store and get labelled results.

>>> from pipeline.session import Session
>>> s = Session.open("out")                       # doctest: +SKIP
>>> s.cells.head()                                # one row per cell (pandas)  # doctest: +SKIP
>>> dff = s.traces("dff")                         # lazy: dask array + cell ids + times
>>> dff.data.shape, dff.cells[:3], dff.time_s[:3]  # doctest: +SKIP
>>> s.behaviour[["t_s", "x_mm", "heading_rad"]]   # on the imaging clock  # doctest: +SKIP

Every accessor reads what a stage wrote; a missing output raises :class:`StoreError` naming
the stage to run. The imaging (microscope) clock is the time base of every ``t_s``/``*_s``
column returned here; rig-clock times (``*_rig_s`` columns of the behaviour stage's tables) are
converted with the clock model of the ``align`` stage (:class:`pipeline.align.ClockModel`, kept
in the manifest's ``stages.align.info.clock``), which holds one offset and drift per stretch
between clock jumps (DEVELOPERS.md).

Where each result lives is written once, in :data:`OUTPUTS`; the report and the NWB export
read through this class, so a stage that renames an output is adapted here only.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np
import pandas as pd

from pipeline.align import ClockModel
from pipeline.errors import StoreError
from pipeline.store import Store

__all__ = ["Session", "LabelledArray", "OUTPUTS", "TRACE_KINDS", "README_EXAMPLE",
           "decode_table"]

#: result -> (stage that writes it, candidate paths relative to the output folder, first wins)
OUTPUTS: Mapping[str, tuple[str, tuple[str, ...]]] = {
    "volumes": ("ingest", ("volumes.ome.zarr/0",)),
    "shifts_vox": ("motion", ("session.zarr/motion/shifts_vox",)),
    "shifts_um": ("motion", ("session.zarr/motion/shifts_um",)),
    "motion_quality": ("motion", ("session.zarr/motion/quality",)),
    "motion_flags": ("motion", ("session.zarr/motion/flags",)),
    "mean_image": ("motion", ("session.zarr/motion/mean",)),
    "corr_image": ("motion", ("session.zarr/motion/local_corr",)),
    "cells": ("cells", ("cells.parquet",)),
    "labels": ("cells", ("volumes.ome.zarr/labels/cells/0",)),
    "behaviour": ("behaviour", ("behaviour.parquet",)),
    "bouts": ("behaviour", ("bouts.parquet",)),
    "splits": ("behaviour", ("splits.parquet",)),
    "splits_steering": ("behaviour", ("splits_steering.parquet",)),
    "density": ("behaviour", ("session.zarr/behaviour/density",)),
    "density_x_edges_mm": ("behaviour", ("session.zarr/behaviour/x_edges_mm",)),
    "density_y_edges_mm": ("behaviour", ("session.zarr/behaviour/y_edges_mm",)),
    "plane_times_s": ("align", ("session.zarr/align/plane_times_s",)),
    "behaviour_t_scope_s": ("align", ("session.zarr/align/behaviour_t_scope_s",)),
    "decode": ("decode", ("decode.json",)),
    "decode_weights": ("decode", ("session.zarr/decode/weights",)),
    "decode_weights_table": ("decode", ("decode_weights.parquet",)),
    "decode_weight_map": ("decode", ("session.zarr/decode/weight_map",)),
    "decode_pattern": ("decode", ("session.zarr/decode/pattern",)),
    "decode_pattern_map": ("decode", ("session.zarr/decode/pattern_map",)),
    "tuning": ("tuning", ("tuning.parquet",)),
    "tuning_curves": ("tuning", ("session.zarr/tuning/curves",)),
}
#: The worked example for the README (run as a doctest on a synthetic store by the tests).
README_EXAMPLE = """
>>> from pipeline.session import Session
>>> s = Session.open("out")                     # the output folder (or the config file)
>>> s.stages_done()
['ingest', 'motion', 'cells', 'traces', 'behaviour', 'align', 'decode', 'tuning']
>>> dff = s.traces("dff")                       # lazy: nothing is read yet
>>> dff.data.shape == (len(dff.cells), len(dff.time_s))
True
>>> trace = dff.cell(int(dff.cells[0]))         # one cell's dF/F as a NumPy array
>>> beh = s.behaviour                           # rig log with t_s on the imaging clock
>>> bool(beh["t_s"].is_monotonic_increasing)
True
>>> tuned = s.tuning.query("tuned")             # rows of cells tuned to a target bearing
>>> {"cell", "target", "epoch", "preferred_rad", "q"} <= set(tuned.columns)
True
>>> s.volumes.ndim                              # dask array (t, z, y, x)
4
"""
TRACE_KINDS = ("raw", "neuropil", "corrected", "dff", "events", "denoised")


@dataclass(frozen=True)
class LabelledArray:
    """A lazily loaded (cells, time) array with its labels.

    Parameters
    ----------
    data : dask.array.Array of shape (n_cells, n_t)
        The values, read from zarr chunk by chunk on demand.
    cells : ndarray of int of shape (n_cells,)
        Cell ids (the ``id`` column of ``cells.parquet``, also the label value).
    time_s : ndarray of float of shape (n_t,)
        Start time of each volume on the imaging clock.
    name : str
        What the values are (``"dff"``, ``"events"`` ...).
    unit : str
        Unit of the values.
    """

    data: da.Array
    cells: np.ndarray
    time_s: np.ndarray
    name: str = ""
    unit: str = ""

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(n) for n in self.data.shape)

    def cell(self, cell_id: int) -> np.ndarray:
        """The trace of one cell (by id), computed."""
        hit = np.flatnonzero(self.cells == cell_id)
        if hit.size == 0:
            raise StoreError(f"{self.name}: no cell with id {cell_id}; ids run "
                             f"{self.cells.min()}..{self.cells.max()}")
        return np.asarray(self.data[int(hit[0])].compute())

    def compute(self) -> np.ndarray:
        """All values as a NumPy array (loads the whole array)."""
        return np.asarray(self.data.compute())


def decode_table(obj: Mapping[str, Any]) -> pd.DataFrame:
    """One row per (decoder, lag) from the ``decode.json`` document.

    Every list as long as the lag list becomes a column; a 2-D list with one axis of that
    length becomes columns ``<key>_<i>`` (one per fold); scalars go to ``df.attrs``. Decoders
    nested one level deep (``{"turn": {...}, "bout": {...}}``) get a ``decoder`` column.

    Raises
    ------
    StoreError
        No list of lags (a key ``lags_s`` or ``lag_s``) is found.
    """
    def lag_key(d: Mapping[str, Any]) -> str | None:
        return next((k for k in ("lags_s", "lag_s") if isinstance(d.get(k), list)), None)

    def one(d: Mapping[str, Any]) -> pd.DataFrame:
        key = lag_key(d)
        assert key is not None
        lags = np.asarray(d[key], dtype=np.float64)
        cols: dict[str, Any] = {"lag_s": lags}
        attrs: dict[str, Any] = {}
        for k, v in d.items():
            if k == key:
                continue
            if isinstance(v, list) and v and not isinstance(v[0], dict | str):
                try:
                    arr = np.asarray(v, dtype=np.float64)
                except (TypeError, ValueError):
                    attrs[k] = v
                    continue
                if arr.ndim == 1 and arr.size == lags.size:
                    cols[k] = arr
                elif arr.ndim == 2 and lags.size in arr.shape:
                    arr = arr if arr.shape[1] == lags.size else arr.T
                    cols.update({f"{k}_{i}": row for i, row in enumerate(arr)})
                else:
                    attrs[k] = v
            else:
                attrs[k] = v
        df = pd.DataFrame(cols)
        df.attrs.update(attrs)
        return df

    if lag_key(obj) is not None:
        return one(obj)
    parts = []
    for name, sub in obj.items():
        if isinstance(sub, Mapping) and lag_key(sub) is not None:
            df = one(sub)
            parts.append((name, df))
    if not parts:
        raise StoreError(f"decode.json: no list of lags found (expected a key 'lags_s' at the "
                         f"top level or one level down); keys seen: {', '.join(obj)}")
    out = pd.concat([df.assign(decoder=name) for name, df in parts], ignore_index=True)
    out.attrs.update({name: df.attrs for name, df in parts})
    out.attrs.update({k: v for k, v in obj.items()
                      if not (isinstance(v, Mapping) and lag_key(v) is not None)})
    return out


class Session:
    """Results of one session store.

    Parameters
    ----------
    store : Store
        An opened store (use :meth:`open` with a folder or a config file).
    """

    def __init__(self, store: Store) -> None:
        self.store = store
        self.root = store.root

    @classmethod
    def open(cls, path: str | Path) -> Session:
        """Open the output folder ``path`` (or the output of the config file ``path``).

        Raises
        ------
        StoreError
            The folder does not exist.
        """
        path = Path(path)
        if path.suffix == ".toml":
            from pipeline.config import load_config

            path = load_config(path, check_files=False).session.output
        return cls(Store(path, create=False))

    def __repr__(self) -> str:
        done = ", ".join(self.stages_done()) or "none"
        return f"Session({str(self.root)!r}, stages done: {done})"

    # ---- locating ---------------------------------------------------------------------------
    def where(self, what: str) -> Path | None:
        """Path of the result ``what`` (a key of :data:`OUTPUTS`), or None when missing."""
        _stage, candidates = OUTPUTS[what]
        for rel in candidates:
            if (self.root / rel).exists():
                return self.root / rel
        return None

    def has(self, what: str) -> bool:
        return self.where(what) is not None

    def _need(self, what: str) -> Path:
        path = self.where(what)
        if path is None:
            stage, candidates = OUTPUTS[what]
            raise StoreError(f"{self.root}: {what} is missing (looked for "
                             f"{', '.join(candidates)}); run `forkmap run` (stage {stage!r}) "
                             f"first")
        return path

    def array(self, what: str) -> da.Array:
        """A zarr result as a lazy dask array."""
        return da.from_zarr(str(self._need(what)))

    def stages_done(self) -> list[str]:
        return list(self.manifest.get("stages", {}))

    # ---- metadata ---------------------------------------------------------------------------
    @property
    def manifest(self) -> dict[str, Any]:
        """The manifest: config, versions, inputs and one record per finished stage."""
        return self.store.manifest()

    def record(self, stage: str) -> dict[str, Any]:
        """A finished stage's record; raises StoreError when the stage has not run."""
        rec = self.store.record(stage)
        if rec is None:
            raise StoreError(f"{self.root}: stage {stage!r} has not run; run `forkmap run`")
        return rec

    @property
    def clock(self) -> dict[str, Any]:
        """The ``align`` stage's clock model as a dict (``ClockModel.to_dict()``).

        Keys include ``offset_s``, ``drift_ppm``, ``segments``, ``residual_rms_ms``,
        ``residual_max_ms``, ``matched``, ``dropped_volume_indices``, ``spurious_pulse_indices``.

        Raises
        ------
        StoreError
            The align stage has not run, or its record holds no clock model.
        """
        info = self.record("align").get("info", {})
        if not isinstance(info.get("clock"), Mapping):
            raise StoreError(f"{self.root}/manifest.json: stages.align.info has no 'clock' "
                             f"model (keys seen: {', '.join(info) or 'none'}); re-run "
                             f"`forkmap run --from align`")
        return dict(info["clock"])

    @property
    def clock_model(self) -> ClockModel:
        """The ``align`` stage's :class:`pipeline.align.ClockModel` (rig <-> imaging clock)."""
        try:
            return ClockModel.from_dict(self.clock)
        except (KeyError, TypeError) as exc:
            raise StoreError(f"{self.root}/manifest.json: stages.align.info.clock is not a "
                             f"clock model ({exc}); re-run `forkmap run --from align`") from None

    @property
    def volume_rate_hz(self) -> float:
        try:
            return float(self.manifest["config"]["imaging"]["volume_rate_hz"])
        except (KeyError, TypeError):
            attrs = json.loads((self._need("volumes").parent / "zarr.json").read_text())
            scale = attrs["attributes"]["ome"]["multiscales"][0]["datasets"][0][
                "coordinateTransformations"][0]["scale"]
            return 1.0 / float(scale[0])

    @property
    def voxel_size_um(self) -> tuple[float, float, float]:
        try:
            z, y, x = self.manifest["config"]["imaging"]["voxel_size_um"]
        except (KeyError, TypeError, ValueError):
            raise StoreError(f"{self.root}/manifest.json: no imaging.voxel_size_um in the "
                             f"config part; run `forkmap run`") from None
        return float(z), float(y), float(x)

    @property
    def time_s(self) -> np.ndarray:
        """Start time of every volume on the imaging clock (s)."""
        if self.has("plane_times_s"):
            return np.asarray(self.array("plane_times_s").min(axis=1).compute(), np.float64)
        n_t = self._n_volumes()
        return np.arange(n_t, dtype=np.float64) / self.volume_rate_hz

    def _n_volumes(self) -> int:
        for what in ("volumes", "shifts_vox"):
            if self.has(what):
                return int(self.array(what).shape[0])
        for kind in TRACE_KINDS:
            path = self.root / "session.zarr" / "traces" / kind
            if path.exists():
                return int(da.from_zarr(str(path)).shape[1])
        raise StoreError(f"{self.root}: no volumes, shifts or traces to count volumes from; "
                         f"run `forkmap run` (stage 'ingest') first")

    @property
    def plane_times_s(self) -> np.ndarray:
        """Sample time of every plane of every volume (t, z) on the imaging clock."""
        return np.asarray(self.array("plane_times_s").compute(), dtype=np.float64)

    # ---- results ----------------------------------------------------------------------------
    @property
    def volumes(self) -> da.Array:
        """The ingested volumes (t, z, y, x) uint16, lazily."""
        return self.array("volumes")

    @property
    def labels(self) -> np.ndarray:
        """The cell label volume (z, y, x) int32; 0 is background, values are cell ids."""
        return np.asarray(self.array("labels").compute())

    @property
    def cells(self) -> pd.DataFrame:
        """One row per cell: id, position (voxels and um), size, plane ..."""
        return pd.read_parquet(self._need("cells"))

    @property
    def motion(self) -> pd.DataFrame:
        """Per-volume motion: ``t_s``, shifts in voxels and um per axis, quality, flag."""
        sv = np.asarray(self.array("shifts_vox").compute(), dtype=np.float64)
        out = {"t_s": self.time_s[: sv.shape[0]]}
        out.update({f"shift_{a}_vox": sv[:, i] for i, a in enumerate("zyx")})
        if self.has("shifts_um"):
            su = np.asarray(self.array("shifts_um").compute(), dtype=np.float64)
        else:
            su = sv * np.asarray(self.voxel_size_um)
        out.update({f"shift_{a}_um": su[:, i] for i, a in enumerate("zyx")})
        if self.has("motion_quality"):
            out["quality"] = np.asarray(self.array("motion_quality").compute(), np.float64)
        if self.has("motion_flags"):
            flags = np.asarray(self.array("motion_flags").compute())
            out["flagged"] = np.asarray(flags.reshape(flags.shape[0], -1).any(axis=1))
        return pd.DataFrame(out)

    def traces(self, kind: str = "dff") -> LabelledArray:
        """A (cells, time) trace array, lazily loaded.

        Parameters
        ----------
        kind : {"raw", "neuropil", "corrected", "dff", "events", "denoised"}
            ``denoised`` is the dF/F trace fitted by noise-constrained OASIS (a non-negative
            AR(1) calcium trace whose residual has the cell's noise power); it follows the
            planted activity more closely than ``dff`` (median correlation 0.92 against 0.81
            on the small demo) but is a model fit: it is never negative and small transients
            under the noise may be missing.

        Raises
        ------
        StoreError
            Unknown ``kind`` or the traces stage has not run.
        """
        if kind not in TRACE_KINDS:
            raise StoreError(f"traces kind {kind!r}: expected one of {', '.join(TRACE_KINDS)}")
        path = self.root / "session.zarr" / "traces" / kind
        if not path.exists():
            raise StoreError(f"{self.root}: traces/{kind} is missing; run `forkmap run` "
                             f"(stage 'traces') first")
        data = da.from_zarr(str(path))
        import zarr

        unit = str(zarr.open_array(str(path), mode="r").attrs.get("unit", ""))
        cells = (self.cells["id"].to_numpy() if self.has("cells")
                 else np.arange(1, data.shape[0] + 1))
        return LabelledArray(data, np.asarray(cells), self.time_s[: data.shape[1]], kind, unit)

    def _on_scope_clock(self, df: pd.DataFrame) -> pd.DataFrame:
        """Each rig-clock column ``<name>_rig_s`` gets an imaging-clock twin ``<name>_s``.

        ``t_rig_s`` becomes ``t_s`` (inserted first); the rig columns are kept.
        """
        rig_cols = [c for c in df.columns if str(c).endswith("_rig_s")
                    and pd.api.types.is_numeric_dtype(df[c])]
        if not rig_cols:
            return df
        model = self.clock_model
        df = df.copy()
        for col in rig_cols:
            name = "t_s" if col == "t_rig_s" else str(col)[: -len("_rig_s")] + "_s"
            values = model.rig_to_scope(df[col].to_numpy(np.float64))
            where = 0 if name == "t_s" else list(df.columns).index(col)
            df.insert(where, name, values)
        return df

    @property
    def behaviour(self) -> pd.DataFrame:
        """The behaviour log with ``t_s`` on the imaging clock first (``t_rig_s`` kept).

        ``t_s`` is the align stage's ``behaviour_t_scope_s`` when present (the clock model
        applied by the stage that fitted it), else the rig times converted here.
        """
        df = pd.read_parquet(self._need("behaviour"))
        if self.has("behaviour_t_scope_s"):
            t_s = np.asarray(self.array("behaviour_t_scope_s").compute(), np.float64)
            if t_s.shape == (len(df),):
                df.insert(0, "t_s", t_s)
                return df
        return self._on_scope_clock(df)

    @property
    def bouts(self) -> pd.DataFrame:
        """Turn bouts: ``onset_s``/``offset_s`` on the imaging clock (rig times kept)."""
        return self._on_scope_clock(pd.read_parquet(self._need("bouts")))

    @property
    def splits(self) -> pd.DataFrame:
        """Split points per trial: ``split_s`` on the imaging clock (``split_rig_s`` kept)."""
        return self._on_scope_clock(pd.read_parquet(self._need("splits")))

    @property
    def splits_steering(self) -> pd.DataFrame:
        """Split points from the steering model alone, without the critical-angle prior.

        ``splits`` are re-timed with the population's critical angle as a prior (when
        ``behaviour.split_angle_prior`` is on), so their per-trial angles lean towards the
        population value; study the trial-to-trial spread of split angles on these instead.
        """
        return self._on_scope_clock(pd.read_parquet(self._need("splits_steering")))

    @property
    def critical_angle(self) -> dict[str, Any]:
        """The critical-angle estimate: ``estimate_rad``, ``ci_low_rad``, ``ci_high_rad``, ``n``.

        Raises
        ------
        StoreError
            The behaviour stage has not run or recorded no estimate.
        """
        crit = self.record("behaviour").get("info", {}).get("critical_angle")
        if not isinstance(crit, Mapping):
            raise StoreError(f"{self.root}/manifest.json: stages.behaviour.info has no "
                             f"'critical_angle'; re-run `forkmap run --from behaviour`")
        return dict(crit)

    @property
    def density(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The folded trajectory density ``(fraction (y, x), x_edges_mm, y_edges_mm)``."""
        counts = np.asarray(self.array("density").compute(), np.float64)
        xe = np.asarray(self.array("density_x_edges_mm").compute(), np.float64)
        ye = np.asarray(self.array("density_y_edges_mm").compute(), np.float64)
        return counts, xe, ye

    @property
    def decoding_summary(self) -> dict[str, Any]:
        """``decode.json`` as written by the decode stage."""
        return dict(json.loads(self._need("decode").read_text(encoding="utf-8")))

    @property
    def decoding(self) -> pd.DataFrame:
        """Decoder scores: one row per (decoder, lag); scalars in ``.attrs``."""
        return decode_table(self.decoding_summary)

    @property
    def tuning(self) -> pd.DataFrame:
        """One row per cell, target and epoch: preferred bearing, selectivity, p, q, tuned."""
        return pd.read_parquet(self._need("tuning"))

    def target_names(self) -> list[str]:
        """Targets found in the behaviour table (``<name>_x_mm`` columns)."""
        import pyarrow.parquet as pq

        cols: Sequence[str] = pq.read_schema(self._need("behaviour")).names
        return [c[: -len("_x_mm")] for c in cols if c.endswith("_x_mm") and c != "x_mm"]
