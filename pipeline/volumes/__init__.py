"""Imaging path: TIFF input, ingest, motion, summary images, cells, traces.

Kernels here are pure NumPy functions of arrays; the stage functions that map them over the
session store live in their own modules (``ingest``, ``motion_stage``...).
"""

from __future__ import annotations

from pipeline.volumes.cell_residual import blob_patches, residual_seeds, subtract_blobs
from pipeline.volumes.cells import (
    CellDetection,
    detect_cells,
    local_maxima,
    log_response,
    log_sigma_vox,
    robust_threshold,
)
from pipeline.volumes.motion import (
    PreparedReference,
    build_reference,
    prepare_reference,
    register_volume,
    registered_sum,
    shift_volume,
)
from pipeline.volumes.motion_flags import MotionFlags, flag_motion, robust_zscore
from pipeline.volumes.summary import SummaryAccumulator, neighbour_mean
from pipeline.volumes.tiffio import (
    TiffInputs,
    describe_inputs,
    discover_inputs,
    file_index,
    iter_volumes,
    plane_slots,
    read_volume,
)

__all__ = [
    "CellDetection",
    "blob_patches",
    "detect_cells",
    "local_maxima",
    "log_response",
    "log_sigma_vox",
    "residual_seeds",
    "robust_threshold",
    "subtract_blobs",
    "MotionFlags",
    "PreparedReference",
    "SummaryAccumulator",
    "TiffInputs",
    "build_reference",
    "describe_inputs",
    "discover_inputs",
    "file_index",
    "flag_motion",
    "iter_volumes",
    "neighbour_mean",
    "plane_slots",
    "prepare_reference",
    "read_volume",
    "register_volume",
    "registered_sum",
    "robust_zscore",
    "shift_volume",
]
