"""The same stage code runs on every scheduler and gives the same result."""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest

from pipeline.compute import Compute, slurm_cluster
from pipeline.config import ComputeSettings, SlurmSettings


def _block_sum(seed: int) -> float:
    rng = np.random.default_rng(seed)
    return float(rng.normal(size=(64, 64)).sum())


def _block_list(seed: int) -> list[float]:
    return [_block_sum(seed)]


def _concat(total: list[float], part: list[float]) -> list[float]:
    return total + part


def test_threads_processes_and_local_cluster_agree() -> None:
    expected = [_block_sum(i) for i in range(6)]
    for scheduler in ("threads", "processes", "local-cluster"):
        settings = ComputeSettings(scheduler=scheduler, workers=2)
        with Compute(settings, quiet=True) as compute:
            got = compute.map(_block_sum, range(6), desc=scheduler)
            # ordered streaming reduction: same additions in the same order as a plain loop
            folded = compute.reduce(_block_list, range(9), merge=_concat, desc=scheduler)
        assert got == expected, scheduler
        assert folded == [_block_sum(i) for i in range(9)], scheduler


def test_dask_collections_under_threads_and_cluster() -> None:
    import dask.array as da

    x = da.arange(1000, chunks=100) ** 2
    for scheduler in ("threads", "local-cluster"):
        with Compute(ComputeSettings(scheduler=scheduler, workers=2), quiet=True) as compute:
            (total,) = compute.compute(x.sum(), desc="sum")
        assert int(total) == int((np.arange(1000) ** 2).sum())


def test_slurm_job_script_built_without_submitting() -> None:
    pytest.importorskip("dask_jobqueue")
    s = ComputeSettings(scheduler="slurm", slurm=SlurmSettings(
        queue="short", account="lab42", cores=8, memory="32GB", walltime="02:00:00",
        processes=2))
    # the scheduler's dashboard asks for port 8787 and warns when another process holds it;
    # that warning says nothing about the job script checked here
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Port \d+ is already in use")
        cluster = slurm_cluster(s)
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    # reference: the #SBATCH directives dask-jobqueue writes (its documented job_script())
    assert "#SBATCH -p short" in script
    assert "#SBATCH -A lab42" in script
    assert "#SBATCH -t 02:00:00" in script
    assert "--nworkers 2" in script or "--nprocs 2" in script


def test_local_cluster_workers_keep_the_dynamic_malloc_thresholds() -> None:
    import dask

    if "MALLOC_TRIM_THRESHOLD_" in os.environ:
        pytest.skip("the variable is set in this environment and is inherited")
    with Compute(ComputeSettings(scheduler="local-cluster", workers=1), quiet=True) as compute:
        seen = compute.client.run(os.environ.get, "MALLOC_TRIM_THRESHOLD_")
    # distributed's default config would set it to 65536 in each worker (its documented
    # distributed.nanny.pre-spawn-environ); ours leaves it unset, and the client's config
    # keeps its default
    assert list(seen.values()) == [None]
    assert dask.config.get("distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_") == 65536
