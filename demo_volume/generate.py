"""Generate the invented demo session: raw TIFF volumes, the rig log and the planted truth.

Usage::

    python -m demo_volume.generate --out demo-data --seed 0 --preset default --layout per-volume

Same preset, seed and layout give byte-identical files; ``SHA256SUMS`` lists them all.
See ``demo_volume/README.md`` for the scenario and every planted effect.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import shutil
import sys
import time
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import tifffile

from demo_volume._activity import Activity, plant_activity
from demo_volume._behaviour import add_triggers, simulate_behaviour
from demo_volume._brain import BrainModel, motion_path, place_cells, slow_factor
from demo_volume._params import Scenario, load_scenario
from demo_volume._render import VolumeRenderer, sensor_noise
from pipeline.errors import ConfigError, ForkmapError, StoreError

__all__ = ["generate", "verify", "main", "LAYOUTS", "CHECKSUM_FILE"]

LAYOUTS = ("per-volume", "stack", "both")
CHECKSUM_FILE = "SHA256SUMS"
_STREAMS = ("behaviour", "clock", "cells", "activity", "motion", "slow", "noise")
_OWNED = ("raw", "raw_stack", "truth", "rig_log.csv", CHECKSUM_FILE)


def _streams(seed: int) -> dict[str, np.random.Generator]:
    """One independent random stream per part, so changing one part leaves the others."""
    children = np.random.SeedSequence(seed).spawn(len(_STREAMS))
    return {name: np.random.default_rng(s) for name, s in zip(_STREAMS, children, strict=True)}


def _clear(out: Path) -> None:
    """Remove a previous scenario from ``out`` (only the entries this generator writes)."""
    raw = out / "raw"
    if raw.is_dir():
        strangers = [p.name for p in raw.iterdir() if not (p.name.startswith("vol_")
                                                           and p.suffix == ".tif")]
        if strangers:
            raise StoreError(f"{raw}: holds files this generator did not write "
                             f"({strangers[:3]}); expected only vol_*.tif. Choose another --out.")
    for name in _OWNED:
        p = out / name
        if p.is_dir():
            shutil.rmtree(p)
        elif p.exists():
            p.unlink()


def _plane_times(sc: Scenario) -> np.ndarray:
    """Acquisition time of every plane on the imaging clock, (n_volumes, n_planes)."""
    im = sc.imaging
    start = np.arange(im.n_volumes) / im.volume_rate_hz
    return start[:, None] + np.arange(im.n_planes)[None, :] * im.plane_period_s


def _write_images(out: Path, layout: str, volumes: Iterator[np.ndarray], sc: Scenario) -> None:
    per_volume = layout in ("per-volume", "both")
    nz, ny, nx = sc.imaging.shape_zyx
    if per_volume:
        (out / "raw").mkdir(parents=True)

    def planes() -> Iterator[np.ndarray]:
        for k, vol in enumerate(volumes):
            if per_volume:
                tifffile.imwrite(out / "raw" / f"vol_{k:05d}.tif", vol,
                                 photometric="minisblack", metadata=None)
            yield from vol

    if layout in ("stack", "both"):
        (out / "raw_stack").mkdir(parents=True)
        with tifffile.TiffWriter(out / "raw_stack" / "stack.tif", bigtiff=True) as tw:
            tw.write(planes(), shape=(sc.imaging.n_volumes * nz, ny, nx), dtype=np.uint16,
                     photometric="minisblack", metadata=None)
    else:
        for _ in planes():
            pass


def _cells_table(cells: pd.DataFrame, act: Activity, sc: Scenario) -> pd.DataFrame:
    tab = pd.concat([cells.reset_index(drop=True), act.classes.reset_index(drop=True)], axis=1)
    vox = sc.imaging.voxel_size_um
    for axis, size in zip("zyx", vox, strict=True):
        tab[f"{axis}_um"] = tab[f"{axis}_vox"] * size
    first = ["id", "z_vox", "y_vox", "x_vox", "radius_um", "brightness", "cell_class", "target",
             "epoch", "pref_bearing_rad", "kappa", "side", "lead_s"]
    return tab[first + [c for c in tab.columns if c not in first]]


def _write_json(path: Path, obj: Any) -> None:
    path.write_text(json.dumps(obj, indent=2, sort_keys=True) + "\n")


def _summary(sc: Scenario, layout: str, act: Activity, splits: pd.DataFrame,
             bouts: pd.DataFrame) -> dict[str, Any]:
    im = sc.imaging
    counts = act.classes["cell_class"].value_counts()
    n = len(act.classes)
    return {
        "generator": "demo_volume", "format_version": 1, "invented_data": True,
        "preset": sc.preset, "seed": sc.seed, "layout": layout,
        "shape_tzyx": [im.n_volumes, *im.shape_zyx], "voxel_size_um": list(im.voxel_size_um),
        "volume_rate_hz": im.volume_rate_hz, "n_planes": im.n_planes,
        "plane_period_s": im.plane_period_s, "flyback_s": im.flyback_s,
        "plane_offsets_s": [z * im.plane_period_s for z in range(im.n_planes)],
        "plane_order": "ascending",
        "critical_angle_deg": sc.behaviour.critical_angle_deg,
        "indicator": {"name": sc.indicator.name, "rise_s": sc.indicator.rise_s,
                      "decay_s": sc.indicator.decay_s, "source": sc.indicator.source},
        "class_counts": {k: int(counts.get(k, 0)) for k in
                         ("bearing", "premotor", "vigor", "untuned")},
        "class_fractions": {k: int(counts.get(k, 0)) / n for k in
                            ("bearing", "premotor", "vigor", "untuned")},
        "premotor_lead_s": sc.cells.lead_s,
        "premotor_turn_ref_rad": act.turn_ref_rad,
        "n_trials": int(splits["trial"].nunique()), "n_splits": len(splits),
        "n_bouts": len(bouts),
        "params": sc.as_dict(),
    }


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _write_checksums(out: Path) -> None:
    files = sorted(p for p in out.rglob("*") if p.is_file() and p.name != CHECKSUM_FILE)
    lines = [f"{_sha256(p)}  {p.relative_to(out).as_posix()}" for p in files]
    (out / CHECKSUM_FILE).write_text("\n".join(lines) + "\n")


def verify(out_dir: str | Path) -> bool:
    """True when every file listed in ``SHA256SUMS`` exists with the listed checksum."""
    out = Path(out_dir)
    sums = out / CHECKSUM_FILE
    if not sums.is_file():
        return False
    for line in sums.read_text().splitlines():
        digest, _, rel = line.partition("  ")
        path = out / rel
        if not path.is_file() or _sha256(path) != digest:
            return False
    return True


def generate(out_dir: str | Path, *, preset: str = "default", seed: int = 0,
             layout: str = "per-volume",
             preset_overrides: Mapping[str, Mapping[str, Any]] | None = None) -> Path:
    """Write one invented session (raw volumes, rig log, truth) into ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
        Output folder; a previous scenario there is replaced.
    preset : str, default="default"
        Preset of ``demo_volume/params.toml`` ("default" or "small").
    seed : int, default=0
        Seed of every random stream; same inputs give byte-identical files.
    layout : {"per-volume", "stack", "both"}, default="per-volume"
        One TIFF per volume under ``raw/``, one BigTIFF under ``raw_stack/``, or both.
    preset_overrides : mapping, optional
        ``{section: {key: value}}`` replacing preset values (tests use tiny sessions).

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    ConfigError
        Unknown preset, layout, section or key.
    StoreError
        ``out_dir/raw`` holds files this generator did not write.
    """
    if layout not in LAYOUTS:
        raise ConfigError(f"layout = {layout!r}: expected one of {list(LAYOUTS)}")
    sc = load_scenario(preset, seed=seed, overrides=preset_overrides)
    rng = _streams(seed)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    _clear(out)

    bt = simulate_behaviour(sc, rng["behaviour"])
    dropped = add_triggers(bt.log, sc, rng["clock"])
    brain = BrainModel.from_scenario(sc)
    cells = place_cells(sc, brain, rng["cells"])
    act = plant_activity(sc, cells, bt, rng["activity"])
    shifts = motion_path(sc, rng["motion"])
    global_factor, cell_factor = slow_factor(sc, rng["slow"])

    times = _plane_times(sc)
    n_vol, nz = times.shape
    planes = act.at_times(times.ravel()).reshape(len(cells), n_vol, nz).transpose(1, 2, 0)
    planes = np.ascontiguousarray(planes, dtype=np.float32)
    neuropil = sc.brain.neuropil_gain * (planes @ brain.bump_weights(
        cells[["z_vox", "y_vox", "x_vox"]].to_numpy()).astype(np.float32))
    renderer = VolumeRenderer(sc, brain, cells, planes, neuropil, global_factor, cell_factor,
                              shifts)
    cam = sc.camera
    noise_rng = rng["noise"]
    volumes = (sensor_noise(renderer.expected(k), noise_rng, gain_adu_per_e=cam.gain_adu_per_e,
                            offset_adu=cam.offset_adu, read_noise_e=cam.read_noise_e)
               for k in range(n_vol))
    _write_images(out, layout, volumes, sc)

    bt.log.to_csv(out / "rig_log.csv", index=False, float_format="%.6f")
    truth = out / "truth"
    truth.mkdir()
    _write_json(truth / "scenario.json", _summary(sc, layout, act, bt.splits, bt.bouts))
    _write_json(truth / "clock.json", {
        "offset_s": sc.clock.offset_s, "drift_ppm": sc.clock.drift_ppm,
        "dropped_trigger_volumes": dropped,
        "model": "t_rig = offset_s + (1 + drift_ppm*1e-6) * t_scope",
        "trigger_rule": "trigger is high on the first rig sample at or after each volume start",
        "rig_rate_hz": sc.behaviour.rig_rate_hz, "rig_jitter_s": sc.behaviour.jitter_s,
    })
    pd.DataFrame({"t": np.arange(n_vol, dtype=np.int64), "dz_vox": shifts[:, 0],
                  "dy_vox": shifts[:, 1], "dx_vox": shifts[:, 2]}).to_parquet(
        truth / "shifts.parquet", index=False)
    _cells_table(cells, act, sc).to_parquet(truth / "cells.parquet", index=False)
    own_plane = cells["plane"].to_numpy()
    activity = planes[:, own_plane, np.arange(len(cells))].T
    np.save(truth / "activity.npy", np.ascontiguousarray(activity, dtype=np.float32))
    bt.splits.to_parquet(truth / "trials.parquet", index=False)
    bt.bouts.to_parquet(truth / "bouts.parquet", index=False)
    _write_checksums(out)
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``python -m demo_volume.generate --out DIR [--seed N] [--preset P]``."""
    ap = argparse.ArgumentParser(prog="python -m demo_volume.generate",
                                 description="Write the invented demo session.")
    ap.add_argument("--out", required=True, type=Path, help="output folder")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--preset", default="default", help="small | default (params.toml)")
    ap.add_argument("--layout", default="per-volume", choices=LAYOUTS)
    ap.add_argument("--check", action="store_true",
                    help="only verify DIR/SHA256SUMS; exit 0 when intact, 1 otherwise")
    args = ap.parse_args(argv)
    if args.check:
        ok = verify(args.out)
        print(f"{args.out}: {'intact' if ok else 'missing or changed'}")
        return 0 if ok else 1
    t0 = time.perf_counter()
    try:
        out = generate(args.out, preset=args.preset, seed=args.seed, layout=args.layout)
    except ForkmapError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    print(f"wrote {out} (preset {args.preset}, seed {args.seed}) in "
          f"{time.perf_counter() - t0:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
