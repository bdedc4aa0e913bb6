"""Import every module that registers a stage, so :func:`pipeline.stages.registry` sees them.

Add a new stage module here (the order of imports does not matter: the runner orders stages by
their dependencies).
"""

from __future__ import annotations

import importlib

#: The order stages run in when their dependencies allow it (unlisted stages come after).
PIPELINE_ORDER = ("ingest", "motion", "cells", "traces", "behaviour", "align", "decode",
                  "tuning", "report")

STAGE_MODULES = (
    "pipeline.volumes.stages",
    "pipeline.behaviour.stages",
    "pipeline.align.stages",
    "pipeline.analysis.stages",
    "pipeline.analysis.tuning_stage",
    "pipeline.report.stage",
)

for _name in STAGE_MODULES:
    importlib.import_module(_name)
