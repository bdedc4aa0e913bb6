"""Rig behaviour: reading and validating the log, turn events, target geometry, splits."""

from pipeline.behaviour.bouts import BOUT_COLUMNS, detect_turns, heading_velocity
from pipeline.behaviour.density import TrajectoryDensity, trajectory_density
from pipeline.behaviour.geometry import (
    TargetSet,
    circular_mean,
    egocentric_bearing,
    target_distance,
    target_set_geometry,
    wrap_angle,
)
from pipeline.behaviour.log import CANONICAL_COLUMNS, DEFAULT_COLUMNS, LogSpec, read_log
from pipeline.behaviour.splits import (
    SPLIT_COLUMNS,
    CrossingPrior,
    critical_angle,
    critical_angle_brackets,
    crossing_prior,
    detect_splits,
)

__all__ = [
    "BOUT_COLUMNS",
    "CANONICAL_COLUMNS",
    "DEFAULT_COLUMNS",
    "SPLIT_COLUMNS",
    "LogSpec",
    "CrossingPrior",
    "TargetSet",
    "TrajectoryDensity",
    "circular_mean",
    "critical_angle",
    "critical_angle_brackets",
    "crossing_prior",
    "detect_splits",
    "detect_turns",
    "egocentric_bearing",
    "heading_velocity",
    "read_log",
    "target_distance",
    "target_set_geometry",
    "trajectory_density",
    "wrap_angle",
]
