"""Build a config for a generated demo session (used by end-to-end and crash tests)."""

from __future__ import annotations

import json
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def demo_config(data_dir: Path, out_dir: Path, folder: Path, *, extra: str = "",
                name: str = "forkmap.toml", layout: str = "per-volume") -> Path:
    """Write a config for the demo data in ``data_dir`` with output ``out_dir``.

    Starts from ``configs/demo.toml`` and replaces the paths and the imaging geometry with the
    values the generator recorded in ``truth/scenario.json``.
    """
    text = (ROOT / "configs" / "demo.toml").read_text()
    scen = json.loads((data_dir / "truth" / "scenario.json").read_text())
    raw = (data_dir / "raw" / "vol_*.tif") if layout == "per-volume" else (
        data_dir / "raw_stack" / "stack.tif")
    subs = {
        r'^output = .*$': f'output = "{out_dir}"',
        r'^raw = .*$': f'raw = "{raw}"',
        r'^layout = .*$': f'layout = "{layout}"',
        r'^log = .*$': f'log = "{data_dir / "rig_log.csv"}"',
        r'^planes_per_volume = .*$': f'planes_per_volume = {_get(scen, "n_planes")}',
        r'^volume_rate_hz = .*$': f'volume_rate_hz = {_get(scen, "volume_rate_hz")}',
        r'^flyback_s = .*$': f'flyback_s = {_get(scen, "flyback_s")}',
    }
    for pattern, new in subs.items():
        text, n = re.subn(pattern, new.replace("\\", "/"), text, count=1, flags=re.M)
        assert n == 1, pattern
    path = folder / name
    path.write_text(text + "\n" + extra)
    return path


def _get(scen: dict, key: str):
    """Find ``key`` at the top of scenario.json or one level down."""
    if key in scen:
        return scen[key]
    for v in scen.values():
        if isinstance(v, dict) and key in v:
            return v[key]
    raise KeyError(key)
