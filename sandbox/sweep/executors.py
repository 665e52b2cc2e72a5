"""Where the runs of a sweep execute: this process, local processes, or a Dask cluster.

Every executor runs :func:`sandbox.sweep.jobs.run_point` on the same jobs and
yields ``(job, row)`` pairs as runs finish, in whatever order they finish; the
callers sort by point number, so the results do not depend on the executor.
At most a few jobs per worker are in flight at once, so a sweep of many
thousand points neither piles up pickled jobs nor floods a scheduler.
"""

from __future__ import annotations

import itertools
import logging
import multiprocessing
import os
import signal
from collections import deque
from collections.abc import Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from typing import Any, Protocol

from .jobs import PointJob, RunCommon, lost_row, run_point, run_points

IN_FLIGHT_PER_WORKER = 2
# what a Dask future raises when the workers running it died
LOST_WORKER_ERRORS = ("KilledWorker", "CancelledError", "FutureCancelledError")
DASK_IN_FLIGHT_PER_WORKER = 3  # tasks
DASK_MAX_RUNS_PER_TASK = 4
# A local Dask cluster shares the machine's cores with its own bookkeeping. Measured on
# 2 cores with no tasks: the scheduler used 5 % of a core and each worker 3.6 %; with these
# settings 2 % and under 1 %. The statistical profiler (a stack sample of the running task
# every 10 ms, taking the GIL) and the GIL monitor only serve the dashboard, which is off.
# Dask also starts workers with MALLOC_TRIM_THRESHOLD_=65536, which made a run here about
# 10 % slower (memory handed back to the system and faulted in again every world built);
# the thread limits it sets alongside are kept.
LOCAL_CLUSTER_CONFIG = {
    "distributed.nanny.pre-spawn-environ": {
        "OMP_NUM_THREADS": 1, "MKL_NUM_THREADS": 1, "OPENBLAS_NUM_THREADS": 1},
    "distributed.worker.profile.enabled": False,
    "distributed.admin.system-monitor.gil.enabled": False,
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.admin.tick.interval": "100ms",
    "distributed.worker.memory.monitor-interval": "1s",
}


class Executor(Protocol):
    workers: int

    def map_unordered(self, jobs: Iterable[PointJob]) -> Iterator[tuple[PointJob, dict]]: ...

    def close(self, cancel: bool = False) -> None: ...


