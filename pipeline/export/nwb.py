"""Export a session store to one NWB file (``<output>/session.nwb``).

What goes where (NWB 2 core types through pynwb; every time is on the imaging clock):

============================  ===============================================================
``acquisition/volumes``       TwoPhotonSeries; by default an external reference to
                              ``volumes.ome.zarr`` (``format="external"``), or an embedded
                              copy (``embed_volumes=True``), axes (t, x, y, z) as NWB orders them
``processing/ophys``          ImageSegmentation with a PlaneSegmentation of 3-D voxel masks
                              ``(x, y, z, weight)`` built from the label image; Fluorescence
                              (raw, neuropil, corrected), DfOverF (dff) and a Fluorescence
                              container ``Deconvolved`` (events); ``plane_time_offsets``
``processing/behavior``       Position (animal and each target), CompassDirection (heading),
                              the turn command; bouts as a TimeIntervals table ``turn_bouts``
``trials``                    one row per trial with its split time and chosen target
============================  ===============================================================

Large arrays are streamed (``GenericDataChunkIterator`` reading the zarr arrays block by block
and transposing each block to NWB's order), so memory stays at a few blocks.

References
----------
.. [1] Rübel O, Tritt A, Ly R, et al. (2022). The Neurodata Without Borders ecosystem for
   neurophysiological data science. eLife 11:e78362. doi:10.7554/eLife.78362
"""

from __future__ import annotations

import datetime as _dt
import logging
import os
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from hdmf.data_utils import GenericDataChunkIterator

from pipeline.errors import StoreError
from pipeline.session import TRACE_KINDS, Session

__all__ = ["export_nwb", "voxel_masks"]

log = logging.getLogger("forkmap")

_TRACE_NAMES = {"raw": "raw", "neuropil": "neuropil", "corrected": "neuropil_corrected",
                "dff": "dff", "events": "events", "denoised": "denoised_dff"}


class _ZarrBlocks(GenericDataChunkIterator):
    """Stream a zarr array into NWB, permuting its axes (``axes`` as in ``np.transpose``)."""

    def __init__(self, array: Any, axes: tuple[int, ...], **kwargs: Any) -> None:
        self._array = array
        self._axes = tuple(axes)
        self._inverse = tuple(int(i) for i in np.argsort(self._axes))
        super().__init__(**kwargs)

    def _get_data(self, selection: tuple[slice, ...]) -> np.ndarray:
        src = tuple(selection[self._inverse[i]] for i in range(len(self._axes)))
        return np.transpose(np.asarray(self._array[src]), self._axes)

    def _get_maxshape(self) -> tuple[int, ...]:
        return tuple(int(self._array.shape[a]) for a in self._axes)

    def _get_dtype(self) -> np.dtype:
        return np.dtype(self._array.dtype)


