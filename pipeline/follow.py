"""Watching a run folder while the instrument writes it (``isogap process --follow``).

A file is taken only once it is complete: its size and modification time have not changed
between two looks at the folder, ``poll_s`` apart. After each batch of new files the store is
rebuilt (frames already done are reused from the staged parts), so it is valid after every
commit and the run can be stopped at any time.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from pathlib import Path

from pipeline.batch import Event, RunSummary, make_executor, own_files, run_batch
from pipeline.config import Config
from pipeline.errors import ConfigError, IsogapError, StoreLockedError
from pipeline.io.readers import find_inputs, reader_for

__all__ = ["follow_folder", "stable_files"]


def _signature(path: Path) -> tuple[int, int] | None:
    try:
        st = path.stat()
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def stable_files(
    candidates: list[Path], previous: dict[Path, tuple[int, int]],
) -> tuple[list[Path], dict[Path, tuple[int, int]]]:
    """Files whose size and mtime equal those seen at the previous look (no longer growing).

    Returns the stable files and the signatures to compare against at the next look. A sidecar
    format counts as stable only when its sidecar is stable too.
    """
    now: dict[Path, tuple[int, int]] = {}
    stable = []
    for p in candidates:
        sig = _signature(p)
        if sig is None or sig[0] == 0:
            continue
        reader = reader_for(p)
        side_sig = (_signature(p.with_suffix(".toml"))
                    if getattr(reader, "uses_sidecar", False) else None)
        key_sig = (sig[0] + (side_sig[0] if side_sig else 0),
                   max(sig[1], side_sig[1] if side_sig else 0))
        now[p] = key_sig
        if previous.get(p) == key_sig:
            stable.append(p)
    return stable, now


def follow_folder(
    run_dir: str | os.PathLike[str],
    store: str | os.PathLike[str],
    config: Config,
    *,
    poll_s: float = 10.0,
    on_summary: Callable[[RunSummary], None] | None = None,
    on_event: Callable[[Event], None] | None = None,
    max_polls: int | None = None,
) -> int:
    """Process ``run_dir`` into ``store`` and keep processing new complete files until stopped.

    Stops on Ctrl-C (or after ``max_polls`` looks, for tests). Returns the exit status of the
    last commit (1 if any input has failed, else 0).
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise ConfigError(f"run folder {run_dir} does not exist or is not a folder")
    seen: dict[Path, tuple[int, int]] = {}
    done: set[Path] = set()
    code = 0
    polls = 0
    executor = None  # one for all commits: the worker processes start once
    try:
        while max_polls is None or polls < max_polls:
            polls += 1
            found = find_inputs(run_dir, recursive=config.input.recursive,
                                exclude=own_files(Path(store)))
            stable, seen = stable_files(found, seen)
            if stable and set(stable) != done:
                executor = executor or make_executor(config)
                try:
                    summary = run_batch(run_dir, store, config, inputs=sorted(stable),
                                        on_event=on_event, executor=executor,
                                        history=f"isogap process {run_dir} --follow")
                except StoreLockedError:
                    raise  # another writer: watching on would only fight it
                except IsogapError as exc:  # e.g. not enough frames yet for a run-level step
                    if on_event:
                        on_event(Event("warning", message=f"commit skipped, will retry: {exc}"))
                else:
                    done = set(stable)
                    code = summary.exit_code
                    if on_summary:
                        on_summary(summary)
            time.sleep(poll_s)
    except KeyboardInterrupt:
        pass
    finally:
        if executor is not None:
            executor.close()
    return code
