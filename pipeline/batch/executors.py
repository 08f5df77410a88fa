"""Executors: one interface (``map_unordered``), three back ends (serial, processes, Dask).

``map_unordered(fn, jobs)`` yields ``(index, result)`` as tasks finish. Local processes keep at
most two tasks in flight per worker; Dask gets all tasks at once (its scheduler balances them)
and each result is released as soon as it has been taken, so results stream and memory stays
flat on both.

Local workers are forked from a fork server that has imported the stages once
(:mod:`pipeline.batch.worker_init`), not once per worker. Until they are ready (about a second
after the first executor of a process is made) the calling process runs tasks itself: a task
gives the same result in any process (``tests/test_batch.py`` compares the executors).
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from multiprocessing import get_context
from typing import Any

from pipeline.config import Config
from pipeline.errors import ConfigError

__all__ = ["DaskExecutor", "ProcessExecutor", "SerialExecutor", "make_executor"]


def _indexed(fn: Callable[..., Any], index: int, *args: Any) -> tuple[int, Any]:
    return index, fn(*args)


def _started() -> int:
    """A worker's first task: it returns once the worker has started."""
    return os.getpid()


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
        context = get_context("forkserver")
        # imports done once in the fork server, not once per worker (no effect if it runs)
        context.set_forkserver_preload(["pipeline.batch.worker_init"])
        self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=context)
        # The workers start now, from a thread: launching the first one waits for the fork
        # server's imports, and until the workers are ready their tasks run here instead.
        self._starting: list[Future] = []
        self._launch_error: BaseException | None = None
        self._launcher = threading.Thread(target=self._launch, name="isogap-workers",
                                          daemon=True)
        self._launcher.start()

    def _launch(self) -> None:
        try:
            for _ in range(self.workers):
                self._starting.append(self._pool.submit(_started))
        except BaseException as exc:  # raised in the calling thread by _ready
            self._launch_error = exc

    def _ready(self) -> int:
        """Workers that have started (a failed start is raised here, not hidden)."""
        if self._launcher.is_alive():
            return 0
        if self._launch_error is not None:
            raise self._launch_error
        for fut in [f for f in self._starting if f.done()]:
            fut.result()
            self._starting.remove(fut)
        return self.workers - len(self._starting)

    def map_unordered(self, fn: Callable[..., Any], jobs: Iterable[tuple]) -> Iterator[Any]:
        # keep at most 2 tasks per ready worker in flight: results stream, memory stays flat
        jobs = iter(enumerate(jobs))
        pending: set[Future] = set()
        exhausted = False
        while True:
            ready = self._ready()
            while not exhausted and len(pending) < 2 * ready:
                try:
                    i, args = next(jobs)
                except StopIteration:
                    exhausted = True
                    break
                pending.add(self._pool.submit(_indexed, fn, i, *args))
            if ready < self.workers and not exhausted:  # workers still starting: help out
                try:
                    i, args = next(jobs)
                except StopIteration:
                    exhausted = True
                else:
                    yield _indexed(fn, i, *args)
                done = {f for f in pending if f.done()}
            elif not pending:
                return
            else:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
            pending -= done
            for fut in done:
                yield fut.result()

    def close(self) -> None:
        self._launcher.join()
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
