"""Typed config: good configs parse into frozen sections, bad ones fail naming key and value."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest
from foundation_helpers import MINIMAL, write_config

from pipeline.config import load_config, section_hash
from pipeline.errors import ConfigError


def test_minimal_config_parses_with_defaults(tmp_path: Path) -> None:
    s = load_config(write_config(tmp_path))
    assert s.imaging.voxel_size_um == (4.0, 1.5, 1.5)
    assert s.session.output == tmp_path / "out"  # relative paths resolve against the config
    assert s.motion.upsample == 20 and s.compute.scheduler == "threads"
    assert len(s.raw_files()) == 2
    assert s.behaviour is None
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.motion.upsample = 3  # type: ignore[misc]


def test_section_hash_changes_only_with_its_section(tmp_path: Path) -> None:
    a = load_config(write_config(tmp_path))
    b = load_config(write_config(tmp_path, "\n[motion]\nupsample = 10\n"))
    assert section_hash(a, ("imaging",)) == section_hash(b, ("imaging",))
    assert section_hash(a, ("motion",)) != section_hash(b, ("motion",))


def test_full_sections_parse(tmp_path: Path) -> None:
    (tmp_path / "log.csv").write_text("time_s\n0\n")
    extra = """
[behaviour]
log = "log.csv"
columns = {time = "time_s", x = "x_mm"}
time_unit = "ms"
[[behaviour.targets]]
name = "t0"
x = "t0_x_mm"
y = "t0_y_mm"
[compute]
scheduler = "slurm"
[compute.slurm]
cores = 8
walltime = "01:00:00"
"""
    s = load_config(write_config(tmp_path, extra))
    assert s.behaviour is not None
    assert s.behaviour.columns["time"] == "time_s"
    assert s.behaviour.targets[0].x == "t0_x_mm"
    assert s.compute.slurm.cores == 8


BAD = [
    ("\n[motion]\nupsampel = 4\n", r"unknown key motion\.upsampel \(did you mean 'upsample'\?\)"),
    ("\n[motoin]\n", r"unknown section \[motoin\] \(did you mean 'motion'\?\)"),
    ("\n[motion]\nupsample = 'ten'\n", r"motion\.upsample = 'ten': expected a whole number"),
    ("\n[motion]\nupsample = 0\n", r"motion\.upsample = 0: expected a value >= 1"),
    ("\n[motion]\nenabled = 1\n", r"motion\.enabled = 1: expected true or false"),
    ("\n[compute]\nscheduler = 'thread'\n", r"scheduler = 'thread'.*did you mean 'threads'"),
    ("\n[compute]\nworkers = -2\n", r"compute\.workers = -2: expected a value >= 0"),
    ("\n[traces]\nbaseline_percentile = 150\n", r"traces\.baseline_percentile = 150"),
    ("\n[traces]\nring_inner_um = 5.0\nring_outer_um = 2.0\n", r"ring_outer_um = 2\.0 must be"),
    ("\n[decode]\nlag_min_s = 2.0\nlag_max_s = -1.0\n", r"lag_max_s = -1\.0 is below"),
    ("\n[decode]\nalphas = [1.0, -3.0]\n", r"decode\.alphas\[1\] = -3\.0: expected a value > 0"),
    ("\n[tuning]\nnull = 'shuffle'\n", r"tuning\.null = 'shuffle': expected one of 'aligned'"),
    ("\n[behaviour]\nlog = 'missing.csv'\n", r"behaviour\.log = 'missing\.csv': no such file"),
    ("\n[behaviour]\nlog = 'x.toml'\ntime_unit = 'min'\n",
     r"behaviour\.time_unit = 'min': expected one of 's', 'ms', 'us'"),
    ("\n[behaviour]\nlog = 'x.toml'\ncolumns = {time = 3}\n",
     r"behaviour\.columns\.time = 3: expected a string"),
    ("\n[compute.slurm]\ncores = 0\n", r"compute\.slurm\.cores = 0: expected a value >= 1"),
    ("\n[report]\nenabled = 'yes'\n", r"report\.enabled = 'yes': expected true or false"),
    ("\n[sync]\nmin_match_fraction = 1.5\n", r"sync\.min_match_fraction = 1\.5"),
    ("\n[motion]\n[motion.extra]\n", r"unknown key motion\.extra"),
]


@pytest.mark.parametrize(("extra", "message"), BAD, ids=[m[:30] for _, m in BAD])
def test_bad_values_name_key_and_value(tmp_path: Path, extra: str, message: str) -> None:
    (tmp_path / "x.toml").write_text("")
    with pytest.raises(ConfigError, match=message):
        load_config(write_config(tmp_path, extra))


BAD_BASE = [
    (MINIMAL.replace("[4.0, 1.5, 1.5]", "[4.0, -1.5, 1.5]"),
     r"imaging\.voxel_size_um\[1\] = -1\.5: expected a value > 0\.0 um"),
    (MINIMAL.replace("[4.0, 1.5, 1.5]", "[4.0, 1.5]"),
     r"imaging\.voxel_size_um = \[4\.0, 1\.5\]: expected a list of 3 values"),
    (MINIMAL.replace('raw = "raw/*.tif"', 'raw = "nothing/*.tif"'),
     r"imaging\.raw = 'nothing/\*\.tif': the pattern matches no file"),
    (MINIMAL.replace('output = "out"', ""), r"missing required key session\.output"),
    (MINIMAL.replace("[session]", "[sessoin]"), r"unknown section \[sessoin\]"),
    (MINIMAL.replace("volume_rate_hz = 2.0", "volume_rate_hz = 0"),
     r"imaging\.volume_rate_hz = 0: expected a value > 0\.0 Hz"),
    (MINIMAL + "flyback_planes = [4]\n", r"flyback_planes = \[4\]: indices must be below"),
    (MINIMAL.replace("planes_per_volume = 4", "planes_per_volume = 4\nplane_order = 'up'"),
     r"imaging\.plane_order = 'up': expected one of 'ascending'"),
    (MINIMAL + "= broken\n", r"not valid TOML"),
]


@pytest.mark.parametrize(("text", "message"), BAD_BASE, ids=[m[:30] for _, m in BAD_BASE])
def test_bad_base_configs(tmp_path: Path, text: str, message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        load_config(write_config(tmp_path, base=text))


def test_missing_config_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"config file .*nope\.toml does not exist"):
        load_config(tmp_path / "nope.toml")


def test_shipped_configs_parse() -> None:
    root = Path(__file__).resolve().parents[1] / "configs"
    for name in ("demo.toml", "template.toml"):
        s = load_config(root / name, check_files=False)
        assert s.session.output.name


def test_template_documents_every_key() -> None:
    from pipeline.config_template import render_template

    shipped = (Path(__file__).resolve().parents[1] / "configs" / "template.toml").read_text()
    assert shipped == render_template(), "run: python -m pipeline.config_template > " \
        "configs/template.toml"
