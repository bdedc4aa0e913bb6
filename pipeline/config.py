"""Typed, validated settings: one frozen dataclass per TOML section.

The config file is parsed once by :func:`load_config`; every stage receives the resulting
:class:`Settings` and reads typed attributes (``settings.motion.upsample``). Each field carries
its default, unit and a one-line doc in its metadata; ``configs/template.toml`` documents them.

Relative paths resolve against the config file's folder.
"""

from __future__ import annotations

import dataclasses
import glob
import hashlib
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal

from pipeline._typedparse import closest, parse_section
from pipeline.errors import ConfigError

__all__ = [
    "Settings",
    "SessionSettings",
    "ImagingSettings",
    "BehaviourSettings",
    "TargetSpec",
    "SyncSettings",
    "MotionSettings",
    "CellsSettings",
    "TracesSettings",
    "DecodeSettings",
    "TuningSettings",
    "ReportSettings",
    "ComputeSettings",
    "SlurmSettings",
    "load_config",
    "parse_config",
    "section_hash",
]


def _f(default: Any = dataclasses.MISSING, doc: str = "", **meta: Any) -> Any:
    """A dataclass field with its doc and constraints in the metadata."""
    meta["doc"] = doc
    if isinstance(default, dict):
        return field(default_factory=lambda: MappingProxyType(dict(default)), metadata=meta)
    if default is dataclasses.MISSING:
        return field(metadata=meta)
    return field(default=default, metadata=meta)


# --------------------------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True)
class SessionSettings:
    output: Path = _f(doc="output folder of the session store", path="out")
    name: str = _f("session", doc="session name shown in the report and the NWB file")
    description: str = _f("", doc="free text kept in the manifest and the NWB file")
    subject: str = _f("larva", doc="subject id for the NWB export")
    species: str = _f("Danio rerio", doc="species for the NWB export")
    subject_age: str = _f("P6D", doc="subject age as an ISO 8601 duration (NWB), e.g. P6D")
    subject_sex: Literal["M", "F", "U", "O"] = _f("U", doc="subject sex for NWB (U = unknown)")


@dataclass(frozen=True, kw_only=True)
class ImagingSettings:
    raw: str = _f(doc="glob of the raw TIFF files (relative to the config file)")
    voxel_size_um: tuple[float, float, float] = _f(doc="voxel size (z, y, x)", unit="um", gt=0.0)
    volume_rate_hz: float = _f(doc="volumes per second", unit="Hz", gt=0.0)
    layout: Literal["per-volume", "per-plane", "stack"] = _f(
        "per-volume", doc="one file per volume, one file per plane, or long stacks (t-major)")
    index_regex: str = _f(r"(\d+)(?!.*\d)", doc="regex whose first group is the file index")
    plane_regex: str = _f(r"[Pp]lane_?(\d+)", doc="per-plane layout: regex of the plane index")
    planes_per_volume: int = _f(doc="planes acquired per volume, flyback planes included", ge=1)
    flyback_planes: tuple[int, ...] = _f((), doc="indices of acquired planes to drop", ge=0)
    plane_order: Literal["ascending", "descending", "alternating"] = _f(
        "ascending", doc="acquisition order of planes; alternating = bidirectional scan")
    flyback_s: float = _f(0.0, doc="dead time between the last plane and the next volume",
                          unit="s", ge=0.0)
    plane_timestamps: Path | None = _f(None, doc="optional CSV of per-plane times (s)",
                                       path="file")
    indicator: str = _f("GCaMP6s", doc="calcium indicator (for NWB and defaults)")
    decay_s: float = _f(1.8, doc="indicator decay time constant", unit="s", gt=0.0)
    rise_s: float = _f(0.18, doc="indicator rise time", unit="s", gt=0.0)
    chunk_planes: int = _f(0, doc="planes per zarr chunk (0 = the whole volume)", ge=0)
    drop_partial_volume: bool = _f(False, doc="drop an incomplete last volume with a warning "
                                   "instead of failing")
    codec: Literal["lz4", "zstd", "none"] = _f("lz4", doc="Blosc codec (bitshuffled)")
    codec_level: int = _f(5, doc="Blosc compression level", ge=0, le=9)
    excitation_nm: float = _f(488.0, doc="excitation wavelength for NWB", unit="nm", gt=0.0)
    emission_nm: float = _f(510.0, doc="emission wavelength for NWB", unit="nm", gt=0.0)
    location: str = _f("whole brain", doc="imaged region for NWB")

    def check(self) -> str | None:
        bad = [p for p in self.flyback_planes if p >= self.planes_per_volume]
        if bad:
            return (f"flyback_planes = {list(self.flyback_planes)}: indices must be below "
                    f"planes_per_volume = {self.planes_per_volume}")
        if len(self.flyback_planes) >= self.planes_per_volume:
            return "flyback_planes drops every plane"
        return None

    @property
    def n_planes(self) -> int:
        """Planes kept per volume (after dropping flyback planes)."""
        return self.planes_per_volume - len(set(self.flyback_planes))


