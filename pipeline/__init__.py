"""forkmap: whole-brain imaging during closed-loop target choice, from TIFFs to tuning maps.

The Python API for results is :class:`Session` (``from pipeline import Session``); the pipeline
runs from the command line (``forkmap run CONFIG``) or :func:`pipeline.stages.run_stages`.
"""

from __future__ import annotations

from typing import Any

from pipeline.errors import ConfigError, ForkmapError, InputError, StoreError

__all__ = ["Session", "ForkmapError", "ConfigError", "InputError", "StoreError"]
__version__ = "0.1.0"


def __getattr__(name: str) -> Any:
    # Session pulls in dask and pandas; import it on first use so the CLI starts fast.
    if name == "Session":
        from pipeline.session import Session

        return Session
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
