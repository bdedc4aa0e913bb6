"""The ``align`` stage: trigger pulses -> clock model -> behaviour on every plane's time.

Outputs (``session.zarr/align/``)::

    plane_times_s          (t, z) microscope-clock time of every kept plane
    behaviour_t_scope_s    (n_samples,) the behaviour samples on the microscope clock
    <variable>             (t, z) or (t, z, target): every behaviour variable resampled

The clock model goes into the stage record (``info.clock``) and the attributes of
``plane_times_s``; clock jumps become store warnings.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pipeline.align.clocks import ClockModel, fit_clock
from pipeline.align.pulses import bracket_times, edge_brackets, pulses_from_timestamps
from pipeline.align.resample import resample_behaviour
from pipeline.align.timing import plane_times
from pipeline.errors import AlignmentError, InputError
from pipeline.stages import stage

__all__ = ["run_align", "read_times", "acquired_plane_times", "align_kernels"]


def read_times(path: Path, *, what: str) -> np.ndarray:
    """Times (s) from a one-column CSV (header optional); errors name the file line."""
    try:
        df = pd.read_csv(path, header=None, dtype=str, skip_blank_lines=False)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"{what} {path}: cannot read as CSV: {exc}") from None
    col = df.iloc[:, 0]
    vals = pd.to_numeric(col, errors="coerce").to_numpy(np.float64)
    start = 1 if (vals.size and np.isnan(vals[0])) else 0     # a header line
    bad = np.flatnonzero(np.isnan(vals[start:]))
    if bad.size:
        i = int(bad[0]) + start
        raise InputError(f"{what} {path}: file line {i + 1}: {col.iloc[i]!r} is not a time in "
                         "seconds")
    return vals[start:]


def acquired_plane_times(imaging: Any, n_volumes: int) -> np.ndarray:
    """(n_volumes, planes_per_volume) times of every acquired plane, flyback planes included."""
    ts = None
    if imaging.plane_timestamps is not None:
        ts = read_times(imaging.plane_timestamps, what="imaging.plane_timestamps")
    return plane_times(n_volumes, imaging.planes_per_volume,
                       volume_rate_hz=imaging.volume_rate_hz, plane_order=imaging.plane_order,
                       flyback_s=imaging.flyback_s, plane_timestamps_s=ts,
                       source=str(imaging.plane_timestamps))


def align_kernels(table: pd.DataFrame, geometry: dict[str, np.ndarray],
                  bout_onsets_rig_s: np.ndarray, acquired_s: np.ndarray, kept_planes: list[int],
                  sync: Any, pulses_rig_s: np.ndarray | None = None, *,
                  source: str = "rig log", pulse_source: str | None = None
                  ) -> tuple[ClockModel, np.ndarray, float, dict[str, np.ndarray]]:
    """Clock model, kept-plane times, exposure and resampled variables (no store I/O).

    ``source`` names the rig log and ``pulse_source`` where the pulses come from (default: the
    log's trigger column) in error messages.

    Raises
    ------
    AlignmentError
        No trigger pulse; a log that covers less rig time than ``sync.min_match_fraction`` of
        the imaging session; too few events matched (from :func:`fit_clock`). The message
        starts with the file (and column) the pulses came from.
    """
    t_rig = table["t_rig_s"].to_numpy(np.float64)
    if pulse_source is None:
        pulse_source = f"{source}, column {sync.trigger_column!r}"
    brackets = None
    if pulses_rig_s is None:
        # a sampled edge brackets its pulse: after the last low sample, at or before the first
        # high one (the interval fit of the clock uses both ends)
        high, low = edge_brackets(table[sync.trigger_column].to_numpy(np.float64), t_rig,
                                  min_interval_s=sync.debounce_s)
        pulses_rig_s = bracket_times(high, low, edge_time=sync.edge_time)
        brackets = (low, high)
    if sync.pulse_per == "volume":
        events = acquired_s.min(axis=1)
    else:
        events = np.sort(acquired_s.ravel())
    _check_coverage(t_rig, np.asarray(pulses_rig_s), events, sync, source, pulse_source)
    try:
        model = fit_clock(pulses_rig_s, events, min_match_fraction=sync.min_match_fraction,
                          tolerance=sync.match_tolerance,
                          jump_threshold_ms=sync.jump_threshold_ms,
                          pulse_bracket_rig_s=brackets)
    except AlignmentError as exc:
        raise AlignmentError(f"{pulse_source}: {exc}") from None
    kept = acquired_s[:, kept_planes]
    srt = np.sort(acquired_s[0])
    plane_period_s = float(np.median(np.diff(srt))) if srt.size > 1 else float(
        np.median(np.diff(events)))
    exposure_s = sync.exposure_s or plane_period_s
    cont = {name: table[name].to_numpy(np.float64)
            for name in ("x_mm", "y_mm", "turn_rad_s", "vigor", "bout")}
    cont["distance_mm"] = geometry["distance_mm"]
    cont["subtended_rad"] = geometry["subtended_rad"]
    angles = {"heading_rad": table["heading_rad"].to_numpy(np.float64),
              "bearing_rad": geometry["bearing_rad"], "bisector_rad": geometry["bisector_rad"]}
    out = resample_behaviour(t_rig, kept, clock=model, exposure_s=exposure_s, continuous=cont,
                             angles=angles, labels={"trial": table["trial"].to_numpy()},
                             events_rig_s={"bout_onsets": bout_onsets_rig_s})
    out["bout_fraction"] = out.pop("bout")
    return model, kept, exposure_s, out


def _check_coverage(t_rig_s: np.ndarray, pulses_rig_s: np.ndarray, events_s: np.ndarray,
                    sync: Any, source: str, pulse_source: str) -> None:
    """Fail early, with a clear message, on no pulses or a log shorter than the imaging."""
    n = t_rig_s.size
    if pulses_rig_s.size == 0:
        raise AlignmentError(f"{pulse_source}: no trigger pulse in the {n} rows (no rising edge "
                             f"above 0.5); expected one pulse per {sync.pulse_per} "
                             f"({events_s.size} imaging events)")
    period_s = float(np.median(np.diff(events_s))) if events_s.size > 1 else 0.0
    imaging_s = float(events_s[-1] - events_s[0]) + period_s
    log_s = float(t_rig_s[-1] - t_rig_s[0]) if n else 0.0
    if log_s < sync.min_match_fraction * imaging_s:
        raise AlignmentError(f"{source}: the log covers {log_s:.1f} s of rig time (rows 1..{n}) "
                             f"but the imaging session lasts {imaging_s:.1f} s "
                             f"({events_s.size} imaging events); the log is shorter than the "
                             f"imaging session (sync.min_match_fraction = "
                             f"{sync.min_match_fraction:g})")


_UNITS = {"x_mm": "mm", "y_mm": "mm", "turn_rad_s": "rad/s", "vigor": "rig units",
          "bout_fraction": "fraction of exposure", "distance_mm": "mm", "subtended_rad": "rad",
          "heading_rad": "rad", "bearing_rad": "rad", "bisector_rad": "rad", "trial": "id",
          "bout_onsets": "count"}


@stage("align", requires=("ingest", "behaviour"), sections=("imaging", "sync"),
       inputs=("sync",), enabled=lambda s: s.behaviour is not None)
def run_align(settings: Any, store: Any, compute: Any) -> None:
    """Fit the clock and resample the behaviour onto every plane's sample time."""
    sync, imaging = settings.sync, settings.imaging
    table = store.read_table("behaviour.parquet")
    names = list(store.read_array("behaviour/bearing_rad").attrs.get("targets", []))
    geometry = {k: store.read_array(f"behaviour/{k}")[...]
                for k in ("bearing_rad", "distance_mm", "subtended_rad", "bisector_rad")}
    bouts = store.read_table("bouts.parquet")
    n_volumes = int(store.volumes().shape[0])
    acquired = acquired_plane_times(imaging, n_volumes)
    flyback = set(imaging.flyback_planes)
    kept_planes = [p for p in range(imaging.planes_per_volume) if p not in flyback]
    pulses = None
    source = f"rig log {settings.behaviour.log}"
    pulse_source = None
    if sync.timestamps is not None:
        pulse_source = f"sync.timestamps {sync.timestamps}"
        pulses = pulses_from_timestamps(read_times(sync.timestamps, what="sync.timestamps"),
                                        min_interval_s=sync.debounce_s,
                                        source=str(sync.timestamps))
    model, kept, exposure_s, out = align_kernels(
        table, geometry, bouts["onset_rig_s"].to_numpy(np.float64), acquired, kept_planes, sync,
        pulses, source=source, pulse_source=pulse_source)
    for note in model.notes:
        store.warn(note)
    if model.spurious_pulse_indices:
        k = len(model.spurious_pulse_indices)
        store.warn(f"{k} trigger pulse{'s were' if k > 1 else ' was'} spurious (matched no "
                   f"imaging event) and ignored (first pulse indices: "
                   f"{list(model.spurious_pulse_indices[:5])})")
    if model.dropped_volume_indices:
        store.warn(f"{len(model.dropped_volume_indices)} imaging events had no trigger pulse "
                   f"(first: {list(model.dropped_volume_indices[:5])})")
    clock = model.to_dict()
    store.write_array("align/plane_times_s", kept, dimension_names=("t", "z"),
                      attrs={"unit": "s", "clock": "microscope", "exposure_s": exposure_s,
                             "clock_model": clock})
    store.write_array("align/behaviour_t_scope_s",
                      model.rig_to_scope(table["t_rig_s"].to_numpy(np.float64)),
                      dimension_names=("sample",), attrs={"unit": "s", "clock": "microscope"})
    for name, arr in out.items():
        dims = ("t", "z", "target") if arr.ndim == 3 else ("t", "z")
        attrs: dict[str, Any] = {"unit": _UNITS.get(name, "")}
        if arr.ndim == 3:
            attrs["targets"] = names
        store.write_array(f"align/{name}", arr, dimension_names=dims, attrs=attrs)
    store.set_info({"clock": clock, "exposure_s": exposure_s,
                    "residual_rms_ms": model.residual_rms_ms, "matched": model.matched})