@dataclass(frozen=True, kw_only=True)
class TargetSpec:
    name: str = _f(doc="target name (t0, t1, ... or a label)")
    x: str = _f(doc="log column of the target's x position")
    y: str = _f(doc="log column of the target's y position")


@dataclass(frozen=True, kw_only=True)
class BehaviourSettings:
    log: Path = _f(doc="rig log file (CSV or Parquet)", path="file")
    format: Literal["auto", "csv", "parquet"] = _f("auto", doc="log file format")
    columns: dict[str, str] = _f(
        {}, doc="canonical name -> log column: time, x, y, heading, turn, bout, vigor, trial, "
        "trigger")
    targets: tuple[TargetSpec, ...] = _f((), doc="targets, each with its position columns")
    time_unit: Literal["s", "ms", "us"] = _f("s", doc="unit of the time column")
    position_unit: Literal["mm", "um", "virtual"] = _f("mm", doc="unit of positions")
    position_scale_mm: float = _f(1.0, doc="mm per virtual unit (position_unit = virtual)",
                                  unit="mm", gt=0.0)
    angle_unit: Literal["rad", "deg"] = _f("rad", doc="unit of heading")
    max_gap_s: float = _f(0.05, doc="NaN runs up to this long are interpolated, longer fail",
                          unit="s", ge=0.0)
    turn_threshold_rad_s: float = _f(0.2, doc="a turn event reaches this |turn rate|",
                                     unit="rad/s", gt=0.0)
    turn_release_rad_s: float = _f(0.02, doc="a turn event lasts while |turn rate| is above",
                                   unit="rad/s", ge=0.0)
    bout_min_duration_s: float = _f(0.02, doc="shorter turn events are dropped", unit="s",
                                    ge=0.0)
    bout_min_gap_s: float = _f(0.05, doc="same-sign turn events closer than this merge",
                               unit="s", ge=0.0)
    split_resample_s: float = _f(0.1, doc="window a long movement is cut into for the split "
                                 "segmentation", unit="s", gt=0.0)
    split_penalty: float = _f(0.12, doc="loss a split must save (movements of 90 deg "
                              "disagreement with the steering model)", ge=0.0)
    split_step_max_s: float = _f(0.6, doc="longest movement taken as one step of the split "
                                 "segmentation", unit="s", gt=0.0)
    split_angle_prior: bool = _f(True, doc="re-time the splits with the critical angle of the "
                                 "steering-only splits as a prior (empirical Bayes)")
    split_prior_eps: float = _f(0.05, doc="weight of a uniform component in that prior (splits "
                                "the angle does not explain)", gt=0.0, lt=1.0)
    density_bin_mm: float = _f(0.5, doc="bin of the folded trajectory density map", unit="mm",
                               gt=0.0)
    bootstrap_resamples: int = _f(2000, doc="bootstrap resamples of the critical angle CI",
                                  ge=100)
    seed: int = _f(0, doc="seed of the critical-angle bootstrap", ge=0)


@dataclass(frozen=True, kw_only=True)
class SyncSettings:
    trigger_column: str = _f("trigger", doc="canonical column with the digital trigger")
    timestamps: Path | None = _f(None, doc="optional file of pulse times instead", path="file")
    debounce_s: float = _f(0.002, doc="edges closer than this are one pulse", unit="s", ge=0.0)
    min_match_fraction: float = _f(0.9, doc="fail when fewer volumes match a pulse", gt=0.0,
                                   le=1.0)
    pulse_per: Literal["volume", "plane"] = _f("volume", doc="one pulse per volume or plane")
    edge_time: Literal["midpoint", "first_high"] = _f(
        "midpoint", doc="time of a sampled edge: halfway from the last low sample, or the "
        "first high one")
    match_tolerance: float = _f(0.25, doc="largest pulse-to-event distance, in event periods",
                                gt=0.0, lt=0.5)
    jump_threshold_ms: float = _f(20.0, doc="a residual step this large is a clock jump",
                                  unit="ms", gt=0.0)
    exposure_s: float | None = _f(None, doc="plane exposure window for resampling (default: "
                                  "the plane period)", unit="s", gt=0.0)


