"""The stage registry and the runner.

A stage is a function ``(settings, store, compute) -> None`` registered with :func:`stage`
under a name, the stages it requires and the config sections it reads. The runner runs stages
in dependency order and records each finished stage in ``manifest.json``; a stage whose record
matches (same config hash, same inputs) is skipped, a changed one re-runs with everything
downstream of it.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from pipeline.compute import Compute
from pipeline.config import Settings, section_hash
from pipeline.errors import StageError
from pipeline.store import StageStore, Store, file_sha256

__all__ = ["Stage", "stage", "registry", "plan", "run_stages", "status_rows", "input_records"]

log = logging.getLogger("forkmap")

StageFn = Callable[[Settings, StageStore, Compute], None]


@dataclass(frozen=True)
class Stage:
    """A registered stage."""

    name: str
    fn: StageFn
    requires: tuple[str, ...]
    sections: tuple[str, ...]
    inputs: tuple[str, ...]
    resumable: bool
    enabled: Callable[[Settings], bool]
    after_all: bool = False


_REGISTRY: dict[str, Stage] = {}


def stage(name: str, *, requires: tuple[str, ...] = (), sections: tuple[str, ...] = (),
          inputs: tuple[str, ...] = (), resumable: bool = False,
          enabled: Callable[[Settings], bool] | None = None,
          after_all: bool = False) -> Callable[[StageFn], StageFn]:
    """Register a stage function.

    Parameters
    ----------
    name : str
        Stage name (``forkmap run --only NAME``).
    requires : tuple of str
        Stages whose outputs this one reads.
    sections : tuple of str
        Config sections whose values change this stage's result.
    inputs : tuple of str
        Raw input groups it reads (``"imaging"``, ``"behaviour"``, ``"sync"``): their files'
        checksums are part of its record.
    resumable : bool, default=False
        Keep partial work in staging across an interrupted run (same config hash only).
    enabled : callable, optional
        ``settings -> bool``; a disabled stage is reported as "off" and not run.
    after_all : bool, default=False
        Run after every other stage and again whenever any of them changed, reading whatever
        they wrote (the report); a stage that has not run is not an error for it.
    """

    def register(fn: StageFn) -> StageFn:
        _REGISTRY[name] = Stage(name, fn, tuple(requires), tuple(sections), tuple(inputs),
                                resumable, enabled or (lambda s: True), after_all)
        return fn

    return register


def registry() -> dict[str, Stage]:
    """All registered stages in dependency order."""
    import pipeline.stages_all  # noqa: F401  (imports every stage module)

    order: list[str] = []
    seen: set[str] = set()

    def visit(n: str, path: tuple[str, ...]) -> None:
        if n in seen:
            return
        if n in path:
            raise StageError(f"stage dependency cycle: {' -> '.join((*path, n))}")
        if n not in _REGISTRY:
            raise StageError(f"stage {path[-1]!r} requires unknown stage {n!r}")
        for dep in _REGISTRY[n].requires:
            visit(dep, (*path, n))
        seen.add(n)
        order.append(n)

    # a fixed visiting order, so the run order never depends on which module was imported first
    preferred = {n: i for i, n in enumerate(pipeline.stages_all.PIPELINE_ORDER)}
    for n in sorted(_REGISTRY, key=lambda n: (_REGISTRY[n].after_all,
                                              preferred.get(n, len(preferred)), n)):
        visit(n, ())
    return {n: _REGISTRY[n] for n in order}


# --------------------------------------------------------------------------------------------
def input_records(settings: Settings, store: Store) -> dict[str, list[dict[str, Any]]]:
    """Name, size and SHA-256 of every raw input, reusing checksums of unchanged files."""
    cached = {rec["path"]: rec for group in store.manifest().get("inputs", {}).values()
              for rec in group if isinstance(rec, dict)}
    out: dict[str, list[dict[str, Any]]] = {}
    for group, paths in settings.input_files().items():
        recs = []
        for p in paths:
            st = p.stat()
            old = cached.get(str(p))
            if old and old.get("size") == st.st_size and old.get("mtime_ns") == st.st_mtime_ns:
                recs.append(old)
                continue
            recs.append({"path": str(p), "name": p.name, "size": st.st_size,
                         "mtime_ns": st.st_mtime_ns, "sha256": file_sha256(p)})
        out[group] = recs
    return out


def _digest(obj: Any) -> str:
    return hashlib.sha256(json.dumps(obj, sort_keys=True, default=str).encode()).hexdigest()


def _expected(st: Stage, settings: Settings, inputs: dict[str, list[dict[str, Any]]],
              records: dict[str, str]) -> dict[str, Any]:
    deps = [n for n in _REGISTRY if n != st.name and not _REGISTRY[n].after_all] \
        if st.after_all else st.requires
    return {
        "config_hash": section_hash(settings, st.sections),
        "inputs": {dep: records.get(dep, "") for dep in deps},
        "raw_inputs": {g: _digest([(r["name"], r["size"], r["sha256"]) for r in inputs.get(g, [])])
                       for g in st.inputs},
    }


def plan(settings: Settings, store: Store, *, inputs: dict[str, list[dict[str, Any]]] | None
         = None) -> list[tuple[Stage, str]]:
    """Each stage with its state: ``done``, ``stale`` (record differs), ``missing`` or ``off``."""
    inputs = inputs if inputs is not None else input_records(settings, store)
    records: dict[str, str] = {}
    out: list[tuple[Stage, str]] = []
    stale_upstream: set[str] = set()
    off: set[str] = set()
    for name, st in registry().items():
        if not st.enabled(settings) or any(dep in off for dep in st.requires):
            off.add(name)
            out.append((st, "off"))
            continue
        rec = store.record(name)
        exp = _expected(st, settings, inputs, records)
        if rec is None:
            state = "missing"
        elif any(dep in stale_upstream for dep in (stale_upstream if st.after_all
                                                    else st.requires)) or any(
                rec.get(k) != v for k, v in exp.items()):
            state = "stale"
        else:
            state = "done"
        if state != "done":
            stale_upstream.add(name)
        if rec is not None:
            records[name] = rec.get("record_hash", "")
        out.append((st, state))
    return out


def run_stages(settings: Settings, *, only: str | None = None, from_stage: str | None = None,
               force: bool = False, quiet: bool = False) -> list[tuple[str, str]]:
    """Run the pipeline; returns ``(stage, what happened)`` pairs.

    Raises
    ------
    StageError
        Unknown stage name, or ``--only`` on a stage whose dependencies have not run.
    """
    store = Store(settings.session.output)
    names = list(registry())
    for opt, value in (("--only", only), ("--from", from_stage)):
        if value is not None and value not in names:
            raise StageError(f"{opt} {value!r}: no such stage; stages are {', '.join(names)}")
    done: list[tuple[str, str]] = []
    with store.lock():
        inputs = input_records(settings, store)
        store.update_manifest(config=settings.to_dict(), config_toml=settings.raw_toml,
                              versions=_versions(), inputs=inputs)
        forced: set[str] = set()
        if from_stage is not None:
            forced = {from_stage} | _downstream(from_stage)
        compute = Compute(settings.compute, quiet=quiet)
        try:
            for st, state in plan(settings, store, inputs=inputs):
                if only is not None and st.name != only:
                    continue
                if state == "off":
                    done.append((st.name, "off"))
                    continue
                if state == "done" and not force and st.name not in forced:
                    done.append((st.name, "skipped (up to date)"))
                    continue
                for dep in st.requires:
                    if store.record(dep) is None and not st.after_all:
                        raise StageError(f"stage {st.name!r} needs stage {dep!r}, which has not "
                                         f"run; run `forkmap run` without --only first")
                seconds = _run_one(st, settings, store, compute, inputs)
                done.append((st.name, f"ran in {seconds:.1f} s"))
        finally:
            compute.close()
    return done


def _downstream(name: str) -> set[str]:
    reg = registry()
    out: set[str] = set()
    changed = True
    while changed:
        changed = False
        for n, st in reg.items():
            if n not in out and (st.after_all or any(d == name or d in out
                                                     for d in st.requires)):
                out.add(n)
                changed = True
    return out


def _run_one(st: Stage, settings: Settings, store: Store, compute: Compute,
             inputs: dict[str, list[dict[str, Any]]]) -> float:
    records = {n: (store.record(n) or {}).get("record_hash", "") for n in _REGISTRY}
    exp = _expected(st, settings, inputs, records)
    store.drop_record(st.name)  # from here until commit the stage is not done
    sub = store.stage_store(st.name, exp["config_hash"], resumable=st.resumable)
    log.info("stage %s: start", st.name)
    started = _dt.datetime.now(_dt.UTC)
    t0 = time.perf_counter()
    st.fn(settings, sub, compute)
    outputs = sub.commit()
    seconds = time.perf_counter() - t0
    record = {
        "stage": st.name, **exp, "outputs": outputs,
        "started": started.isoformat(timespec="milliseconds"),
        "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="milliseconds"),
        "seconds": round(seconds, 3), **sub.record_extras(),
    }
    record["record_hash"] = _digest({k: record[k] for k in ("stage", *exp.keys(), "outputs",
                                                             "started")})
    store.write_record(st.name, record)
    log.info("stage %s: done in %.1f s", st.name, seconds)
    return seconds


def status_rows(settings: Settings) -> list[dict[str, str]]:
    """One row per stage: name, state, when it finished, how long it took."""
    store = Store(settings.session.output)
    rows = []
    for st, state in plan(settings, store):
        rec = store.record(st.name) or {}
        rows.append({"stage": st.name, "state": state, "when": rec.get("finished", ""),
                     "seconds": str(rec.get("seconds", "")),
                     "warnings": str(len(rec.get("warnings", [])) or "")})
    return rows


def _versions() -> dict[str, str]:
    from importlib import metadata

    out = {}
    for dist in ("forkmap", "numpy", "scipy", "dask", "distributed", "zarr", "tifffile",
                 "scikit-learn", "scikit-image", "pandas", "pyarrow", "numba", "pynwb"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = "not installed"
    import platform

    out["python"] = platform.python_version()
    return out
