"""Scenario parameters: presets from ``params.toml`` into frozen dataclasses.

Every preset starts from ``[default]`` and replaces the keys it names; a caller can replace
more keys with ``overrides`` (``{"imaging": {"n_volumes": 40}}``). Unknown sections or keys
raise :class:`pipeline.errors.ConfigError` naming ``section.key``.
"""

from __future__ import annotations

import dataclasses
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError

__all__ = ["Scenario", "load_scenario", "preset_names", "PARAMS_PATH"]

PARAMS_PATH = Path(__file__).with_name("params.toml")

Pair = tuple[float, float]
Triple = tuple[float, float, float]


@dataclass(frozen=True)
class Imaging:
    shape_zyx: tuple[int, int, int]
    voxel_size_um: Triple
    n_volumes: int
    volume_rate_hz: float
    flyback_s: float

    @property
    def n_planes(self) -> int:
        return self.shape_zyx[0]

    @property
    def plane_period_s(self) -> float:
        return (1.0 / self.volume_rate_hz - self.flyback_s) / self.n_planes


@dataclass(frozen=True)
class Indicator:
    name: str
    rise_s: float
    decay_s: float
    source: str


@dataclass(frozen=True)
class Camera:
    offset_adu: float
    gain_adu_per_e: float
    read_noise_e: float
    source: str


@dataclass(frozen=True)
class Brain:
    tissue_e: float
    outside_e: float
    semi_axes_fraction_zyx: Triple
    edge_um: float
    midline_depth: float
    n_neuropil_yx: tuple[int, int]
    neuropil_sigma_um: float
    neuropil_gain: float
    bleach_fraction: float
    excitation_ripple: float
    excitation_period_s: float
    cell_drift_sd: float
    cell_drift_timescale_s: float


@dataclass(frozen=True)
class Cells:
    n_cells: int
    radius_um: Pair
    min_separation_um: float
    sheet_sigma_um: float
    brightness_e: float
    brightness_log_sd: float
    fraction_bearing: float
    fraction_premotor: float
    fraction_vigor: float
    bearing_target_weights: Triple
    bearing_epoch_weights: Triple
    bearing_amplitude: Pair
    kappa: Pair
    premotor_amplitude: Pair
    premotor_max_gain: float
    lead_s: float
    vigor_amplitude: Pair
    spont_rate_hz: float
    tuned_spont_rate_hz: float
    spont_amplitude: float
    spont_log_sd: float
    grid_dt_s: float


@dataclass(frozen=True)
class Behaviour:
    rig_rate_hz: float
    jitter_s: float
    lead_in_s: float
    lead_out_s: float
    first_trial_delay_s: float
    critical_angle_deg: float
    target_distance_mm: Pair
    separation_deg: Pair
    start_heading_sd_deg: float
    three_target_fraction: float
    moving_target_fraction: float
    moving_amplitude_mm: float
    moving_period_s: Pair
    bout_rate_hz: float
    bout_min_interval_s: float
    bout_duration_s: Pair
    first_bout_delay_s: Pair
    step_mm: float
    vigor_log_sd: float
    turn_gain: float
    turn_noise_deg: float
    max_turn_deg: float
    choice_bias: float
    arrival_mm: float
    timeout_s: float
    iti_s: float


@dataclass(frozen=True)
class Clock:
    offset_s: float
    drift_ppm: float
    n_dropped: int


@dataclass(frozen=True)
class Motion:
    drift_sd_vox: Triple
    drift_timescale_s: float
    jump_rate_hz: float
    jump_sd_vox: Triple
    max_abs_vox: Triple


_SECTIONS: dict[str, type] = {
    "imaging": Imaging,
    "indicator": Indicator,
    "camera": Camera,
    "brain": Brain,
    "cells": Cells,
    "behaviour": Behaviour,
    "clock": Clock,
    "motion": Motion,
}


