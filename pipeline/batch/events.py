"""What a run reports while it works (events) and when it is done (the summary)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline import tasks
from pipeline.io.store import Failure

__all__ = ["Event", "RunSummary", "run_pass"]


@dataclass(frozen=True)
class Event:
    """A progress event: ``kind`` is ``"pass"`` (a new pass of ``total`` tasks), ``"advance"``
    (one task done), ``"failure"`` or ``"warning"``."""

    kind: str
    name: str = ""
    total: int = 0
    message: str = ""


@dataclass
class RunSummary:
    """What a run did."""

    store: Path
    n_inputs: int = 0
    n_frames: int = 0
    n_curves_files: int = 0
    n_ok: int = 0
    n_flagged: int = 0
    n_reused: int = 0
    failures: list[Failure] = field(default_factory=list)
    work_function_eV: float = float("nan")
    work_function_uncertainty_eV: float = float("nan")
    drift_velocity_m_per_s: tuple[float, float] | None = None
    seconds: float = 0.0
    frames: list[tasks.FrameSummary] = field(default_factory=list)

    @property
    def exit_code(self) -> int:
        return 1 if self.failures else 0


def run_pass(
    executor: Any, name: str, fn: Callable[..., Any], jobs: list[tuple],
    emit: Callable[[Event], None],
) -> Iterator[tuple[int, Any]]:
    """Run one pass of tasks on ``executor``, announcing it and each finished task.

    Yields ``(index into jobs, result)`` as tasks finish.
    """
    emit(Event("pass", name=name, total=len(jobs)))
    for index, res in executor.map_unordered(fn, jobs):
        emit(Event("advance", name=name))
        yield index, res
