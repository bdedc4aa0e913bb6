"""Build a config for a generated demo session (used by end-to-end and crash tests)."""

from __future__ import annotations

import json
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def demo_config(data_dir: Path, out_dir: Path, folder: Path, *,
                overrides: dict[str, dict[str, object]] | None = None,
                name: str = "forkmap.toml", layout: str = "per-volume") -> Path:
    """Write a config for the demo data in ``data_dir`` with output ``out_dir``.

    Starts from ``configs/demo.toml`` and replaces the paths and the imaging geometry with the
    values the generator recorded in ``truth/scenario.json``; ``overrides`` maps a section to
    keys whose values replace (or add to) that section's.
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
    for section, keys in (overrides or {}).items():
        text = _override(text, section, keys)
    path = folder / name
    path.write_text(text)
    return path


def _override(text: str, section: str, keys: dict[str, object]) -> str:
    from pipeline.config_template import _toml

    header = f"[{section}]"
    lines = text.splitlines()
    if header not in lines:
        lines += ["", header]
    start = lines.index(header) + 1
    end = next((i for i in range(start, len(lines)) if lines[i].startswith("[")), len(lines))
    body = [ln for ln in lines[start:end]
            if ln.split("=")[0].strip() not in keys]
    body = [f"{k} = {_toml(v)}" for k, v in keys.items()] + body
    return "\n".join(lines[:start] + body + lines[end:]) + "\n"


def _get(scen: dict, key: str):
    """Find ``key`` at the top of scenario.json or one level down."""
    if key in scen:
        return scen[key]
    for v in scen.values():
        if isinstance(v, dict) and key in v:
            return v[key]
    raise KeyError(key)
