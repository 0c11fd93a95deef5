"""Executors: where the batches of an analysis run (this process, a process pool, Dask).

Each implements the protocol of :mod:`trialcut.run.context` — ``map(function, items) ->
list`` in input order — and may report progress with ``map(..., progress=callback)``
(callback(done, total)), which they announce with ``reports_progress = True``.  The
function and items must pickle (module-level functions, plain data).  Executors that
start workers start them on first use and stop them in ``close()`` (or on leaving a
``with`` block); results never depend on the executor, only on the work items.  Every task
runs with one BLAS thread in its worker, as every analysis does in this process
(trialcut.stats.blas_threads): the thread count would otherwise move the last bits of a result.
"""
from __future__ import annotations

import concurrent.futures
import multiprocessing
from typing import Any, Callable, Sequence

from trialcut.errors import InputError, Problem
from trialcut.run.context import InlineExecutor
from trialcut.stats.blas_threads import on_one_blas_thread

__all__ = ["InlineExecutor", "ProcessPoolExecutor", "DaskExecutor", "make_executor"]

Progress = Callable[[int, int], None]

# Dask config key of the environment variable its nannies set before spawning a worker.
_TRIM_SETTING = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"


class _Closing:
    reports_progress = True

    def __enter__(self):
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def close(self) -> None:  # pragma: no cover - overridden
        raise NotImplementedError


class ProcessPoolExecutor(_Closing):
    """A pool of ``workers`` processes started with 'spawn' (safe on every platform and
    with threads in the parent); the pool lives until ``close()``."""

    def __init__(self, workers: int = 2):
        if int(workers) != workers or workers < 1:
            raise InputError("a process pool needs at least one worker", [
                Problem(code="run.workers", message="worker count out of range", expected="an integer ≥ 1",
                        got=str(workers))])
        self.workers = int(workers)
        self._pool: concurrent.futures.ProcessPoolExecutor | None = None

    def _ensure(self) -> concurrent.futures.ProcessPoolExecutor:
        if self._pool is None:
            self._pool = concurrent.futures.ProcessPoolExecutor(
                max_workers=self.workers, mp_context=multiprocessing.get_context("spawn"))
        return self._pool

    def map(self, function: Callable[[Any], Any], items: Sequence[Any], progress: Progress | None = None) -> list:
        pool = self._ensure()
        task = on_one_blas_thread(function)
        futures = [pool.submit(task, item) for item in items]
        return _collect(futures, concurrent.futures.as_completed, progress)

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class DaskExecutor(_Closing):
    """Work on a Dask cluster: the scheduler at ``address``, or a local cluster of two
    single-threaded worker processes on 127.0.0.1 (no dashboard) that ``close()`` stops.

    The local cluster's workers keep the C library's own rule for handing freed memory back
    to the system.  Dask starts workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes
    glibc return the top of the heap after almost every NumPy temporary of the imputation
    sampler and fault it in again on the next one: a chain then takes about 1.5 times as
    long as in this process (benchmarks/bench_imputation.py).  Workers of a cluster at
    ``address`` are started by someone else; start them without that variable for the same
    speed.
    """

    def __init__(self, address: str | None = None, n_workers: int = 2):
        self.address = address
        self.n_workers = n_workers
        self._client = None
        self._cluster = None

    def _ensure(self):
        if self._client is None:
            import dask
            from dask.distributed import Client, LocalCluster   # optional dependency

            if self.address is None:
                # Read when the workers are spawned, inside the constructor; distributed is
                # imported above, so leaving the block restores its defaults intact.
                with dask.config.set({_TRIM_SETTING: None}):
                    self._cluster = LocalCluster(n_workers=self.n_workers, threads_per_worker=1, processes=True,
                                                 dashboard_address=None, host="127.0.0.1")
                self._client = Client(self._cluster)
            else:
                self._client = Client(self.address)
        return self._client

    def map(self, function: Callable[[Any], Any], items: Sequence[Any], progress: Progress | None = None) -> list:
        client = self._ensure()
        futures = client.map(on_one_blas_thread(function), list(items), pure=False)
        from dask.distributed import as_completed

        return _collect(futures, as_completed, progress)

    def preload(self, *modules: str) -> None:
        """Import modules on every worker now, so the first batch does not pay for it."""
        self.on_workers(_import_quietly, list(modules))

    def on_workers(self, function: Callable[..., Any], *args: Any) -> dict[str, Any]:
        """``function(*args)`` once on every worker (set-up, measurements): {worker address: result}."""
        return self._ensure().run(function, *args)

    def close(self) -> None:
        if self._client is not None:
            self._client.close()
            self._client = None
        if self._cluster is not None:
            self._cluster.close()
            self._cluster = None


def _import_quietly(modules: list[str]) -> None:
    import importlib

    for name in modules:
        importlib.import_module(name)


def _collect(futures: list, as_completed, progress: Progress | None) -> list:
    """Results in submission order; progress counted as futures finish (any order)."""
    total = len(futures)
    if progress is not None:
        for done, _ in enumerate(as_completed(futures), start=1):
            progress(done, total)
    return [future.result() for future in futures]


def make_executor(kind: str = "inline", workers: int = 2, address: str | None = None):
    """An executor by name: 'inline', 'processes' or 'dask'."""
    if kind == "inline":
        return InlineExecutor()
    if kind == "processes":
        return ProcessPoolExecutor(workers)
    if kind == "dask":
        return DaskExecutor(address, n_workers=workers)
    raise InputError("unknown executor", [Problem(code="run.executor", message="no such executor",
                                                  expected="inline, processes or dask", got=repr(kind))])
