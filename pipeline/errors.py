"""The project's own errors.

Every error a user can cause by a bad config or a bad input file is a :class:`ForkmapError`;
the command line prints these as one clean line (exit code 2). Anything else is a bug and is
shown with its traceback.
"""

from __future__ import annotations

__all__ = [
    "ForkmapError",
    "ConfigError",
    "InputError",
    "StoreError",
    "LockError",
    "StageError",
    "AlignmentError",
]


class ForkmapError(Exception):
    """Base class of every error forkmap raises on purpose."""


class ConfigError(ForkmapError, ValueError):
    """A config value is missing, of the wrong kind, or out of range."""


class InputError(ForkmapError, ValueError):
    """An input file (TIFF, rig log, timestamps) is unreadable or inconsistent.

    The message names the file and the page, row or column.
    """


class StoreError(ForkmapError):
    """The session store is missing a stage's output or is inconsistent."""


class LockError(StoreError):
    """Another forkmap run holds the lock on this output folder."""


class StageError(ForkmapError):
    """A stage cannot run (for example a stage it depends on has not run)."""


class AlignmentError(ForkmapError, ValueError):
    """Imaging and behaviour clocks cannot be matched (too few triggers, clock jump...)."""
