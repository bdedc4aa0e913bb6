"""Registers the imaging stages: ingest, motion, cells, traces.

``ingest`` and ``motion`` register themselves where they are defined; ``cells`` and ``traces``
keep their stage functions beside their kernels and are registered here.
"""

from __future__ import annotations

from pipeline.stages import stage
from pipeline.volumes import ingest, motion_stage  # noqa: F401  (register ingest, motion)
from pipeline.volumes.cells import run_cells
from pipeline.volumes.traces import run_traces

stage("cells", requires=("motion",), sections=("imaging", "cells"))(run_cells)
stage("traces", requires=("motion", "cells"), sections=("imaging", "traces"),
      resumable=True)(run_traces)