@dataclass(frozen=True, kw_only=True)
class MotionSettings:
    enabled: bool = _f(True, doc="estimate rigid motion (false: all shifts zero)")
    reference_start: int = _f(0, doc="first volume of the reference block", ge=0)
    reference_count: int = _f(50, doc="volumes averaged for the reference", ge=1)
    upsample: int = _f(20, doc="sub-voxel refinement factor (1/upsample voxel)", ge=1)
    bin_yx: int = _f(2, doc="bin y and x by this factor for estimation (2: ~4x fewer FFT "
                     "voxels; demo shift error 0.04-0.06 voxel RMS against 0.03-0.05 "
                     "unbinned)", ge=1)
    highpass_sigma_um: float = _f(10.0, doc="high-pass before correlation (0 = off)", unit="um",
                                  ge=0.0)
    max_shift_um: float = _f(20.0, doc="shifts larger than this are flagged", unit="um", gt=0.0)
    z_drift_fraction: float = _f(0.5, doc="flag |dz| above this fraction of a plane", gt=0.0)
    quality_mad: float = _f(5.0, doc="flag quality below median - k * MAD", gt=0.0)
    block_volumes: int = _f(32, doc="volumes per registration task (each task reads the "
                            "reference and returns a summary accumulator of 4 float32 "
                            "volume-sized sums, so small tasks pay that overhead often)", ge=1)
    tukey_alpha: float = _f(0.25, doc="taper fraction of the analysis window", ge=0.0, le=1.0)
    neighbourhood: Literal[26, 6, 8] = _f(
        26, doc="local-correlation neighbours: 26 (cube), 6 (faces), 8 (same plane)")


@dataclass(frozen=True, kw_only=True)
class CellsSettings:
    diameter_um: float = _f(6.0, doc="expected cell (nucleus) diameter", unit="um", gt=0.0)
    min_separation_um: float = _f(4.0, doc="minimum distance between cell centres", unit="um",
                                  gt=0.0)
    threshold_mad: float = _f(4.0, doc="detection threshold: median + k * MAD of the filtered "
                              "image", gt=0.0)
    use_local_correlation: bool = _f(True, doc="combine mean and local-correlation images")
    corr_weight: float = _f(0.0, doc="weight of the local-correlation image in the mix",
                            ge=0.0, le=1.0)
    sigma_factor_yx: float = _f(0.75, doc="in-plane LoG sigma as a fraction of the "
                                "blob-matched radius / sqrt(3)", gt=0.0, le=2.0)
    residual_separation: float = _f(0.8, doc="residual pass: new cells farther than this "
                                    "many diameters from found ones (0 = off)", ge=0.0, le=2.0)
    tile_yx: tuple[int, int] = _f((256, 256), doc="core tile (y, x) of block-wise detection",
                                  unit="voxel", ge=1)


@dataclass(frozen=True, kw_only=True)
class TracesSettings:
    neuropil_r: float = _f(0.7, doc="corrected = cell - r * neuropil", ge=0.0, le=2.0)
    # measured on the demo (small seeds 0 and 1, default seed 0): inner / outer / margin of
    # 2 / 8 / 2 um raise the median dF/F correlation with the planted activity by 0.004-0.008
    # (a nucleus's blurred flank still holds ~10-20 % of its peak 1 um past its label's edge),
    # but moved the small demo's tuning sensitivity from 0.38 to 0.34; defaults kept for now
    ring_inner_um: float = _f(1.0, doc="neuropil ring starts this far from the cell's edge",
                              unit="um", ge=0.0)
    ring_outer_um: float = _f(6.0, doc="neuropil ring ends this far from the cell's edge",
                              unit="um", gt=0.0)
    baseline_window_s: float = _f(60.0, doc="running-percentile baseline window", unit="s",
                                  gt=0.0)
    baseline_percentile: float = _f(20.0, doc="percentile of the baseline", gt=0.0, lt=100.0)
    baseline_exclude_sigma: float = _f(2.0, doc="samples more than this many noise sigmas "
                                       "above a first baseline are left out of the baseline "
                                       "(twice), so sustained activity does not lift it "
                                       "(0 = plain running percentile)", ge=0.0)
    ring_margin_um: float = _f(1.0, doc="ring voxels closer than this to any cell are left out",
                               unit="um", ge=0.0)
    ring_max_voxels: int = _f(400, doc="nearest ring voxels kept per cell", ge=1)
    f0_floor: float = _f(1.0, doc="lower bound on the baseline F0", unit="counts", gt=0.0)
    f0_floor_frac: float = _f(0.1, doc="lower bound on F0 as a fraction of the cell's median",
                              ge=0.0)
    deconvolve: bool = _f(True, doc="OASIS deconvolution into events and a denoised dF/F trace")
    decay_s: float | None = _f(None, doc="AR(1) decay for deconvolution (default: "
                               "imaging.decay_s, the indicator's)", unit="s", gt=0.0)
    event_min_sigma: float = _f(3.0, doc="smallest event, in noise sigmas", ge=0.0)
    event_lam_sigma: float = _f(0.0, doc="L1 penalty on events, in noise sigmas", ge=0.0)
    block_volumes: int = _f(16, doc="volumes per extraction task", ge=1)
    block_cells: int = _f(1024, doc="cells per dF/F and deconvolution task", ge=1)

    def check(self) -> str | None:
        if self.ring_outer_um <= self.ring_inner_um:
            return (f"ring_outer_um = {self.ring_outer_um} must be larger than ring_inner_um = "
                    f"{self.ring_inner_um}")
        return None


