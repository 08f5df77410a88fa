"""The local-process executor: tasks run here while the workers start, then on the workers."""

from __future__ import annotations

import os
import threading
import time

from pipeline.batch.executors import ProcessExecutor, SerialExecutor


def _wait_ready(ex: ProcessExecutor, timeout_s: float = 60.0) -> None:
    t_end = time.monotonic() + timeout_s
    while ex._ready() < ex.workers:
        assert time.monotonic() < t_end, "workers did not start"
        time.sleep(0.01)


def test_tasks_run_here_until_the_workers_have_started(monkeypatch):
    gate = threading.Event()
    launch = ProcessExecutor._launch

    def held_launch(self: ProcessExecutor) -> None:
        gate.wait()  # the workers are "still starting" until the gate opens
        launch(self)

    monkeypatch.setattr(ProcessExecutor, "_launch", held_launch)
    ex = ProcessExecutor(2)
    try:
        early = dict(ex.map_unordered(os.getpid, [()] * 5))
        assert sorted(early) == list(range(5))
        assert set(early.values()) == {os.getpid()}  # no worker yet: all ran here
        gate.set()
        _wait_ready(ex)
        late = dict(ex.map_unordered(os.getpid, [()] * 20))
        assert sorted(late) == list(range(20))  # every task once
        assert os.getpid() not in late.values()  # workers ready: none ran here
    finally:
        gate.set()
        ex.close()


def test_results_match_serial_with_arguments():
    jobs = [(float(k), 3) for k in range(30)]
    ex = ProcessExecutor(2)
    try:
        got = dict(ex.map_unordered(round, jobs))
    finally:
        ex.close()
    assert got == dict(SerialExecutor().map_unordered(round, jobs))
