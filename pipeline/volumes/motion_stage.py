"""Stage ``motion``: rigid shifts, reference, quality, flags and the summary images.

Three passes over the volumes, all through :meth:`Compute.map` with picklable tasks that open
the zarr arrays themselves:

1. the mean of the reference block (``motion.reference_start``, ``motion.reference_count``);
2. the reference block registered to that mean and averaged again (the reference);
3. every volume registered to the reference; the same task shifts each volume and adds it to a
   :class:`~pipeline.volumes.summary.SummaryAccumulator`, so the mean and local-correlation
   images come out of this pass without reading the volumes again.

Outputs under ``session.zarr/motion``: ``shifts_vox`` and ``shifts_um`` (t, 3), ``quality``
(t,), ``flags`` (t, 4) bool (columns in ``attrs["columns"]``), ``reference``, ``mean`` and
``local_corr`` (z, y, x) float32.
"""

from __future__ import annotations

import hashlib
import shutil
import threading
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from pipeline.compute import Compute
from pipeline.config import Settings
from pipeline.errors import ConfigError
from pipeline.stages import stage
from pipeline.store import StageStore, VolumeReader
from pipeline.volumes.motion import (
    prepare_reference,
    register_volume,
    registered_sum,
)
from pipeline.volumes.motion_flags import MotionFlags, flag_motion
from pipeline.volumes.summary import BLOCK32_MAX_VOLUMES, SpilledSums, SummaryAccumulator

__all__ = ["run_motion", "estimation_options", "volume_groups"]

# The partition of volumes into tasks (and so the order in which float64 block sums are added)
# depends only on the session length and motion.block_volumes, never on the worker count, which
# keeps the reference and the summary images bit-identical on 1 or 2 threads and on a cluster.
# The registration pass merges accumulators in order as tasks finish (Compute.reduce), so memory
# holds about one accumulator per running task; the reference passes return one volume each.
_N_TASKS = 16


def estimation_options(settings: Settings) -> dict[str, Any]:
    """:func:`prepare_reference` options from ``[motion]`` and the voxel size.

    The high-pass acts in y and x only: planes are few and far apart, and a z high-pass would
    remove most of the signal that fixes z. The search is limited to twice ``max_shift_um``.
    """
    m = settings.motion
    vz, vy, vx = settings.imaging.voxel_size_um
    return {
        "bin_yx": m.bin_yx,
        "highpass_sigma_vox": (0.0, m.highpass_sigma_um / vy, m.highpass_sigma_um / vx),
        "tukey_alpha": m.tukey_alpha,
        "max_shift_vox": tuple(2 * m.max_shift_um / v for v in (vz, vy, vx)),
    }


