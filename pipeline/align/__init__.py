"""Clock alignment: trigger pulses, the rig-to-microscope clock, plane times, resampling."""

from pipeline.align.clocks import (
    ClockModel,
    ClockSegment,
    PulseMatch,
    fit_clock,
    match_pulses,
)
from pipeline.align.interval_fit import IntervalLine, interval_line
from pipeline.align.pulses import edge_brackets, pulses_from_timestamps, rising_edges
from pipeline.align.resample import (
    count_in_windows,
    nearest_value,
    resample_behaviour,
    window_circmean,
    window_mean,
)
from pipeline.align.timing import acquisition_rank, plane_period, plane_times

__all__ = [
    "ClockModel",
    "ClockSegment",
    "IntervalLine",
    "PulseMatch",
    "acquisition_rank",
    "count_in_windows",
    "edge_brackets",
    "fit_clock",
    "interval_line",
    "match_pulses",
    "nearest_value",
    "plane_period",
    "plane_times",
    "pulses_from_timestamps",
    "resample_behaviour",
    "rising_edges",
    "window_circmean",
    "window_mean",
]