def default_workers() -> int:
    """Every core this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on every platform
        return max(1, os.cpu_count() or 1)


class InProcess:
    """Runs one job after another in this process (one worker, no start-up cost)."""

    workers = 1

    def __init__(self, common: RunCommon):
        self.common = common

    def map_unordered(self, jobs: Iterable[PointJob]) -> Iterator[tuple[PointJob, dict]]:
        for job in jobs:
            yield job, run_point(self.common, job)

    def close(self, cancel: bool = False) -> None:
        pass


# Set in each local worker process by its initializer: the shared part of every job.
_WORKER_COMMON: RunCommon | None = None


def _install_common(common: RunCommon, parent: int | None = None) -> None:
    global _WORKER_COMMON
    _WORKER_COMMON = common
    # Ctrl-C belongs to the parent, which cancels the sweep; a worker finishes its run.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    from ..interrupts import end_with_parent
    from ..wire import no_spare_core

    end_with_parent(parent)
    no_spare_core()  # the pool fills the cores: isolated controllers wait on their pipes


def _run_installed(job: PointJob) -> dict:
    assert _WORKER_COMMON is not None, "worker started without its shared job data"
    return run_point(_WORKER_COMMON, job)


class LocalProcesses:
    """A pool of fresh ("spawn") Python processes on this machine.

    Spawned rather than forked so no engine state or thread of the parent is
    copied into a worker: each run creates its own physics client in the worker.
    """

    def __init__(self, common: RunCommon, workers: int):
        self.workers = workers
        self.common = common
        self.pool = self._new_pool()

    def _new_pool(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(
            max_workers=self.workers, mp_context=multiprocessing.get_context("spawn"),
            initializer=_install_common, initargs=(self.common, os.getpid()))

    def map_unordered(self, jobs: Iterable[PointJob]) -> Iterator[tuple[PointJob, dict]]:
        """Each job's row as it finishes. A worker that dies (killed, out of memory)
        breaks the pool, and every job the pool held fails with it: a new pool runs each
        of them again, one at a time (so a second death names its job), and a job that
        breaks the pool when running alone a second time gets a failed row instead of
        ending the sweep."""
        queue = iter(jobs)
        suspects: deque[PointJob] = deque()  # jobs a broken pool held, to run alone
        suspected: set[int] = set()
        pending: dict[Any, PointJob] = {}
        window = IN_FLIGHT_PER_WORKER * self.workers

        def fill() -> None:
            while len(pending) < window:
                if suspects:
                    if not pending:
                        job = suspects.popleft()
                        pending[self.pool.submit(_run_installed, job)] = job
                    return
                job = next(queue, None)
                if job is None:
                    return
                pending[self.pool.submit(_run_installed, job)] = job

        fill()
        while pending:
            finished, _ = wait(pending, return_when=FIRST_COMPLETED)
            broken: list[PointJob] = []
            for future in finished:
                job = pending.pop(future)
                try:
                    row = future.result()
                except BrokenProcessPool:
                    broken.append(job)
                    continue
                yield job, row
            if broken:
                broken += pending.values()  # everything the broken pool held
                pending.clear()
                self.pool.shutdown(wait=False, cancel_futures=True)
                self.pool = self._new_pool()
                for job in broken:
                    if len(broken) == 1 and job.index in suspected:
                        yield job, lost_row(job, "its worker process died under it twice")
                    else:
                        suspected.add(job.index)
                        suspects.append(job)
            fill()

    def close(self, cancel: bool = False) -> None:
        self.pool.shutdown(wait=not cancel, cancel_futures=True)
        if cancel:  # do not wait at exit for runs nobody will read
            processes = getattr(self.pool, "_processes", None) or {}
            for process in list(processes.values()):
                process.terminate()


class DaskCluster:
    """A Dask distributed scheduler: ``"local"`` starts a cluster of ``workers``
    single-threaded processes on this machine; anything else is a scheduler address
    (``tcp://host:8786``) whose workers have upright installed."""

    def __init__(self, common: RunCommon, address: str, workers: int):
        from dask.distributed import Client, LocalCluster

        self.cluster = None
        self.closed = False
        if address == "local":
            import dask

            with dask.config.set(LOCAL_CLUSTER_CONFIG):  # the nannies pass it to the workers
                self.cluster = LocalCluster(n_workers=workers, threads_per_worker=1,
                                            processes=True, dashboard_address=None,
                                            silence_logs=logging.ERROR)
                self.client = Client(self.cluster)
            from .dask_guard import LocalWorkerGuard

            # the workers (children of this process: a local cluster's nannies live in
            # it) leave when it dies, however it dies: no cluster runs on orphaned. A
            # plugin, so that a worker the nanny starts again after a crash does too.
            self.client.register_plugin(LocalWorkerGuard(os.getpid()))
        else:
            self.client = Client(address)
            self.client.wait_for_workers(1, timeout=60)
        self.workers = max(1, sum(self.client.nthreads().values()))
        # sent once to every worker; each task then carries only its point
        self.common = self.client.scatter(common, broadcast=True)

    def map_unordered(self, jobs: Iterable[PointJob]) -> Iterator[tuple[PointJob, dict]]:
        from dask.distributed import as_completed

        queue = list(jobs)
        # A few runs per task when there are many: each task costs the client, the
        # scheduler and the worker several ms of CPU, felt on a small machine. Enough
        # tasks stay for every worker to get about four, so the load still balances.
        size = max(1, min(DASK_MAX_RUNS_PER_TASK, len(queue) // (4 * self.workers)))
        chunks = iter([queue[i:i + size] for i in range(0, len(queue), size)])
        pending: dict[str, list[PointJob]] = {}
        stream = as_completed()
        window = DASK_IN_FLIGHT_PER_WORKER * self.workers

        def refill() -> None:
            # one client.map call per batch of tasks, not a message per task
            batch = list(itertools.islice(chunks, window - len(pending)))
            if batch:
                futures = self.client.map(run_points, [self.common] * len(batch), batch,
                                          pure=False)
                for future, chunk in zip(futures, batch):
                    pending[future.key] = chunk
                stream.update(futures)

        refill()
        for future in stream:
            chunk = pending.pop(future.key)
            try:
                rows = future.result()
            except Exception as err:  # noqa: BLE001 - only a lost worker is caught below
                # Dask ran the task again on other workers and gave up (KilledWorker), or
                # the future was cancelled under it: the points are recorded as lost
                if type(err).__name__ not in LOST_WORKER_ERRORS:
                    raise
                rows = [lost_row(job, f"its Dask worker was lost ({type(err).__name__})")
                        for job in chunk]
            if len(pending) <= self.workers:  # keep every worker's queue filled
                refill()
            yield from zip(chunk, rows)

    def close(self, cancel: bool = False) -> None:
        if self.closed:
            return
        self.closed = True
        self.client.close()
        if self.cluster is not None:
            self.cluster.close()


@contextmanager
def open_executor(common: RunCommon, *, workers: int | None = None, cluster: str | None = None,
                  jobs: int | None = None) -> Iterator[Executor]:
    """An executor for ``common``'s runs; closed (pending work cancelled on error) on exit.

    ``workers``: local processes (default: every core) or, with ``cluster="local"``,
    Dask workers; one worker (or one job) runs in this process. ``cluster``: None,
    ``"local"`` or a Dask scheduler address. ``jobs``: how many runs are coming, so
    no more local processes start than there is work for.
    """
    if workers is not None and workers < 1:
        raise ValueError(f"workers must be 1 or more, got {workers}")
    count = workers or default_workers()
    executor: Any
    if cluster:
        executor = DaskCluster(common, cluster, count)
    else:
        count = min(count, jobs) if jobs else count
        executor = InProcess(common) if count <= 1 else LocalProcesses(common, count)
    try:
        yield executor
    except BaseException:
        executor.close(cancel=True)
        raise
    executor.close()
