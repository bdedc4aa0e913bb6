"""Small helpers shared by the foundation tests: a minimal valid config on disk."""

from __future__ import annotations

from pathlib import Path

MINIMAL = """
[session]
output = "out"

[imaging]
raw = "raw/*.tif"
voxel_size_um = [4.0, 1.5, 1.5]
volume_rate_hz = 2.0
planes_per_volume = 4
"""


def write_config(folder: Path, extra: str = "", *, base: str = MINIMAL) -> Path:
    """Write a config and two placeholder raw files into ``folder``; return the config path."""
    raw = folder / "raw"
    raw.mkdir(exist_ok=True)
    for i in range(2):
        (raw / f"vol_{i:05d}.tif").write_bytes(b"placeholder %d" % i)
    path = folder / "forkmap.toml"
    path.write_text(base + extra, encoding="utf-8")
    return path
