"""The bad-input corpus through the command line (``tests/data/make_bad_inputs.py``).

Each case is one small session with one fault. Through ``forkmap check`` and/or ``forkmap run``
(in a subprocess, as a user runs it) a fault must give exit code 2 and exactly one line on
stderr naming the file and its page / row / column or the config key, with no traceback; the
failing stage must leave no record in ``manifest.json``; and the raw inputs must be byte-identical
afterwards. The faults forkmap repairs (extra trigger pulses, a rig clock jump) must exit 0 with
the repair recorded as a warning of the stage.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent / "data"))

from make_bad_inputs import CASES, Case, _config, build_case, make_base  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
PARAMS = [pytest.param(c, cmd, id=f"{c.name}-{cmd}") for c in CASES for cmd in c.commands]


def _forkmap(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "pipeline.cli", "-q", *args], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)


def _digests(*folders: Path, skip: Path | None = None) -> dict[str, str]:
    out = {}
    for folder in folders:
        for p in sorted(folder.rglob("*")):
            if p.is_file() and not (skip is not None and skip in p.parents):
                out[str(p)] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture(scope="session")
def bad_base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The one base session every case copies from (generated once)."""
    return make_base(tmp_path_factory.mktemp("bad-base") / "base")


@pytest.fixture(scope="session")
def prebuilt_output(bad_base: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The base run through every imaging stage once; align cases start from a copy."""
    folder = tmp_path_factory.mktemp("bad-prebuilt")
    cfg = _config(bad_base, folder)
    res = _forkmap("run", str(cfg))
    assert res.returncode == 0, res.stderr
    return folder / "out"


def test_corpus_is_large_and_named_uniquely() -> None:
    names = [c.name for c in CASES]
    assert len(names) == len(set(names))
    assert len(CASES) >= 30
    assert {c.group for c in CASES} == {"tiff", "log", "sync", "config"}


@dataclass
class Outcome:
    """One case run through one command: the result and what to compare afterwards."""

    folder: Path
    out: Path
    before_stages: dict[str, dict]
    inputs_before: dict[str, str]
    result: subprocess.CompletedProcess[str] | None = None


def _prepare(case: Case, command: str, base: Path, folder: Path, prebuilt: Path | None
             ) -> tuple[Path, Outcome]:
    cfg = build_case(case, base, folder)
    out = folder / "out"
    if prebuilt is not None and command == "run" and case.needs_prebuilt:
        shutil.copytree(prebuilt, out)
    return cfg, Outcome(folder, out, _stages(out), _digests(base, folder, skip=out))


@pytest.fixture(scope="session")
def outcomes(bad_base: Path, prebuilt_output: Path, tmp_path_factory: pytest.TempPathFactory
             ) -> dict[str, Outcome]:
    """Every case through its commands, two subprocesses at a time (the corpus is I/O and
    import bound: each CLI start imports the whole package)."""
    root = tmp_path_factory.mktemp("bad-cases")
    jobs: dict[str, tuple[Path, str, Outcome]] = {}
    for p in PARAMS:
        case, command = p.values
        cfg, oc = _prepare(case, command, bad_base, root / p.id, prebuilt_output)
        jobs[p.id] = (cfg, command, oc)

    def one(key: str) -> None:
        cfg, command, oc = jobs[key]
        oc.result = _forkmap(command, str(cfg))

    with ThreadPoolExecutor(max_workers=2) as pool:
        list(pool.map(one, jobs))
    return {k: oc for k, (_, _, oc) in jobs.items()}


@pytest.mark.parametrize(("case", "command"), PARAMS)
def test_bad_input_through_cli(case: Case, command: str, bad_base: Path,
                               outcomes: dict[str, Outcome]) -> None:
    oc = outcomes[f"{case.name}-{command}"]
    res, out = oc.result, oc.out
    assert res is not None
    assert "Traceback" not in res.stderr, res.stderr
    assert res.returncode == case.exit_code, res.stderr
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    stages = _stages(out)
    if case.exit_code == 2:
        assert len(lines) == 1, res.stderr
        assert lines[0].startswith("forkmap: error: "), lines[0]
        assert re.search(case.match, lines[0]), lines[0]
        if case.stage is not None:
            assert case.stage not in stages, f"{case.stage} left a stage record"
        else:   # the config itself is refused: nothing is created or changed
            assert stages == oc.before_stages
            assert out.exists() == bool(oc.before_stages)
    else:
        assert all(ln.startswith("forkmap: ") and "error" not in ln for ln in lines), res.stderr
        assert case.stage is not None
        warnings = stages[case.stage].get("warnings", [])
        assert any(re.search(case.match, w) for w in warnings), warnings
    assert _digests(bad_base, oc.folder, skip=out) == oc.inputs_before, "raw inputs changed"


def _stages(out: Path) -> dict[str, dict]:
    path = out / "manifest.json"
    if not path.exists():
        return {}
    return dict(json.loads(path.read_text()).get("stages", {}))
