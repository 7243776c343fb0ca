"""Where the runs of a study go: one executor for refinement levels and ensemble members.

Studies submit independent runs to a :class:`concurrent.futures.Executor`. By default that is
a dask.distributed ``LocalCluster`` sized to this machine (one single-threaded worker
process per core, at most one per run); given a scheduler address it is that cluster,
whatever its size. With one worker and no address the runs go one after the other in the
calling process (:class:`SerialExecutor`, no pickling). This module is the only user of
dask in fe3d.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, Future
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from fe3d.errors import CaseError

__all__ = ["SerialExecutor", "StudyExecutor", "machine_workers", "study_executor"]

logger = logging.getLogger(__name__)

CONNECT_TIMEOUT = 20.0
"""Seconds to wait for a scheduler given by address before giving up (common practice, no
source: long enough for a scheduler on a busy network, short enough to fail visibly)."""


class SerialExecutor(Executor):
    """Runs each submitted call at once in the calling process (one worker, no pickling)."""

    def submit(self, fn: Callable[..., Any], /, *args: Any, **kwargs: Any) -> Future[Any]:
        """Call ``fn(*args, **kwargs)`` now; the future holds its result or exception."""
        future: Future[Any] = Future()
        try:
            future.set_result(fn(*args, **kwargs))
        except BaseException as exc:  # handed to the caller through the future
            future.set_exception(exc)
        return future


def _same(obj: Any) -> Any:
    return obj


@dataclass(frozen=True)
class StudyExecutor:
    """An executor and what a study needs to know of it.

    ``share(obj)`` hands a large object (a mesh) to every worker once and returns what to
    pass to ``executor.submit`` in its place; ``workers`` is the number of runs that can go
    at once; ``where`` says in words where the runs go.
    """

    executor: Executor
    workers: int
    where: str
    share: Callable[[Any], Any] = _same


def machine_workers(n_runs: int) -> int:
    """Workers of the default local cluster: one per core, at most one per run."""
    return max(1, min(os.cpu_count() or 1, n_runs))


@contextmanager
def study_executor(*, n_runs: int, scheduler: str | None = None, workers: int | None = None,
                   single_in_process: bool = True) -> Iterator[StudyExecutor]:
    """Open the executor of a study, and close what was opened for it afterwards.

    Parameters
    ----------
    n_runs
        Runs the study will submit (the local cluster has no more workers than that).
    scheduler
        Address of a running dask.distributed scheduler (``tcp://host:8786``); its workers
        take the runs. ``None``: a local cluster on this machine.
    workers
        Worker processes of the local cluster (default: :func:`machine_workers`); 1 runs
        everything in this process, unless ``single_in_process`` is false (a local cluster
        of one worker, to compare like with like).

    Raises
    ------
    CaseError
        Naming ``--scheduler`` when no scheduler answers at the address.
    """
    if scheduler is None and single_in_process and (workers or machine_workers(n_runs)) == 1:
        yield StudyExecutor(SerialExecutor(), 1, "this process, one run at a time")
        return
    quiet = logging.getLogger("distributed")
    level = quiet.level
    quiet.setLevel(logging.ERROR)  # the nannies' notes on closing are not the user's business
    try:
        with _client(scheduler, workers, n_runs) as (client, n, where):
            executor = client.get_executor(pure=False)
            try:
                yield StudyExecutor(executor, n, where,
                                    lambda obj: client.scatter(obj, broadcast=True,
                                                               hash=False))
            finally:
                executor.shutdown(wait=False)
    finally:
        quiet.setLevel(level)


@contextmanager
def _client(scheduler: str | None, workers: int | None, n_runs: int
            ) -> Iterator[tuple[Any, int, str]]:
    """A dask client of a new local cluster or of the scheduler at ``scheduler``, the
    number of runs it takes at once, and where that is in words."""
    import dask
    from distributed import Client, LocalCluster

    cluster = None
    if scheduler is None:
        n = workers or machine_workers(n_runs)
        # one thread per worker: fe3d's solvers hold one BLAS thread each (fe3d._threads)
        # no dashboard, and the scheduler's web port chosen free (8787 may be taken by
        # another study on the same machine)
        # and no statistical profiler in the workers: it samples every thread's stack
        # every 10 ms, which cost a member about 10 % more processor time (measured,
        # docs/performance.md, Ensembles)
        # and glibc's own memory thresholds in the workers: dask sets MALLOC_TRIM_THRESHOLD_
        # before a worker starts, which also fixes the threshold above which glibc maps
        # each allocation afresh, so every array of a step was mapped, zeroed page by page
        # and unmapped again (on the demo's refinement study 9.7 of its 21.6 min were
        # system time; docs/performance.md, Refinement study)
        environ = {k: v for k, v in dask.config.get("distributed.nanny.pre-spawn-environ",
                                                    {}).items()
                   if not k.startswith("MALLOC_")}
        with dask.config.set({"distributed.worker.profile.enabled": False,
                              "distributed.nanny.pre-spawn-environ": environ}):
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                   dashboard_address=":0",
                                   scheduler_kwargs={"dashboard": False},
                                   silence_logs=logging.ERROR)
        client = Client(cluster)
        where = f"local cluster, {n} worker processes × 1 thread"
    else:
        try:
            client = Client(scheduler, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError, ValueError) as exc:
            err = CaseError("--scheduler", scheduler, f"no dask scheduler answers there "
                            f"({type(exc).__name__}: {exc})")
            raise err from None
        n = max(1, sum(w.get("nthreads", 1) for w in
                       client.scheduler_info()["workers"].values()))
        where = f"cluster at {scheduler}, {n} worker threads"
    try:
        yield client, n, where
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
