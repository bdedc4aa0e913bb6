"""Stage records: skip, stale, resume, failure leaves nothing, the lock refuses a second run."""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from foundation_helpers import write_config

import pipeline.stages as stages
from pipeline.config import load_config
from pipeline.errors import LockError, StageError
from pipeline.store import Store

CALLS: list[str] = []


def _a(settings, store, compute):
    CALLS.append("a")
    store.write_array("a/x", np.full(4, settings.imaging.volume_rate_hz))


def _b(settings, store, compute):
    CALLS.append("b")
    if settings.motion.reference_count == 13:
        store.write_array("b/y", np.zeros(3))
        raise RuntimeError("planted failure inside stage b")
    x = store.read_array("a/x")[:]
    doubled = compute.map(_double, list(x), desc="b")
    store.write_array("b/y", np.asarray(doubled) * settings.motion.upsample)
    store.write_table("b.parquet", __import__("pandas").DataFrame({"y": doubled}))


def _double(v: float) -> float:
    return 2.0 * v


def _c(settings, store, compute):
    CALLS.append("c")
    y = store.read_array("b/y")[:]
    store.write_json("c.json", {"sum": float(y.sum()), "diameter": settings.cells.diameter_um})


def _r(settings, store, compute):
    CALLS.append("r")
    store.write_json("r.json", {"stages_seen": sorted(store.manifest()["stages"])})


@pytest.fixture
def toy_stages() -> Iterator[None]:
    stages.registry()  # make sure the real stages are imported once, then swap them out
    saved = dict(stages._REGISTRY)
    stages._REGISTRY.clear()
    stages.stage("a", sections=("imaging",), inputs=("imaging",))(_a)
    stages.stage("b", requires=("a",), sections=("motion",))(_b)
    stages.stage("c", requires=("b",), sections=("cells",))(_c)
    stages.stage("r", sections=("report",), after_all=True)(_r)
    CALLS.clear()
    yield
    stages._REGISTRY.clear()
    stages._REGISTRY.update(saved)


def _run(cfg: Path, **kw):
    return stages.run_stages(load_config(cfg), quiet=True, **kw)


def test_rerun_skips_and_change_reruns_downstream(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    _run(cfg)
    assert CALLS == ["a", "b", "c", "r"]
    out = tmp_path / "out"
    assert json.loads((out / "c.json").read_text())["sum"] == pytest.approx(2 * 2 * 20 * 4)
    CALLS.clear()
    result = dict(_run(cfg))
    assert CALLS == [] and result["b"].startswith("skipped")
    cfg = write_config(tmp_path, "\n[motion]\nupsample = 3\n")
    _run(cfg)
    assert CALLS == ["b", "c", "r"]  # a is untouched by [motion]; the report always follows
    assert json.loads((out / "c.json").read_text())["sum"] == pytest.approx(2 * 2 * 3 * 4)
    CALLS.clear()
    cfg = write_config(tmp_path, "\n[motion]\nupsample = 3\n[cells]\ndiameter_um = 5.0\n")
    _run(cfg)
    assert CALLS == ["c", "r"]
    rows = {r["stage"]: r["state"] for r in stages.status_rows(load_config(cfg))}
    assert rows == {"a": "done", "b": "done", "c": "done", "r": "done"}


def test_changed_raw_input_reruns_ingest_like_stage(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    _run(cfg)
    CALLS.clear()
    (tmp_path / "raw" / "vol_00001.tif").write_bytes(b"changed content")
    assert {r["stage"]: r["state"] for r in stages.status_rows(load_config(cfg))}["a"] == "stale"
    _run(cfg)
    assert CALLS == ["a", "b", "c", "r"]


def test_failure_leaves_no_record_and_no_output(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    _run(cfg)
    out = tmp_path / "out"
    before = (out / "b.parquet").read_bytes()
    bad = write_config(tmp_path, "\n[motion]\nreference_count = 13\n")
    with pytest.raises(RuntimeError, match="planted failure"):
        _run(bad)
    store = Store(out)
    assert store.record("b") is None and store.record("a") is not None
    # the old b output was not replaced by the half-written one, and nothing new is visible
    assert (out / "b.parquet").read_bytes() == before
    assert np.allclose(store.read_array("b/y")[:], 2 * 2 * 20)
    assert not (out / ".forkmap.lock").exists()
    states = {r["stage"]: r["state"] for r in stages.status_rows(load_config(bad))}
    assert states == {"a": "done", "b": "missing", "c": "stale", "r": "stale"}


def test_only_and_from(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    with pytest.raises(StageError, match=r"stage 'b' needs stage 'a', which has not run"):
        _run(cfg, only="b")
    with pytest.raises(StageError, match=r"--only 'zz': no such stage; stages are a, b, c, r"):
        _run(cfg, only="zz")
    _run(cfg)
    CALLS.clear()
    _run(cfg, from_stage="b")
    assert CALLS == ["b", "c", "r"]
    CALLS.clear()
    _run(cfg, only="a", force=True)
    assert CALLS == ["a"]


def test_lock_refuses_second_runner(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    store = Store(tmp_path / "out")
    with store.lock():
        with pytest.raises(LockError, match=r"is in use by pid \d+ on host .* delete .*lock"):
            _run(cfg)
    # a lock left by a dead process on this host is taken over
    lock = tmp_path / "out" / ".forkmap.lock"
    lock.write_text(json.dumps({"pid": 2**22 + 12345, "host": os.uname().nodename,
                                "since": "then"}))
    _run(cfg)
    assert CALLS == ["a", "b", "c", "r"] and not lock.exists()


def test_manifest_records_inputs_and_versions(tmp_path: Path, toy_stages: None) -> None:
    cfg = write_config(tmp_path)
    _run(cfg)
    m = Store(tmp_path / "out").manifest()
    import hashlib

    raw = tmp_path / "raw" / "vol_00000.tif"
    rec = next(r for r in m["inputs"]["imaging"] if r["name"] == raw.name)
    # reference: hashlib.sha256 of the whole file
    assert rec["sha256"] == hashlib.sha256(raw.read_bytes()).hexdigest()
    assert rec["size"] == raw.stat().st_size
    assert m["versions"]["numpy"] == np.__version__
    assert m["stages"]["b"]["outputs"] == ["session.zarr/b", "b.parquet"]
    assert m["stages"]["b"]["inputs"]["a"] == m["stages"]["a"]["record_hash"]
