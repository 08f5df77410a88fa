"""Executors: one interface (``map_unordered``), three back ends (serial, processes, Dask).

``map_unordered(fn, jobs)`` yields ``(index, result)`` as tasks finish. Local processes keep at
most two tasks in flight per worker; Dask gets all tasks at once (its scheduler balances them)
and each result is released as soon as it has been taken, so results stream and memory stays
flat on both.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from multiprocessing import get_context
from typing import Any

from pipeline.config import Config
from pipeline.errors import ConfigError

__all__ = ["DaskExecutor", "ProcessExecutor", "SerialExecutor", "make_executor"]


def _indexed(fn: Callable[..., Any], index: int, *args: Any) -> tuple[int, Any]:
    return index, fn(*args)


class SerialExecutor:
    """Runs tasks one after another in this process."""

    name = "serial"
    workers = 1

    def map_unordered(self, fn: Callable[..., Any], jobs: Iterable[tuple]) -> Iterator[Any]:
        for i, args in enumerate(jobs):
            yield _indexed(fn, i, *args)

    def close(self) -> None:
        pass


class ProcessExecutor:
    """Local worker processes (``forkserver`` start: safe next to threads of the progress bar)."""

    name = "processes"

    def __init__(self, workers: int):
        self.workers = workers or os.cpu_count() or 1
        # one BLAS/FFT thread per worker: N workers on N cores, not N × N threads fighting.
        # Set before the fork server starts, so every worker inherits it.
        for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
            os.environ.setdefault(var, "1")
        self._pool = ProcessPoolExecutor(max_workers=self.workers,
                                         mp_context=get_context("forkserver"))

    def map_unordered(self, fn: Callable[..., Any], jobs: Iterable[tuple]) -> Iterator[Any]:
        # keep at most 2 tasks per worker in flight: results stream, memory stays flat
        jobs = iter(enumerate(jobs))
        pending: set[Future] = set()
        limit = 2 * self.workers
        while True:
            while len(pending) < limit:
                try:
                    i, args = next(jobs)
                except StopIteration:
                    break
                pending.add(self._pool.submit(_indexed, fn, i, *args))
            if not pending:
                return
            done, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in done:
                yield fut.result()

    def close(self) -> None:
        self._pool.shutdown(cancel_futures=True)


class DaskExecutor:
    """Tasks on an existing Dask cluster (``distributed.Client(address)``)."""

    name = "dask"

    def __init__(self, address: str):
        try:
            from distributed import Client
        except ImportError:
            raise ConfigError("executor 'dask' needs the cluster extra: "
                              "pip install 'isogap[cluster]'") from None
        try:
            self._client = Client(address, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise ConfigError(f"cannot reach the Dask scheduler at {address!r} ({exc})"
                              ) from None
        self.workers = max(1, sum(self._client.nthreads().values()))

    def map_unordered(self, fn: Callable[..., Any], jobs: Iterable[tuple]) -> Iterator[Any]:
        from distributed import as_completed

        futures = [self._client.submit(_indexed, fn, i, *args, pure=False)
                   for i, args in enumerate(jobs)]
        for fut in as_completed(futures):
            result = fut.result()
            fut.release()  # results must not stay in worker memory
            yield result

    def close(self) -> None:
        self._client.close()


def make_executor(config: Config) -> SerialExecutor | ProcessExecutor | DaskExecutor:
    """The executor the config asks for."""
    run = config.run
    if run.executor == "serial" or (run.executor == "processes" and run.workers == 1):
        return SerialExecutor()
    if run.executor == "dask":
        if not run.scheduler_address:
            raise ConfigError("executor 'dask' needs [run] scheduler_address (or --scheduler)")
        return DaskExecutor(run.scheduler_address)
    return ProcessExecutor(run.workers)
