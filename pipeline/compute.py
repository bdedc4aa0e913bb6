"""Choosing and starting the scheduler that runs a stage's tasks.

``[compute] scheduler`` selects one of:

``"threads"``        a thread pool in this process (default; NumPy, FFTs and numba release the GIL)
``"processes"``      a pool of spawned worker processes on this machine
``"local-cluster"``  a ``distributed.LocalCluster`` with ``workers`` worker processes
``"tcp://host:port"`` an existing dask.distributed scheduler
``"slurm"``          a ``dask_jobqueue.SLURMCluster`` built from ``[compute.slurm]``

Stages call :meth:`Compute.map` (one task per item, results in input order) or
:meth:`Compute.compute` (dask collections). Both show one progress bar that works under every
scheduler: dask's own bars print nothing under a distributed Client, so progress is counted from
futures completing (``as_completed``).

Tasks are the unit of parallelism: inside :meth:`Compute.reduce` / :meth:`Compute.map` BLAS runs
on one thread per task under every scheduler (dask.distributed's workers already start with
``OPENBLAS_NUM_THREADS=1``; the thread and process pools and the inline loop are limited here).
A second BLAS thread only oversubscribes the cores the workers use: the small matrix products
of the sub-voxel motion refinement cost 234 ms of CPU per volume with OpenBLAS's two threads on
the loaded 2-core test machine, 1.1 ms with one (measured).
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import logging
import multiprocessing
import os
from collections.abc import Callable, Iterable, Sequence
from typing import Any

from tqdm.auto import tqdm

from pipeline.config import ComputeSettings
from pipeline.errors import ConfigError

__all__ = ["Compute", "slurm_cluster"]

log = logging.getLogger("forkmap")


def slurm_cluster(settings: ComputeSettings) -> Any:
    """Build (but do not scale) a ``dask_jobqueue.SLURMCluster`` from ``[compute.slurm]``."""
    try:
        from dask_jobqueue import SLURMCluster
    except ImportError:  # pragma: no cover - depends on the install
        raise ConfigError("compute.scheduler = 'slurm' needs dask-jobqueue: "
                          "pip install 'forkmap[slurm]'") from None
    s = settings.slurm
    kwargs: dict[str, Any] = {
        "cores": s.cores, "memory": s.memory, "walltime": s.walltime,
        "processes": s.processes,
    }
    if s.queue:
        kwargs["queue"] = s.queue
    if s.account:
        kwargs["account"] = s.account
    if s.local_directory:
        kwargs["local_directory"] = s.local_directory
    return SLURMCluster(**kwargs)


# dask.distributed's nannies start workers with MALLOC_TRIM_THRESHOLD_=65536 so that freed
# memory goes back to the OS at once. Setting it switches off glibc's dynamic mmap threshold
# (mallopt(3)), so every large temporary (a volume, an FFT buffer) is a fresh mmap whose pages
# are faulted in and zeroed again: the motion + summary + sampling task of the imaging
# benchmark took 1.17 s of CPU for 25 volumes on a LocalCluster worker against 0.80 s in this
# process, and 0.79-0.84 s on a worker started without the variable (measured). Our tasks
# reuse buffers of the same sizes volume after volume, so local clusters start without it.
_TRIM_KEY = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"

_BLAS: Any = None                 # the process's ThreadpoolController, made on first use


def _one_blas_thread() -> Any:
    """Limit BLAS to one thread, process-wide, from now until the returned context exits."""
    global _BLAS
    if _BLAS is None:
        from threadpoolctl import ThreadpoolController

        _BLAS = ThreadpoolController()
    return _BLAS.limit(limits=1, user_api="blas")


def _init_process_worker() -> None:
    """Initializer of spawned process workers: one BLAS thread for the worker's life."""
    _one_blas_thread()


def _as_list(item: Any, fn: Callable[..., Any], args: tuple, kwargs: dict) -> list[Any]:
    """Task wrapper of :meth:`Compute.map`: one result as a one-item list (picklable)."""
    return [fn(item, *args, **kwargs)]


def _extend(total: list[Any], part: list[Any]) -> list[Any]:
    total.extend(part)
    return total