@dataclass(frozen=True, kw_only=True)
class DecodeSettings:
    enabled: bool = _f(True, doc="run the decoders")
    feature: Literal["dff", "events"] = _f("dff", doc="activity used as features")
    lag_min_s: float = _f(-5.0, doc="earliest lag (negative = activity before the turn)",
                          unit="s")
    lag_max_s: float = _f(2.0, doc="latest lag", unit="s")
    alphas: tuple[float, ...] = _f((0.1, 1.0, 10.0, 100.0, 1e3, 1e4, 1e5),
                                   doc="ridge penalties tried by nested CV", gt=0.0)
    n_folds: int = _f(5, doc="outer cross-validation folds", ge=2)
    gap_s: float = _f(0.0, doc="extra gap either side of a test block (decay and lag span "
                      "are always added)", unit="s", ge=0.0)
    n_null: int = _f(200, doc="null refits (trial shuffles or circular shifts)", ge=0)
    pca_components: int = _f(0, doc="PCA components fitted within folds (0 = none)", ge=0)
    pre_bout_window_s: float = _f(1.0, doc="window ending at each lag before bout onset for "
                                  "the bout-wise decoders (about the indicator's rise)",
                                  unit="s", gt=0.0)
    bout_feature: Literal["rise", "mean"] = _f("rise", doc="bout features: each cell's rise "
                                               "over the window (baseline-subtracted) or its "
                                               "mean in the window")
    n_null_bouts: int = _f(20, doc="label permutations of the bout-wise decoders", ge=0)
    seed: int = _f(0, doc="seed of the null permutations", ge=0)

    def check(self) -> str | None:
        if self.lag_max_s < self.lag_min_s:
            return f"lag_max_s = {self.lag_max_s} is below lag_min_s = {self.lag_min_s}"
        return None