def volume_groups(start: int, stop: int, *, block: int, n_tasks: int) -> list[tuple[int, int]]:
    """Split ``start..stop-1`` into at most ``n_tasks`` runs of at least ``block`` volumes."""
    n = stop - start
    if n <= 0:
        return []
    k = max(1, min(n_tasks, -(-n // max(1, block))))
    edges = np.linspace(start, stop, k + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True) if b > a]


def _get(arr: zarr.Array, key: Any = Ellipsis) -> np.ndarray:
    return np.asarray(arr[key])


# One prepared reference per process, keyed on the array's path, the hash of its content
# (``motion/reference``'s ``content_hash`` attribute) and the estimation options: every
# registration task of a worker used to read the reference and condition it again (~30 ms per
# task for a 30 x 256 x 256 reference; seconds for a full-size one).
_PREPARED: dict[tuple, tuple[np.ndarray, Any]] = {}
_PREPARED_LOCK = threading.Lock()


def content_hash(reference: np.ndarray) -> str:
    """BLAKE2b digest of an array's bytes, shape and dtype (the reference cache's key)."""
    h = hashlib.blake2b(digest_size=16)
    h.update(f"{reference.shape}{reference.dtype.str}".encode())
    for plane in np.atleast_2d(reference):     # plane by plane: no full-size copy
        h.update(np.ascontiguousarray(plane).tobytes())
    return h.hexdigest()


def load_reference(reference_path: str, options: dict[str, Any] | None
                   ) -> tuple[np.ndarray, Any]:
    """The reference at ``reference_path`` and its :func:`prepare_reference` conditioning
    (None without ``options``), both read-only and kept per process when the array carries a
    ``content_hash`` attribute (written by the motion stage) so a worker conditions it once."""
    arr = zarr.open_array(reference_path, mode="r")
    token = arr.attrs.get("content_hash")
    key = (reference_path, token, None if options is None else repr(sorted(options.items())))
    if token is not None:
        with _PREPARED_LOCK:
            hit = _PREPARED.get(key)
        if hit is not None:
            return hit
    reference = _get(arr)
    reference.setflags(write=False)
    prep = None if options is None else prepare_reference(reference, **options)
    if token is not None:
        with _PREPARED_LOCK:
            _PREPARED.clear()
            _PREPARED[key] = (reference, prep)
    return reference, prep


def clear_reference_cache() -> None:
    """Drop the per-process prepared reference (the motion stage calls it when done)."""
    with _PREPARED_LOCK:
        _PREPARED.clear()


def _block_sum(group: tuple[int, int], volumes_path: str) -> np.ndarray:
    """Task: float64 sum of volumes ``start..stop-1``."""
    arr = zarr.open_array(volumes_path, mode="r")
    read = VolumeReader(arr)
    total = np.zeros(arr.shape[1:], dtype=np.float64)
    for t in range(*group):
        total += read(t)
    return total


def _block_registered_sum(group: tuple[int, int], volumes_path: str, reference_path: str,
                          options: dict[str, Any], upsample: int) -> np.ndarray:
    """Task: sum of volumes ``start..stop-1`` registered to the reference at ``reference_path``."""
    read = VolumeReader(zarr.open_array(volumes_path, mode="r"))
    _, prep = load_reference(reference_path, options)
    total, _s, _q = registered_sum((read(t) for t in range(*group)), prep, upsample=upsample)
    return total


def _register_group(group: tuple[int, int], volumes_path: str, reference_path: str,
                    options: dict[str, Any], upsample: int, neighbourhood: int,
                    enabled: bool, spill_dir: str | None = None
                    ) -> tuple[list[np.ndarray], list[np.ndarray],
                               SummaryAccumulator | SpilledSums]:
    """Task: shifts and quality of volumes ``start..stop-1`` and their summary accumulator
    (written under ``spill_dir`` and returned as a handle when given).

    The sums are float32 over runs of at most ``BLOCK32_MAX_VOLUMES`` volumes (a group of
    ``motion.block_volumes <= 64`` is one run and is returned as float32); longer groups add
    their runs into float64 sums in volume order (see the numerical note of
    :mod:`pipeline.volumes.summary`)."""
    read = VolumeReader(zarr.open_array(volumes_path, mode="r"))
    reference, prep = load_reference(reference_path, options if enabled else None)

    def block() -> SummaryAccumulator:
        return SummaryAccumulator.empty(reference.shape, neighbourhood=neighbourhood,
                                        offset=reference, dtype="float32")

    acc = block()
    total: SummaryAccumulator | None = None
    n = group[1] - group[0]
    shifts = np.zeros((n, 3))
    quality = np.ones(n)
    for i, t in enumerate(range(*group)):
        if acc.n == BLOCK32_MAX_VOLUMES:       # fold the float32 run into float64
            total = _resolve(acc, reference, neighbourhood) if total is None else total.merge(acc)
            acc = block()
        vol = read(t)
        if prep is not None:
            shifts[i], quality[i] = register_volume(vol, prep, upsample=upsample)
            acc.update_shifted(vol, shifts[i])
        else:
            acc.update(vol)
    if total is not None:
        acc = total.merge(acc)
    if spill_dir is not None:
        return [shifts], [quality], acc.spill(str(Path(spill_dir) / f"sums_{group[0]}"))
    return [shifts], [quality], acc


def _resolve(acc: SummaryAccumulator | SpilledSums, offset: np.ndarray | None,
             neighbourhood: int) -> SummaryAccumulator:
    if isinstance(acc, SpilledSums):
        return SummaryAccumulator.empty(acc.shape, neighbourhood=neighbourhood,
                                        offset=offset).merge_spilled(acc)
    if acc.sum_x.dtype != np.float64:  # a task's float32 block starts the float64 total
        return SummaryAccumulator.empty(acc.shape, neighbourhood=acc.neighbourhood,
                                        offset=acc.offset).merge(acc)
    return acc


def _merge_groups(total: tuple, part: tuple, *, offset: np.ndarray | None = None,
                  neighbourhood: int = 26) -> tuple:
    """Merge one task's result into the running total (volume order is kept by the caller);
    spilled sums are read back with ``offset`` (the reference) and ``neighbourhood``."""
    acc = _resolve(total[2], offset, neighbourhood)
    p = part[2]
    acc = acc.merge_spilled(p) if isinstance(p, SpilledSums) else acc.merge(p)
    return total[0] + part[0], total[1] + part[1], acc


def spill_directory(compute: Compute, folder: Path) -> str | None:
    """Where tasks write their summary sums: ``None`` (return them) on the thread scheduler,
    whose tasks share the client's memory, else ``folder`` (created)."""
    if compute.scheduler == "threads":
        return None
    folder.mkdir(parents=True, exist_ok=True)
    return str(folder)


@stage("motion", requires=("ingest",), sections=("imaging", "motion"))
def run_motion(settings: Settings, store: StageStore, compute: Compute) -> None:
    """Estimate rigid motion, build the reference, flag outliers, fill the summary images."""
    m = settings.motion
    vox = np.asarray(settings.imaging.voxel_size_um, dtype=float)
    vol = store.volumes()
    T = int(vol.shape[0])
    if m.reference_start >= T:
        raise ConfigError(f"motion.reference_start = {m.reference_start}: the session has only "
                          f"{T} volumes")
    ref_stop = min(T, m.reference_start + m.reference_count)
    if ref_stop - m.reference_start < m.reference_count:
        store.warn(f"reference block shortened to volumes {m.reference_start}..{ref_stop - 1} "
                   f"(motion.reference_count = {m.reference_count}, {T} volumes)")
    vpath = store.volumes_path
    opts = estimation_options(settings)
    n_tasks = _N_TASKS
    ref_groups = volume_groups(m.reference_start, ref_stop, block=m.block_volumes,
                               n_tasks=n_tasks)
    n_ref = ref_stop - m.reference_start
    sums = compute.map(_block_sum, ref_groups, vpath, desc="motion: reference mean")
    reference = (np.sum(sums, axis=0) / n_ref).astype(np.float32)
    store.write_array("motion/reference", reference, dimension_names=("z", "y", "x"),
                      attrs={"unit": "camera counts", "content_hash": content_hash(reference)})
    ref_path = store.staged_array_path("motion/reference")
    if m.enabled:
        sums = compute.map(_block_registered_sum, ref_groups, vpath, ref_path, opts, m.upsample,
                           desc="motion: reference refine")
        reference = (np.sum(sums, axis=0) / n_ref).astype(np.float32)
        store.write_array("motion/reference", reference, dimension_names=("z", "y", "x"),
                          attrs={"unit": "camera counts",
                                 "content_hash": content_hash(reference)})
    groups = volume_groups(0, T, block=m.block_volumes, n_tasks=T)
    spill = spill_directory(compute, store.staging_path("motion-sums"))
    shift_blocks, quality_blocks, acc = compute.reduce(
        _register_group, groups, vpath, ref_path, opts, m.upsample, m.neighbourhood, m.enabled,
        spill, merge=partial(_merge_groups, offset=reference, neighbourhood=m.neighbourhood),
        desc="motion: register")
    clear_reference_cache()
    acc = _resolve(acc, reference, m.neighbourhood)
    if spill is not None:
        shutil.rmtree(spill, ignore_errors=True)
    shifts = np.concatenate(shift_blocks)
    quality = np.concatenate(quality_blocks)
    mean, local_corr = acc.finalize()
    flags = flag_motion(shifts, quality, voxel_size_um=tuple(vox), max_shift_um=m.max_shift_um,
                        z_drift_fraction=m.z_drift_fraction, quality_mad=m.quality_mad)
    _write(store, shifts, quality, flags, mean, local_corr, vox)
    counts = flags.counts()
    for name, k in counts.items():
        if k:
            store.warn(f"{k} of {T} volumes flagged '{name}'")
    store.set_info({"reference_volumes": [m.reference_start, ref_stop],
                    "flag_counts": counts, "median_quality": float(np.median(quality)),
                    "max_shift_um": float(np.linalg.norm(shifts * vox, axis=1).max()),
                    "enabled": m.enabled})


def _write(store: StageStore, shifts: np.ndarray, quality: np.ndarray, flags: MotionFlags,
           mean: np.ndarray, local_corr: np.ndarray, vox: np.ndarray) -> None:
    axes = ("t", "axis")
    store.write_array("motion/shifts_vox", shifts, dimension_names=axes,
                      attrs={"unit": "voxel", "axes": ["z", "y", "x"],
                             "convention": "volume_t(r) = reference(r - shift)"})
    store.write_array("motion/shifts_um", shifts * vox[None, :], dimension_names=axes,
                      attrs={"unit": "um", "axes": ["z", "y", "x"]})
    store.write_array("motion/quality", quality, dimension_names=("t",),
                      attrs={"doc": "correlation peak relative to perfect alignment, 0..1"})
    store.write_array("motion/flags", flags.as_array(), dimension_names=("t", "flag"),
                      attrs={"columns": list(MotionFlags.NAMES)})
    store.write_array("motion/mean", mean, dimension_names=("z", "y", "x"),
                      attrs={"unit": "camera counts", "doc": "mean of registered volumes"})
    store.write_array("motion/local_corr", local_corr, dimension_names=("z", "y", "x"),
                      attrs={"doc": "correlation of each voxel with its neighbours' mean"})
