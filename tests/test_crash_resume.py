"""Crash consistency: SIGKILL a run at a random moment, re-run, get the same outputs.

A few trials run in ``make test``; ``make soak`` (FORKMAP_SOAK=1) runs 24 trials spread over
ingest, motion and traces. After every kill, no stage may be recorded as done unless its
outputs are complete (equal to the uninterrupted run's).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from demo_session import demo_config
from store_digest import store_digests

N_TRIALS = 24 if os.environ.get("FORKMAP_SOAK") else 3
FAST = {"decode": {"enabled": False}, "tuning": {"enabled": False},
        "report": {"enabled": False}}
CRASH_STAGES = ("ingest", "motion", "traces")


def _forkmap(cfg: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "pipeline.cli", "--quiet", "run", str(cfg)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            start_new_session=True)


def _records(out: Path) -> dict:
    try:
        return json.loads((out / "manifest.json").read_text()).get("stages", {})
    except (OSError, ValueError):
        return {}


def _owner(key: str, outputs: dict[str, list[str]]) -> str:
    """The stage whose output path is the longest prefix of ``key``."""
    best, length = "", -1
    for stage, paths in outputs.items():
        for o in paths:
            if (key == o or key.startswith(o + "/")) and len(o) > length:
                best, length = stage, len(o)
    return best


@pytest.fixture(scope="module")
def reference(demo_small_data: Path, tmp_path_factory: pytest.TempPathFactory):
    folder = tmp_path_factory.mktemp("crash-ref")
    cfg = demo_config(demo_small_data, folder / "out", folder, overrides=FAST)
    proc = _forkmap(cfg)
    _, err = proc.communicate(timeout=600)
    assert proc.returncode == 0, err.decode()
    out = folder / "out"
    recs = _records(out)
    return {"digests": store_digests(out), "records": recs,
            "outputs": {n: r["outputs"] for n, r in recs.items()}}


def test_kill_and_resume_gives_identical_outputs(demo_small_data: Path, tmp_path: Path,
                                                 reference: dict) -> None:
    rng = np.random.default_rng(20261202)
    survived = killed = 0
    for trial in range(N_TRIALS):
        stage = CRASH_STAGES[trial % len(CRASH_STAGES)]
        seconds = reference["records"][stage]["seconds"]
        delay = float(rng.uniform(0.0, max(seconds, 0.05)))
        out = tmp_path / f"trial{trial}"
        cfg = demo_config(demo_small_data, out, tmp_path, overrides=FAST, name=f"t{trial}.toml")
        proc = _forkmap(cfg)
        staging = out / ".staging" / stage
        t0 = time.monotonic()
        while not staging.exists() and proc.poll() is None and time.monotonic() - t0 < 300:
            time.sleep(0.005)
        time.sleep(delay)
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            killed += 1
        proc.communicate()
        # invariant: a stage recorded as done has complete outputs
        for name, rec in _records(out).items():
            got = {k: v for k, v in store_digests(out, rec["outputs"]).items()
                   if _owner(k, reference["outputs"]) == name}
            want = {k: v for k, v in reference["digests"].items()
                    if _owner(k, reference["outputs"]) == name}
            assert got == want, f"trial {trial}: stage {name} recorded done with partial output"
        resume = _forkmap(cfg)
        _, err = resume.communicate(timeout=600)
        assert resume.returncode == 0, f"trial {trial}: resume failed: {err.decode()}"
        assert store_digests(out) == reference["digests"], f"trial {trial} (kill in {stage})"
        survived += 1
    print(f"crash trials: {N_TRIALS} run, {killed} killed mid-run, {survived} survived")
    assert survived == N_TRIALS
    assert killed >= N_TRIALS // 2, "most trials must really interrupt a stage"