def voxel_masks(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Voxel lists of every label, in NWB's ``(x, y, z, weight)`` order.

    Parameters
    ----------
    labels : ndarray of int of shape (z, y, x)
        0 is background; every other value is one cell.

    Returns
    -------
    ids : ndarray of int of shape (n_cells,)
        The label values present, ascending.
    masks : ndarray of float of shape (n_voxels, 4)
        Rows ``(x, y, z, 1.0)`` grouped by label, in the order of ``ids``.
    ends : ndarray of int of shape (n_cells,)
        Exclusive end row of each label's voxels in ``masks`` (a ragged-array index).
    """
    flat = labels.ravel()
    nz = np.flatnonzero(flat)
    order = np.argsort(flat[nz], kind="stable")
    idx = nz[order]
    lab = flat[idx]
    z, y, x = np.unravel_index(idx, labels.shape)
    ids, counts = np.unique(lab, return_counts=True)
    masks = np.column_stack([x, y, z, np.ones(idx.size)]).astype(np.float64)
    return ids, masks, np.cumsum(counts)


def _regular(t_s: np.ndarray) -> bool:
    if t_s.size < 3:
        return False
    d = np.diff(t_s)
    return bool(np.allclose(d, d[0], rtol=1e-9, atol=1e-12))


def _timing(t_s: np.ndarray) -> dict[str, Any]:
    """``rate``/``starting_time`` for a regular grid, else ``timestamps``."""
    if _regular(t_s):
        return {"starting_time": float(t_s[0]), "rate": float(1.0 / np.diff(t_s)[0])}
    return {"timestamps": np.asarray(t_s, np.float64)}


def _start_time(session: Session) -> _dt.datetime:
    stamps = [rec.get("started", "") for rec in session.manifest.get("stages", {}).values()]
    for s in sorted(s for s in stamps if s):
        try:
            t = _dt.datetime.fromisoformat(s)
        except ValueError:
            continue
        return t if t.tzinfo else t.replace(tzinfo=_dt.UTC)
    return _dt.datetime.now(_dt.UTC)


def _ophys(nwb: Any, session: Session, settings: Any, embed_volumes: bool) -> Any:
    from pynwb.ophys import (
        DfOverF,
        Fluorescence,
        ImageSegmentation,
        OpticalChannel,
        PlaneSegmentation,
        TwoPhotonSeries,
    )

    im = settings.imaging
    vz, vy, vx = session.voxel_size_um
    device = nwb.create_device(name="microscope", description="volumetric microscope; "
                               "volumes (t, z, y, x) sampled plane by plane")
    channel = OpticalChannel(name="green", description=f"{im.indicator} fluorescence",
                             emission_lambda=float(im.emission_nm))
    plane = nwb.create_imaging_plane(
        name="imaging_volume", optical_channel=channel, device=device,
        description=f"whole volume, voxel size (x, y, z) = ({vx}, {vy}, {vz}) um",
        excitation_lambda=float(im.excitation_nm), indicator=im.indicator, location=im.location,
        imaging_rate=float(im.volume_rate_hz), grid_spacing=[vx, vy, vz],
        grid_spacing_unit="micrometers", origin_coords=[0.0, 0.0, 0.0],
        origin_coords_unit="micrometers", reference_frame="voxel (0, 0, 0) of the volumes")
    t_s = session.time_s
    if session.has("volumes"):
        vol = session.store.volumes()
        n_t, n_z, n_y, n_x = vol.shape
        common = {"name": "volumes", "imaging_plane": plane, "unit": "n.a.",
                  "description": "ingested volumes; NWB axes (t, x, y, z); each plane z is "
                  "sampled at the volume start plus processing/ophys/plane_time_offsets[z]",
                  **_timing(t_s[:n_t])}
        if embed_volumes:
            data = _ZarrBlocks(vol, (0, 3, 2, 1), buffer_gb=0.25)
            series = TwoPhotonSeries(data=data, format="raw", **common)
        else:
            series = TwoPhotonSeries(external_file=["volumes.ome.zarr"], format="external",
                                     starting_frame=[0], dimension=[n_x, n_y, n_z],
                                     num_samples=int(n_t), **common)
            series.fields["comments"] = ("OME-Zarr (zarr v3) image next to this file; array "
                                         "'0' has axes (t, z, y, x)")
        nwb.add_acquisition(series)
    if not session.has("labels"):
        return plane
    module = nwb.create_processing_module(name="ophys", description="cells and their traces")
    seg = ImageSegmentation(name="ImageSegmentation")
    module.add(seg)
    ps = PlaneSegmentation(name="cells", description="3-D voxel masks from the cell label "
                           "image; ids are the label values (cells.parquet id)",
                           imaging_plane=plane)
    seg.add_plane_segmentation(ps)
    ids, masks, ends = voxel_masks(session.labels)
    start = 0
    for cid, end in zip(ids, ends, strict=True):
        ps.add_roi(id=int(cid), voxel_mask=[tuple(r) for r in masks[start:end]])
        start = int(end)
    if session.has("plane_times_s"):
        pt = session.plane_times_s
        from pynwb import TimeSeries

        module.add(TimeSeries(name="plane_time_offsets", data=pt - pt.min(axis=1, keepdims=True),
                              unit="seconds", description="sample time of plane z of volume k "
                              "minus the volume's start time (t, z)", **_timing(t_s[: len(pt)])))
    region = ps.create_roi_table_region(description="all cells", region=list(range(len(ids))))
    found = [k for k in TRACE_KINDS if (session.root / "session.zarr" / "traces" / k).exists()]
    boxes: dict[str, Any] = {}
    for key, cls, name, kinds in (("fl", Fluorescence, "Fluorescence", {"raw", "neuropil",
                                                                        "corrected"}),
                                  ("dff", DfOverF, "DfOverF", {"dff", "denoised"}),
                                  ("ev", Fluorescence, "Deconvolved", {"events"})):
        if kinds & set(found):
            boxes[key] = cls(name=name)
            module.add(boxes[key])  # before the series, so the ROI region shares an ancestor
    import zarr

    for kind in found:
        path = session.root / "session.zarr" / "traces" / kind
        arr = zarr.open_array(str(path), mode="r")
        if arr.shape[0] != len(ids):
            raise StoreError(f"{path}: {arr.shape[0]} traces but {len(ids)} cells in the label "
                             f"image; re-run `forkmap run --from cells`")
        unit = str(arr.attrs.get("unit", "")) or ("n.a." if kind == "dff" else "a.u.")
        box = boxes["dff" if kind in ("dff", "denoised") else "ev" if kind == "events" else "fl"]
        box.create_roi_response_series(
            name=_TRACE_NAMES[kind], data=_ZarrBlocks(arr, (1, 0), buffer_gb=0.1), rois=region,
            unit=unit, description=f"{kind} trace per cell (t, cells); a cell in plane z is "
            f"sampled at the timestamp plus plane_time_offsets[z]", **_timing(t_s[: arr.shape[1]]))
    return plane


def _behaviour(nwb: Any, session: Session) -> None:
    from pynwb import TimeSeries
    from pynwb.behavior import CompassDirection, Position
    from pynwb.epoch import TimeIntervals

    if not session.has("behaviour"):
        return
    beh = session.behaviour
    timing = _timing(beh["t_s"].to_numpy(np.float64))
    module = nwb.create_processing_module(name="behavior", description="virtual-world "
                                          "behaviour on the imaging clock (clock model of the "
                                          "align stage)")
    frame = "virtual world, x and y in mm converted to metres; heading from +x, CCW positive"
    pos = Position(name="Position")
    pos.create_spatial_series(name="animal", data=beh[["x_mm", "y_mm"]].to_numpy(np.float64),
                              unit="meters", conversion=1e-3, reference_frame=frame,
                              description="animal position (x, y)", **timing)
    for tgt in session.target_names():
        pos.create_spatial_series(
            name=f"target_{tgt}", data=beh[[f"{tgt}_x_mm", f"{tgt}_y_mm"]].to_numpy(np.float64),
            **timing, unit="meters", conversion=1e-3,
            reference_frame=frame, description=f"target {tgt} position (NaN while absent)")
    module.add(pos)
    compass = CompassDirection(name="CompassDirection")
    compass.create_spatial_series(name="heading", data=beh["heading_rad"].to_numpy(np.float64),
                                  **timing, unit="radians",
                                  reference_frame="from +x, counter-clockwise positive",
                                  description="heading of the animal")
    module.add(compass)
    if "turn_rad_s" in beh and np.isfinite(beh["turn_rad_s"]).any():
        module.add(TimeSeries(name="turn_command", data=beh["turn_rad_s"].to_numpy(np.float64),
                              **timing, unit="radians/second",
                              description="turn command; positive = leftward (CCW)"))
    if session.has("bouts"):
        bouts = session.bouts
        table = TimeIntervals(name="turn_bouts", description="turn events (bouts); angle "
                              "positive = leftward turn")
        extra = [c for c in bouts.columns if c not in ("onset_s", "offset_s")
                 and pd.api.types.is_numeric_dtype(bouts[c])]
        for c in extra:
            table.add_column(name=c, description=c.replace("_", " "))
        for r in bouts.to_dict("records"):
            table.add_interval(start_time=float(r["onset_s"]), stop_time=float(r["offset_s"]),
                               **{c: r[c] for c in extra})
        module.add(table)
    _trials(nwb, session, beh)


def _trials(nwb: Any, session: Session, beh: pd.DataFrame) -> None:
    if "trial" not in beh:
        return
    splits = session.splits if session.has("splits") else pd.DataFrame(columns=["trial"])
    split_col = next((c for c in ("split_s", "t_split_s", "split_time_s") if c in splits), None)
    nwb.add_trial_column(name="split_time", description="time of the trial's first split "
                         "(s, imaging clock; NaN without a split)")
    nwb.add_trial_column(name="chosen_target", description="target chosen after the split")
    nwb.add_trial_column(name="trial_id", description="trial number in the rig log")
    if {"level", "split_s"} <= set(splits.columns):
        splits = splits.sort_values(["trial", "level"])
    trial: Any
    for trial, rows in beh[beh["trial"] >= 0].groupby("trial", sort=True):  # -1: between trials
        hit = splits[splits["trial"] == trial] if "trial" in splits else splits.iloc[:0]
        # the first split's time; the target finally chosen (last level's choice)
        split = float(hit[split_col].iloc[0]) if split_col and len(hit) else float("nan")
        chosen = str(hit["chosen"].iloc[-1]) if "chosen" in hit and len(hit) else ""
        nwb.add_trial(start_time=float(rows["t_s"].min()), stop_time=float(rows["t_s"].max()),
                      split_time=split, chosen_target=chosen, trial_id=int(trial))


def export_nwb(settings: Any, store: Any, *, embed_volumes: bool = False) -> Path:
    """Write ``<output>/session.nwb`` from a session store.

    Parameters
    ----------
    settings : Settings
        The parsed config (session, subject and imaging metadata).
    store : Store
        The session store to export.
    embed_volumes : bool, default=False
        Copy the volumes into the file (streamed) instead of referencing ``volumes.ome.zarr``.

    Returns
    -------
    Path
        The written file; it is written under a temporary name and moved into place, so a
        reader never sees half a file.

    Raises
    ------
    StoreError
        Nothing has been run, or traces and labels disagree.

    References
    ----------
    .. [1] Rübel O, et al. (2022). The Neurodata Without Borders ecosystem for
       neurophysiological data science. eLife 11:e78362. doi:10.7554/eLife.78362
    """
    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.file import Subject

    session = Session(store)
    if not session.stages_done():
        raise StoreError(f"{store.root}: no stage has run; run `forkmap run` before exporting")
    ss = settings.session
    ident = uuid.uuid5(uuid.NAMESPACE_URL, f"forkmap:{store.root.resolve()}:{ss.name}")
    nwb = NWBFile(session_description=ss.description or f"forkmap session {ss.name}",
                  identifier=str(ident), session_start_time=_start_time(session),
                  session_id=ss.name, source_script="forkmap export --nwb",
                  source_script_file_name="pipeline/export/nwb.py",
                  experiment_description="closed-loop target choice in a virtual world; "
                  "whole-brain imaging at cellular resolution",
                  keywords=["calcium imaging", "closed loop", "decision", "virtual reality"])
    age = getattr(ss, "subject_age", "") or None
    if age is None:
        log.warning("NWB export: subject age unknown (set session.subject_age, ISO 8601 "
                    "duration such as 'P6D')")
    nwb.subject = Subject(subject_id=ss.subject, species=ss.species, age=age,
                          sex=getattr(ss, "subject_sex", "") or "U",
                          description="imaged larva")
    _ophys(nwb, session, settings, embed_volumes)
    _behaviour(nwb, session)
    out = Path(store.root) / "session.nwb"
    tmp = out.with_name(f".session.tmp{os.getpid()}.nwb")
    try:
        with NWBHDF5IO(str(tmp), "w") as io:
            io.write(nwb)
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)
    return out