@dataclass(frozen=True, kw_only=True)
class TuningSettings:
    enabled: bool = _f(True, doc="run the tuning analysis")
    feature: Literal["dff", "events"] = _f("dff", doc="activity used")
    n_bins: int = _f(12, doc="bearing bins of the tuning curve", ge=4, le=72)
    min_occupancy_s: float = _f(1.0, doc="bins with less time are left empty", unit="s", ge=0.0)
    pre_window_s: float = _f(30.0, doc="samples up to this long before the split", unit="s",
                             gt=0.0)
    post_window_s: float = _f(30.0, doc="samples up to this long after the split", unit="s",
                              gt=0.0)
    split_guard_s: float = _f(0.0, doc="samples this soon after a split are left out of the "
                              "epoch it opens (the indicator still shows the previous epoch)",
                              unit="s", ge=0.0)
    n_permutations: int = _f(1000, doc="permutations of the null", ge=10)
    min_epoch_trials: int = _f(8, doc="an epoch is tested only when at least this many trials "
                               "have samples in it (with fewer, whole-trial permutations cannot "
                               "tell the targets' correlated bearings apart)", ge=3)
    between_epoch: Literal["auto", "separate", "merged"] = _f(
        "merged", doc="samples between a trial's first and last split (three targets): "
        "'merged' = part of 'post' (epochs cut at each trial's first split only); 'separate' = "
        "their own 'between' epoch (a few seconds per trial: measured on the demo, its flags "
        "held 2-4x more false keys than 'pre' and 'post'); 'auto' = separate only when at "
        "least min_epoch_trials trials have two splits")
    null: Literal["aligned", "trial", "circular"] = _f(
        "aligned", doc="'aligned': each trial's samples get the bearing terms of another trial "
        "showing the same targets, aligned at the first split; 'trial': whole trials "
        "re-concatenated in a random order (anti-conservative for sparse activity when trials "
        "differ in length); 'circular': circular shifts")
    min_shift_s: float = _f(20.0, doc="minimum circular shift", unit="s", ge=0.0)
    fdr_q: float = _f(0.05, doc="Benjamini-Hochberg level", gt=0.0, lt=1.0)
    trial_intercepts: bool = _f(False, doc="one intercept per trial, never permuted: only "
                                "within-trial covariation counts as tuning (robust to "
                                "between-trial drift, but loses tuning expressed between trials)")
    block_cells: int = _f(4096, doc="cells per task", ge=1)
    n_harmonics: int = _f(1, doc="harmonics of each bearing in the regression (2 = sharper "
                          "tuning)", ge=1, le=4)
    nuisance: bool = _f(True, doc="add motor nuisance regressors (bout onsets per side "
                        "weighted by |turn| and turn^2, and by vigor; never permuted)")
    nuisance_leads_s: tuple[float, ...] = _f((-1.0, -0.5, 0.0, 0.5, 1.0, 1.5, 2.0),
                                             doc="leads of the motor nuisance impulses before "
                                             "each bout onset (negative = after it)", unit="s")
    nuisance_baseline: bool = _f(True, doc="with dF/F activity, also add the running-"
                                 "percentile baseline of the lead-0 motor terms (window and "
                                 "percentile of the traces section) to the nuisance: the dF/F "
                                 "baseline of a cell active at every bout follows the bout rate")
    attribution: Literal["consistent", "best", "unique"] = _f(
        "consistent", doc="'best': a cell whose bearing terms (all targets together) are "
        "significant is tuned to the target that alone explains most; 'consistent': the same, "
        "but only when that target also explains most of the variation within trials, "
        "otherwise the cell is marked ambiguous (tuned to bearing, target not named); "
        "'unique': tuned to every target whose unique term is significant")
    seed: int = _f(0, doc="seed of the null permutations", ge=0)


@dataclass(frozen=True, kw_only=True)
class ReportSettings:
    enabled: bool = _f(True, doc="write report/index.html")
    n_raster_cells: int = _f(200, doc="cells shown in the dF/F raster", ge=1)
    screenshot: bool = _f(False, doc="render the page in headless Chromium and save a PNG")


@dataclass(frozen=True, kw_only=True)
class SlurmSettings:
    queue: str = _f("", doc="partition")
    account: str = _f("", doc="account")
    cores: int = _f(16, doc="cores per job", ge=1)
    memory: str = _f("64GB", doc="memory per job")
    walltime: str = _f("04:00:00", doc="walltime per job")
    jobs: int = _f(1, doc="jobs to start", ge=1)
    processes: int = _f(4, doc="dask worker processes per job", ge=1)
    local_directory: str = _f("", doc="worker scratch folder on the node")


@dataclass(frozen=True, kw_only=True)
class ComputeSettings:
    scheduler: str = _f("threads", doc='"threads", "processes", "local-cluster", '
                        '"tcp://host:port" or "slurm"')
    workers: int = _f(0, doc="worker count (0 = number of cores)", ge=0)
    threads_per_worker: int = _f(1, doc="threads per worker (cluster schedulers)", ge=1)
    memory_per_worker: str = _f("4GB", doc="memory limit per worker (cluster schedulers)")
    slurm: SlurmSettings = field(default_factory=SlurmSettings, metadata={"doc": "SLURM jobs"})

    def check(self) -> str | None:
        known = ("threads", "processes", "local-cluster", "slurm")
        if self.scheduler in known or self.scheduler.startswith("tcp://"):
            return None
        return (f"scheduler = {self.scheduler!r}: expected one of "
                f"{', '.join(repr(k) for k in known)} or 'tcp://host:port'"
                f"{closest(self.scheduler, known)}")