@dataclass(frozen=True)
class Scenario:
    """All parameters of one generated scenario (one frozen dataclass per section)."""

    preset: str
    seed: int
    imaging: Imaging
    indicator: Indicator
    camera: Camera
    brain: Brain
    cells: Cells
    behaviour: Behaviour
    clock: Clock
    motion: Motion

    def as_dict(self) -> dict[str, Any]:
        """Plain nested dict (tuples as lists), for ``truth/scenario.json``."""
        return _plain(dataclasses.asdict(self))


def _plain(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_plain(v) for v in obj]
    return obj


def _read_presets(path: Path = PARAMS_PATH) -> dict[str, Any]:
    with path.open("rb") as fh:
        return tomllib.load(fh)


def preset_names(path: Path = PARAMS_PATH) -> list[str]:
    """Names of the presets in ``params.toml``."""
    return list(_read_presets(path))


def _merge(base: dict[str, dict[str, Any]], extra: Mapping[str, Any], where: str) -> None:
    for section, table in extra.items():
        if section not in _SECTIONS:
            raise ConfigError(
                f"{where}: unknown section {section!r}: expected one of {sorted(_SECTIONS)}")
        if not isinstance(table, Mapping):
            raise ConfigError(f"{where}: {section} = {table!r}: expected a table of keys")
        known = {f.name for f in dataclasses.fields(_SECTIONS[section])}
        for key, value in table.items():
            if key not in known:
                raise ConfigError(f"{where}: unknown key {section}.{key}: expected one of "
                                  f"{sorted(known)}")
            base[section][key] = value


def _build(cls: type, table: dict[str, Any], where: str) -> Any:
    values = {}
    for f in dataclasses.fields(cls):
        value = table[f.name]
        tp = str(f.type)
        if tp in ("int",):
            if isinstance(value, bool) or not isinstance(value, int):
                raise ConfigError(f"{where}: {f.name} = {value!r}: expected a whole number")
        elif tp == "float":
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise ConfigError(f"{where}: {f.name} = {value!r}: expected a number")
            value = float(value)
        elif tp != "str":
            if not isinstance(value, list | tuple):
                raise ConfigError(f"{where}: {f.name} = {value!r}: expected a list")
            kind = int if "int" in tp else float
            n = 2 if tp in ("Pair", "tuple[int, int]") else 3
            if len(value) != n:
                raise ConfigError(f"{where}: {f.name} = {value!r}: expected {n} values")
            value = tuple(kind(v) for v in value)
        values[f.name] = value
    return cls(**values)


def load_scenario(preset: str = "default", *, seed: int = 0,
                  overrides: Mapping[str, Any] | None = None,
                  path: Path = PARAMS_PATH) -> Scenario:
    """Read a preset from ``params.toml`` and apply ``overrides``.

    Parameters
    ----------
    preset : str, default="default"
        Name of a top-level table of ``params.toml``.
    seed : int, default=0
        Seed of the scenario's random streams (kept in the result).
    overrides : mapping of section -> {key: value}, optional
        Further replacements, applied after the preset.
    path : Path
        The presets file.

    Returns
    -------
    Scenario

    Raises
    ------
    ConfigError
        Unknown preset, section or key, or a value of the wrong kind.
    """
    presets = _read_presets(path)
    if preset not in presets:
        raise ConfigError(f"{path.name}: preset {preset!r} not found: expected one of "
                          f"{sorted(presets)}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ConfigError(f"seed = {seed!r}: expected a whole number >= 0")
    merged: dict[str, dict[str, Any]] = {name: {} for name in _SECTIONS}
    _merge(merged, presets["default"], f"{path.name} [default]")
    if preset != "default":
        _merge(merged, presets[preset], f"{path.name} [{preset}]")
    if overrides:
        _merge(merged, overrides, "preset_overrides")
    sections = {}
    for name, cls in _SECTIONS.items():
        missing = [f.name for f in dataclasses.fields(cls) if f.name not in merged[name]]
        if missing:
            raise ConfigError(f"{path.name} [default.{name}]: missing keys {missing}")
        sections[name] = _build(cls, merged[name], f"{name}")
    return Scenario(preset=preset, seed=seed, **sections)
