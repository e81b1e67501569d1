"""Where the per-run jobs execute: a local process pool, or a Dask distributed cluster.

Both take a picklable function and a list of items and yield ``(item, result, error)`` as runs
finish, in completion order. A lost worker turns into an error for the runs it held (the local
pool) or into a retry on another worker (Dask reschedules tasks of a dead worker).
This module stays light (no polars/duckdb at import) so worker processes can limit their
thread pools before those libraries start.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from typing import Any

from tracelab.errors import UsageError

EXECUTORS = ("local", "dask")
#: Worker processes of the LocalCluster started when --executor dask has no --scheduler.
DASK_LOCAL_WORKERS = 2

#: Dask settings of the LocalCluster: no profiler, no GIL monitor, slower system monitor.
LOCAL_CLUSTER_CONFIG = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.system-monitor.gil.enabled": False,
    "distributed.admin.system-monitor.interval": "2s",
}

Outcome = tuple[Any, Any, BaseException | None]


def cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def threads_per_worker(workers: int) -> int:
    """Each worker's share of the cores for its own thread pools (DuckDB, polars)."""
    return max(1, cores() // max(1, workers))


def _init_worker(threads: int) -> None:
    """Runs first in each pool process, before polars or DuckDB are imported there."""
    os.environ["TRACELAB_THREADS"] = str(threads)
    os.environ["POLARS_MAX_THREADS"] = str(threads)


class LocalExecutor:
    """A process pool over runs (spawned processes: no fork of a threaded parent)."""

    name = "local"

    def __init__(self, workers: int | None = None) -> None:
        self.workers = workers or cores()
        if self.workers < 1:
            raise UsageError(f"--workers must be at least 1, not {self.workers}")

    def map(self, fn: Callable[..., Any], items: list[Any], *args: Any) -> Iterator[Outcome]:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed

        if not items:
            return
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=min(self.workers, len(items)), mp_context=context,
                                 initializer=_init_worker,
                                 initargs=(threads_per_worker(self.workers),)) as pool:
            futures = {pool.submit(fn, item, *args): item for item in items}
            for future in as_completed(futures):
                try:
                    yield futures[future], future.result(), None
                except Exception as error:  # noqa: BLE001 - e.g. BrokenProcessPool
                    yield futures[future], None, error

    def close(self) -> None:
        pass

    def describe(self) -> str:
        return f"local process pool, {self.workers} workers"


class DaskExecutor:
    """Submit each run to a Dask cluster at ``scheduler``, or to a LocalCluster it starts
    (loopback, no dashboard). The fleet directory must be visible to every worker."""

    name = "dask"

    def __init__(self, scheduler: str | None = None, workers: int | None = None,
                 timeout_s: float = 20.0) -> None:
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise UsageError("--executor dask needs Dask: pip install 'tracelab[cluster]' "
                             "(the local executor needs nothing more)") from None

        self.cluster: Any = None
        self.scheduler = scheduler
        try:
            if scheduler:
                self.client = Client(scheduler, timeout=f"{timeout_s}s")
            else:
                import dask

                n = workers or DASK_LOCAL_WORKERS
                threads = threads_per_worker(n)
                # the workers' statistical profiler samples every 10 ms and takes the GIL from
                # the run it profiles; nobody reads those profiles without a dashboard
                with dask.config.set(LOCAL_CLUSTER_CONFIG):
                    self.cluster = LocalCluster(
                        n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                        dashboard_address=None, silence_logs=50,
                        env={"TRACELAB_THREADS": str(threads),
                             "POLARS_MAX_THREADS": str(threads)})
                self.client = Client(self.cluster)
        except OSError as error:  # unreachable scheduler, port trouble
            self.close()
            where = scheduler or "a local cluster"
            raise UsageError(f"cannot reach the Dask scheduler at {where} ({error})") from error

    def map(self, fn: Callable[..., Any], items: list[Any], *args: Any) -> Iterator[Outcome]:
        from distributed import as_completed

        if not items:
            return
        futures = {}
        for item in items:
            key = f"tracelab-run-{getattr(item, 'key', id(item))}"
            futures[self.client.submit(fn, item, *args, key=key, pure=False)] = item
        for future in as_completed(list(futures)):
            try:
                yield futures[future], future.result(), None
            except Exception as error:  # noqa: BLE001 - KilledWorker after repeated losses
                yield futures[future], None, error

    def close(self) -> None:
        client = getattr(self, "client", None)
        if client is not None:
            client.close()
        if self.cluster is not None:
            self.cluster.close()
            self.cluster = None

    def describe(self) -> str:
        return f"dask cluster at {self.scheduler}" if self.scheduler else "dask LocalCluster"


def make_executor(executor: str, scheduler: str | None = None,
                  workers: int | None = None) -> LocalExecutor | DaskExecutor:
    """The executor named on the command line."""
    if executor == "local":
        if scheduler:
            raise UsageError("--scheduler needs --executor dask")
        return LocalExecutor(workers)
    if executor == "dask":
        return DaskExecutor(scheduler, workers)
    raise UsageError(f"unknown executor {executor!r}; expected local or dask")