# --------------------------------------------------------------------------------------------
_SECTIONS: dict[str, type] = {
    "session": SessionSettings,
    "imaging": ImagingSettings,
    "behaviour": BehaviourSettings,
    "sync": SyncSettings,
    "motion": MotionSettings,
    "cells": CellsSettings,
    "traces": TracesSettings,
    "decode": DecodeSettings,
    "tuning": TuningSettings,
    "report": ReportSettings,
    "compute": ComputeSettings,
}
_REQUIRED = ("session", "imaging")


@dataclass(frozen=True, kw_only=True)
class Settings:
    """All sections of one config file, parsed and checked."""

    session: SessionSettings
    imaging: ImagingSettings
    behaviour: BehaviourSettings | None
    sync: SyncSettings
    motion: MotionSettings
    cells: CellsSettings
    traces: TracesSettings
    decode: DecodeSettings
    tuning: TuningSettings
    report: ReportSettings
    compute: ComputeSettings
    source: Path | None = None
    raw_toml: str = ""

    def raw_files(self) -> list[Path]:
        """The raw imaging files matched by ``imaging.raw``, sorted by name."""
        return sorted(Path(p) for p in glob.glob(self.imaging.raw, recursive=True))

    def input_files(self) -> dict[str, list[Path]]:
        """Raw inputs by group: ``imaging``, ``behaviour``, ``sync``."""
        groups: dict[str, list[Path]] = {"imaging": self.raw_files(), "behaviour": [],
                                         "sync": []}
        if self.behaviour is not None:
            groups["behaviour"].append(self.behaviour.log)
        if self.sync.timestamps is not None:
            groups["sync"].append(self.sync.timestamps)
        if self.imaging.plane_timestamps is not None:
            groups["sync"].append(self.imaging.plane_timestamps)
        return groups

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict of every section (paths as strings)."""
        return {name: _plain(getattr(self, name)) for name in _SECTIONS}


def _plain(obj: Any) -> Any:
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, MappingProxyType | dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, tuple | list):
        return [_plain(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    return obj


def section_hash(settings: Settings, names: tuple[str, ...]) -> str:
    """SHA-256 of the named sections' values, stable across runs and machines."""
    data = {n: _plain(getattr(settings, n)) for n in sorted(names)}
    text = json.dumps(data, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def parse_config(
    table: dict[str, Any],
    *,
    base_dir: Path,
    source: str = "<config>",
    check_files: bool = True,
) -> Settings:
    """Build :class:`Settings` from a parsed TOML document.

    Raises
    ------
    ConfigError
        Unknown section or key, missing required key, bad value, or a glob that matches nothing.
    """
    for name in table:
        if name not in _SECTIONS:
            raise ConfigError(f"{source}: unknown section [{name}]{closest(name, _SECTIONS)}; "
                              f"allowed sections: {', '.join(_SECTIONS)}")
    for name in _REQUIRED:
        if name not in table:
            raise ConfigError(f"{source}: missing required section [{name}]")
    parsed: dict[str, Any] = {}
    for name, cls in _SECTIONS.items():
        sub = table.get(name)
        if sub is None:
            parsed[name] = None if name == "behaviour" else cls()
            continue
        if not isinstance(sub, dict):
            raise ConfigError(f"{source}: {name} = {sub!r}: expected a table [{name}]")
        parsed[name] = parse_section(cls, sub, name, source=source, base_dir=base_dir,
                                     check_files=check_files)
    raw = parsed["imaging"].raw
    if not Path(raw).is_absolute():
        raw = str(base_dir / raw)
    parsed["imaging"] = dataclasses.replace(parsed["imaging"], raw=raw)
    settings = Settings(**parsed)
    if check_files and not settings.raw_files():
        raise ConfigError(f"{source}: imaging.raw = {table['imaging']['raw']!r}: the pattern "
                          f"matches no file (looked for {raw})")
    return settings


def load_config(path: str | Path, *, check_files: bool = True) -> Settings:
    """Read and check a TOML config file.

    Parameters
    ----------
    path : str or Path
        The config file; relative paths inside it resolve against its folder.
    check_files : bool, default=True
        Check that input files exist (turn off to inspect a config away from its data).

    Raises
    ------
    ConfigError
        The file is missing, is not valid TOML, or any value is bad.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"config file {path} does not exist") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: not a UTF-8 text file ({exc.reason} at byte {exc.start})"
                          ) from None
    try:
        table = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None
    settings = parse_config(table, base_dir=path.resolve().parent, source=str(path),
                            check_files=check_files)
    return dataclasses.replace(settings, source=path.resolve(), raw_toml=text)