class Compute:
    """The scheduler for one run.

    Parameters
    ----------
    settings : ComputeSettings
        The ``[compute]`` section.
    quiet : bool, default=False
        Hide progress bars.
    """

    def __init__(self, settings: ComputeSettings | None = None, *, quiet: bool = False) -> None:
        self.settings = settings or ComputeSettings()
        self.quiet = quiet
        self.client: Any = None
        self._cluster: Any = None
        self._pool: cf.Executor | None = None
        sched = self.settings.scheduler
        if sched == "local-cluster":
            import dask
            from distributed import Client, LocalCluster

            # imported first: the override below must not be undone by distributed's own
            # config loading inside the context
            with dask.config.set({_TRIM_KEY: None}):
                self._cluster = LocalCluster(
                    n_workers=self.n_workers,
                    threads_per_worker=self.settings.threads_per_worker,
                    memory_limit=self.settings.memory_per_worker, processes=True,
                    dashboard_address=None,
                )
            self.client = Client(self._cluster)
        elif sched.startswith("tcp://"):
            from distributed import Client

            self.client = Client(sched)
        elif sched == "slurm":
            from distributed import Client

            self._cluster = slurm_cluster(self.settings)
            self._cluster.scale(jobs=self.settings.slurm.jobs)
            self.client = Client(self._cluster)

    @property
    def n_workers(self) -> int:
        """Number of parallel workers (cores when ``workers = 0``)."""
        return self.settings.workers or os.cpu_count() or 1

    @property
    def scheduler(self) -> str:
        return self.settings.scheduler

    def _executor(self) -> cf.Executor:
        if self._pool is None:
            if self.settings.scheduler == "processes":
                self._pool = cf.ProcessPoolExecutor(
                    self.n_workers, mp_context=multiprocessing.get_context("spawn"),
                    initializer=_init_process_worker)
            else:
                self._pool = cf.ThreadPoolExecutor(self.n_workers)
        return self._pool

    def map(self, fn: Callable[..., Any], items: Iterable[Any], *args: Any, desc: str = "",
            **kwargs: Any) -> list[Any]:
        """Run ``fn(item, *args, **kwargs)`` for every item; results in input order.

        ``fn`` must be a module-level function with plain arguments so that it can run on
        process workers and on a cluster.
        """
        items = list(items)
        if not items:
            return []
        return self.reduce(_as_list, items, fn, args, kwargs, merge=_extend, desc=desc)

    def reduce(self, fn: Callable[..., Any], items: Iterable[Any], *args: Any,
               merge: Callable[[Any, Any], Any], desc: str = "") -> Any:
        """``merge`` the results of ``fn(item, *args)`` in input order, as tasks finish.

        Results that arrive early wait only until their predecessors are merged, so memory
        holds about one result per running task (not one per item), and the order of the
        additions, hence the floating-point result, does not depend on the scheduler or the
        worker count. ``merge(total, result)`` returns the new total.
        """
        items = list(items)
        if not items:
            raise ValueError("Compute.reduce needs at least one item")
        bar = tqdm(total=len(items), desc=desc, disable=self.quiet, unit="task", leave=False)
        total: Any = None
        pending: dict[int, Any] = {}
        nxt = 0

        def take(i: int, result: Any) -> None:
            nonlocal total, nxt
            pending[i] = result
            while nxt in pending:
                r = pending.pop(nxt)
                total = r if nxt == 0 else merge(total, r)
                nxt += 1
            bar.update(1)

        limit = _one_blas_thread() if self.client is None else contextlib.nullcontext()
        try:
            if self.client is not None:
                from distributed import as_completed

                futures = self.client.map(fn, items, *[[a] * len(items) for a in args],
                                          pure=False)
                index = {f.key: i for i, f in enumerate(futures)}
                for fut, result in as_completed(futures, with_results=True):
                    take(index[fut.key], result)
                    fut.release()
            elif self.n_workers == 1:
                for i, item in enumerate(items):
                    take(i, fn(item, *args))
            else:
                pool = self._executor()
                # a bounded window of tasks in flight keeps memory at O(workers) results
                futs: dict[cf.Future[Any], int] = {}
                queue = iter(enumerate(items))

                def submit() -> None:
                    job = next(queue, None)
                    if job is not None:
                        futs[pool.submit(fn, job[1], *args)] = job[0]

                for _ in range(2 * self.n_workers):
                    submit()
                try:
                    while futs:
                        done, _ = cf.wait(futs, return_when=cf.FIRST_COMPLETED)
                        for f in done:
                            take(futs.pop(f), f.result())
                            submit()
                except BaseException:
                    for f in futs:
                        f.cancel()
                    raise
            return total
        finally:
            limit.__exit__(None, None, None)  # the limit took effect when it was made
            bar.close()

    def compute(self, *collections: Any, desc: str = "") -> Sequence[Any]:
        """Compute dask collections on this scheduler with a progress bar."""
        import dask

        if self.client is not None:
            from distributed import as_completed, futures_of

            persisted = self.client.persist(list(collections))
            futs = futures_of(persisted)
            with tqdm(total=len(futs), desc=desc, disable=self.quiet, leave=False) as bar:
                for _ in as_completed(futs):
                    bar.update(1)
            return self.client.compute(persisted, sync=True)
        from dask.callbacks import Callback

        class _Bar(Callback):
            def _start_state(self, dsk: Any, state: Any) -> None:
                self._bar = tqdm(total=sum(len(state[k]) for k in ("ready", "waiting",
                                                                     "running")),
                                 desc=desc, disable=outer.quiet, leave=False)

            def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, wid: Any) -> None:
                self._bar.update(1)

            def _finish(self, dsk: Any, state: Any, errored: Any) -> None:
                self._bar.close()

        outer = self
        scheduler = "processes" if self.settings.scheduler == "processes" else "threads"
        with _Bar():
            return dask.compute(*collections, scheduler=scheduler,
                                num_workers=self.n_workers)

    def close(self) -> None:
        """Shut down pools, clients and clusters started by this object."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        if self.client is not None:
            self.client.close()
            self.client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None

    def __enter__(self) -> Compute:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
