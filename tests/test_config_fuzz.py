"""Property tests: any config document either parses or raises ConfigError, never crashes."""

from __future__ import annotations

import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.config import _SECTIONS, parse_config
from pipeline.errors import ConfigError

_BASE_DIR = Path(tempfile.mkdtemp(prefix="forkmap-fuzz-"))
(_BASE_DIR / "raw").mkdir()
(_BASE_DIR / "raw" / "v_00000.tif").write_bytes(b"x")

scalars = st.one_of(
    st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12), st.sampled_from(["threads", "slurm", "lz4", "ascending", "s", "ms"]),
)
values = st.recursive(scalars, lambda inner: st.lists(inner, max_size=4)
                      | st.dictionaries(st.text(max_size=8), inner, max_size=3), max_leaves=6)


def _keys(section: str) -> list[str]:
    import dataclasses

    return [f.name for f in dataclasses.fields(_SECTIONS[section])]


@st.composite
def documents(draw: st.DrawFn) -> dict:
    doc: dict = {
        "session": {"output": "out"},
        "imaging": {"raw": "raw/*.tif", "voxel_size_um": [4.0, 1.5, 1.5],
                    "volume_rate_hz": 2.0, "planes_per_volume": 4},
    }
    for _ in range(draw(st.integers(0, 4))):
        section = draw(st.sampled_from([*list(_SECTIONS), "nonsense"]))
        table = doc.setdefault(section, {})
        key = draw(st.sampled_from([*(_keys(section) if section in _SECTIONS else []),
                                    "unknown_key"]))
        table[key] = draw(values)
    return doc


@settings(max_examples=1500, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(documents())
def test_any_document_parses_or_raises_config_error(doc: dict) -> None:
    try:
        s = parse_config(doc, base_dir=_BASE_DIR, source="fuzz.toml", check_files=False)
    except ConfigError as exc:
        assert str(exc).startswith("fuzz.toml: ")
    else:
        assert s.imaging.planes_per_volume >= 1
