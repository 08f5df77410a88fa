"""A run folder → tasks → executor (serial / processes / Dask) → one writer → the store.

The passes of a run, each a set of independent tasks carrying file paths (DESIGN.md §7):

1. **survey** every input: approach curves are fitted, frames only looked at;
2. the run's **work function** from the curve fits (or the configured fixed value);
3. **frames**: height → levelling → quality, each result staged as its own file;
4. **drift**: consecutive staged frames registered pairwise, a drift model fitted;
5. **finalise**: drift corrected inside each frame, z scale from known steps applied;
6. **commit**: the store rebuilt from the staged files through one handle, replaced atomically.

Workers read their own input and return small summaries; only this process writes the store.
Memory therefore depends on frame size × workers, not on the length of the run. Staged results
carry the hash of their source file and a key of everything else they depend on, so rerunning
the same command resumes: only what is missing or changed is recomputed.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import logging
import os
import time
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass, field
from datetime import UTC, datetime
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline import tasks
from pipeline._version import __version__
from pipeline.config import Config, config_sha256, dump_toml
from pipeline.errors import ConfigError, IsogapError
from pipeline.io.readers import find_inputs, read_file
from pipeline.io.store import (
    Failure,
    StoreLock,
    check_writable,
    read_staged,
    staged_attrs,
    staged_frames,
    staged_header,
    staging_dir,
    write_store,
)
from pipeline.model import parse_time
from pipeline.stages.barrier import (
    WorkFunctionEstimate,
    combine_fit_tables,
    estimate_work_function,
    two_setpoint_work_function,
)
from pipeline.stages.calibrate import scale_lateral, z_scale_from_steps
from pipeline.stages.drift import (
    DriftModel,
    drift_table,
    fit_drift_series,
    fit_z_drift,
    frame_times_s,
    plan_frame_pairs,
)

__all__ = ["Event", "RunSummary", "make_executor", "own_files", "run_batch"]

log = logging.getLogger(__name__)


# --------------------------------------------------------------------------------------------
# executors: one interface, three back ends
# --------------------------------------------------------------------------------------------


def _indexed(fn: Callable[..., Any], index: int, *args: Any) -> tuple[int, Any]:
    return index, fn(*args)


class SerialExecutor:
    """Runs tasks one after another in this process."""

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


# --------------------------------------------------------------------------------------------
# progress events (the CLI renders them; this module never prints)
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# the run
# --------------------------------------------------------------------------------------------


def own_files(store: Path) -> list[Path]:
    """The store's own files, in case it is written inside the run folder."""
    return [store, store.with_name(store.name + ".lock"), staging_dir(store)]


def _run_key(config: Config, phi: float, phi_unc: float) -> str:
    """Hash of everything a staged frame depends on besides its source file."""
    relevant = {name: getattr(config, name).model_dump()
                for name in ("input", "height", "level", "quality")}
    relevant["work_function"] = [round(phi, 9), round(phi_unc, 9)]
    relevant["software"] = __version__  # a new release recomputes; stage versions live in it
    return hashlib.sha256(json.dumps(relevant, sort_keys=True).encode()).hexdigest()[:16]


def _work_function(
    config: Config, surveys: list[tasks.SurveyResult], emit: Callable[[Event], None],
) -> tuple[WorkFunctionEstimate, xr.Dataset | None]:
    """The run's barrier height: from its curves, two setpoints, or the configured value."""
    b = config.barrier
    fixed = WorkFunctionEstimate.fixed(b.work_function_eV, b.work_function_uncertainty_eV)
    if b.source == "fixed":
        return fixed, None
    if b.source == "two-setpoint":
        return _two_setpoint(config, surveys, emit), None
    tables = [s.curve_table for s in surveys if s.curve_table is not None
              and (b.grid_curves_in_estimate or s.barrier_map is None)]
    if not tables:  # a run with only grid curves: use those after all
        tables = [s.curve_table for s in surveys if s.curve_table is not None]
    if not tables:
        emit(Event("warning", message="no approach curves in the run: using the configured "
                   f"work function {b.work_function_eV} ± {b.work_function_uncertainty_eV} eV"))
        return WorkFunctionEstimate.fixed(b.work_function_eV, b.work_function_uncertainty_eV,
                                          note="no approach curves in the run"), None
    table = combine_fit_tables(tables)
    try:
        est = estimate_work_function(table, outlier_threshold_sigma=b.outlier_threshold_sigma)
    except IsogapError as exc:
        emit(Event("warning", message=f"work function from the curves failed ({exc}); using "
                   f"the configured {b.work_function_eV} eV"))
        return WorkFunctionEstimate.fixed(b.work_function_eV, b.work_function_uncertainty_eV,
                                          note=f"curves unusable: {exc}"), table
    for cid, why in est.rejected:
        emit(Event("warning", message=f"approach curve {cid} rejected: {why}"))
    return est, est.updated_table(table)


def _two_setpoint(
    config: Config, surveys: list[tasks.SurveyResult], emit: Callable[[Event], None],
) -> WorkFunctionEstimate:
    """φ from the first two constant-current frames of one area at different setpoints."""
    def area(a: dict[str, Any]) -> tuple:
        return tuple(round(float(a.get(k, 0.0)) * 1e12) for k in (
            "scan_center_x_m", "scan_center_y_m", "scan_size_x_m", "scan_size_y_m"))

    cc = [s for s in surveys if s.kind == "frame" and not s.failure
          and s.attrs.get("mode") == "constant-current"]
    cc.sort(key=lambda s: str(s.attrs.get("start_time")))
    for a, b in itertools.pairwise(cc):
        if area(a.attrs) == area(b.attrs) and not np.isclose(
                float(a.attrs["setpoint_A"]), float(b.attrs["setpoint_A"]), rtol=0.05):
            pin = config.input.piezo_z_m_per_V
            try:
                est = two_setpoint_work_function(read_file(a.path, piezo_z_m_per_V=pin),
                                                 read_file(b.path, piezo_z_m_per_V=pin))
            except IsogapError as exc:
                emit(Event("warning", message=f"setpoint pair {Path(a.path).name}, "
                           f"{Path(b.path).name} unusable: {exc}"))
                continue
            emit(Event("warning", message=f"work function from the setpoint pair "
                       f"{Path(a.path).name}, {Path(b.path).name}"))
            return est
    raise ConfigError("[barrier] source = 'two-setpoint' needs two successive constant-current "
                      "frames of the same area at different setpoints; the run has none")


def _pass(
    executor: Any, name: str, fn: Callable[..., Any], jobs: list[tuple],
    emit: Callable[[Event], None],
) -> Iterator[Any]:
    emit(Event("pass", name=name, total=len(jobs)))
    for _, res in executor.map_unordered(fn, jobs):
        emit(Event("advance", name=name))
        yield res


def run_batch(
    run_dir: str | os.PathLike[str],
    store: str | os.PathLike[str],
    config: Config,
    *,
    on_event: Callable[[Event], None] | None = None,
    inputs: list[Path] | None = None,
    history: str = "",
    extra_run_attrs: dict[str, Any] | None = None,
) -> RunSummary:
    """Process a run folder into a store. See the module docstring for the passes.

    Parameters
    ----------
    run_dir : path
        Folder of raw files (DESIGN.md §3).
    store : path
        Output HDF5 store; an existing one is rebuilt (its staged parts are reused when their
        source file and configuration are unchanged).
    config : Config
        Effective configuration.
    on_event : callable, optional
        Receives :class:`Event` objects for progress display.
    inputs : list of Path, optional
        Explicit input files instead of the folder's contents (used by ``reprocess``).
    """
    t_start = time.perf_counter()
    emit = on_event or (lambda e: None)
    run_dir, store = Path(run_dir), Path(store)
    if inputs is None:
        if not run_dir.is_dir():
            raise ConfigError(f"run folder {run_dir} does not exist or is not a folder")
        inputs = find_inputs(run_dir, recursive=config.input.recursive,
                             exclude=own_files(store))
    summary = RunSummary(store=store, n_inputs=len(inputs))
    check_writable(store, expected_bytes=sum(p.stat().st_size for p in inputs if p.is_file()))
    with StoreLock(store):
        executor = make_executor(config)
        try:
            _run(executor, inputs, store, config, summary, emit, history, extra_run_attrs or {})
        finally:
            executor.close()
    summary.seconds = time.perf_counter() - t_start
    return summary


def _run(
    executor: Any, inputs: list[Path], store: Path, config: Config, summary: RunSummary,
    emit: Callable[[Event], None], history: str, extra_run_attrs: dict[str, Any],
) -> None:
    def fail(f: Failure) -> None:
        summary.failures.append(f)
        emit(Event("failure", message=f"{f.file}: {f.message}"))

    # 1. survey
    surveys: list[tasks.SurveyResult] = []
    for res in _pass(executor, "reading", tasks.survey_file,
                     [(str(p), config) for p in inputs], emit):
        if res.failure:
            fail(res.failure)
        for w in res.warnings:
            emit(Event("warning", message=w))
        surveys.append(res)
    surveys.sort(key=lambda r: r.path)
    frames = [s for s in surveys if s.kind == "frame" and not s.failure]
    summary.n_curves_files = sum(1 for s in surveys if s.kind == "curve")

    # duplicate frame ids would overwrite each other's staged result: refuse the later ones
    seen: dict[str, str] = {}
    unique = []
    for s in frames:
        fid = str(s.attrs.get("frame_id"))
        if fid in seen:
            fail(Failure(s.path, "read", f"{s.path}: frame id {fid!r} is already used by "
                                         f"{seen[fid]}; set a distinct 'frame_id' attribute"))
            continue
        seen[fid] = s.path
        unique.append(s)
    frames = unique

    # 2. work function
    estimate, table = _work_function(config, surveys, emit)
    phi, phi_unc = estimate.work_function_eV, estimate.work_function_uncertainty_eV
    summary.work_function_eV, summary.work_function_uncertainty_eV = phi, phi_unc
    run_key = _run_key(config, phi, phi_unc)

    # 3. frames (resume: reuse staged results whose source and run key are unchanged)
    staged = staged_frames(store, "frames")
    todo, reused = [], []
    for s in frames:
        fid = str(s.attrs["frame_id"])
        old = staged.get(fid)
        if old is not None:
            try:
                a = staged_attrs(old)
            except IsogapError:
                a = {}
            if a.get("source_sha256") == s.sha256 and a.get("run_key") == run_key:
                reused.append(str(old))
                continue
        todo.append(s)
    summary.n_reused = len(reused)
    done: list[tasks.FrameSummary] = []
    for res in _pass(executor, "frames", tasks.process_frame,
                     [(s.path, str(store), config, phi, phi_unc, run_key) for s in todo], emit):
        if res.failure:
            fail(res.failure)
        else:
            done.append(res)
    staged_paths = {Path(r.staged).stem: r.staged for r in done}
    staged_paths.update({Path(p).stem: p for p in reused})
    starts = {fid: str(staged_attrs(p)["start_time"]) for fid, p in staged_paths.items()}
    order = sorted(staged_paths, key=lambda fid: (parse_time(starts[fid]), fid))

    run_attrs: dict[str, Any] = {
        **estimate.to_attrs(),
        "config_toml": dump_toml(config),
        "config_sha256": config_sha256(config),
        "n_inputs": len(inputs),
    }
    run_tables: list[xr.Dataset] = [table] if table is not None else []
    ok_inputs = [s for s in surveys if not s.failure]
    run_tables.append(xr.Dataset({
        "input_file": (("input",), np.array([s.path for s in ok_inputs], dtype=str),
                       {"long_name": "source file (absolute path)"}),
        "input_sha256": (("input",), np.array([s.sha256 for s in ok_inputs], dtype=str),
                         {"long_name": "SHA-256 of the source file"}),
        "input_kind": (("input",), np.array([s.kind for s in ok_inputs], dtype=str)),
    }))

    # 4. drift
    drift_model = None
    run_t0 = starts[order[0]] if order else ""
    if config.drift.enabled and len(order) >= 2:
        drift_model, dtab = _drift(executor, order, staged_paths, run_t0, config, emit)
        if dtab is not None:
            run_tables.append(dtab)
            run_attrs.update({k: v for k, v in dtab.attrs.items()})
    run_attrs.setdefault("drift_velocity_x_m_per_s", np.nan)
    run_attrs.setdefault("drift_velocity_y_m_per_s", np.nan)

    # 5. finalise: z scale from known steps, drift inside frames
    z_scale, z_unc = 1.0, 0.0
    if config.calibrate.known_step_height_m:
        steps = [(r.step_height_m, r.step_height_uncertainty_m) for r in done
                 if r.step_height_m]
        if steps:
            h, u = np.array(steps, dtype=float).T
            z_scale, z_unc = z_scale_from_steps(
                h, u, known_step_height_m=config.calibrate.known_step_height_m)
            run_attrs.update(z_scale_factor=z_scale, z_scale_factor_uncertainty=z_unc)
        else:
            emit(Event("warning", message="no steps measured: z scale not calibrated"))
    extra = {"work_function_eV": phi}
    finals: list[str] = []
    summary.frames = []
    jobs = [(staged_paths[f], str(store), config, drift_model
             if config.drift.correct_within_frames else None, run_t0, z_scale, z_unc, extra)
            for f in order]
    for res in _pass(executor, "finishing", _finalize, jobs, emit):
        if res.failure:
            fail(res.failure)
        else:
            finals.append(res.staged)
            summary.frames.append(res)
    summary.n_frames = len(finals)
    summary.n_ok = sum(1 for r in summary.frames if r.status == "ok")
    summary.n_flagged = sum(1 for r in summary.frames if r.status != "ok")
    if drift_model is not None:
        summary.drift_velocity_m_per_s = (float(run_attrs["drift_velocity_x_m_per_s"]),
                                          float(run_attrs["drift_velocity_y_m_per_s"]))
    # lateral scale from the atomically resolved frames, measured after the drift correction
    # (drift shears a frame) and applied to the coordinates as the store is written
    lateral = None
    if config.calibrate.lattice_constant_m and finals:
        lateral = _lateral_scale(executor, finals, config, emit)
        if lateral is not None:
            run_attrs.update(lateral)
            for axis in ("x", "y"):  # the drift was measured in nominal lengths
                factor = lateral[f"lateral_scale_{axis}"]
                for name in (f"drift_velocity_{axis}_m_per_s",
                             f"drift_velocity_uncertainty_{axis}_m_per_s",
                             f"drift_velocity_{axis}_nm_per_min"):
                    if name in run_attrs:
                        run_attrs[name] = float(run_attrs[name]) * factor
    run_attrs.update(extra_run_attrs)

    # 6. commit
    emit(Event("pass", name="writing store", total=1))
    run_ds = xr.merge(run_tables, combine_attrs="drop") if run_tables else xr.Dataset()
    run_ds.attrs = run_attrs
    finals_sorted = sorted(finals, key=lambda p: order.index(Path(p).stem))
    maps = [(f"maps/{s.attrs.get('curve_set_id', Path(s.path).stem)}", s.barrier_map)
            for s in surveys if s.barrier_map is not None]
    def final_frames() -> Iterator[xr.Dataset]:
        for p in finals_sorted:
            ds = read_staged(p)
            if lateral is not None:
                ds = scale_lateral(ds, scale_x=lateral["lateral_scale_x"],
                                   scale_y=lateral["lateral_scale_y"])
            yield ds

    write_store(store, frames=final_frames(), run=run_ds,
                failures=summary.failures, title=config.run.title, extra_groups=maps,
                history=history or f"isogap process ({datetime.now(UTC):%Y-%m-%d})")
    emit(Event("advance", name="writing store"))


def _lateral_scale(
    executor: Any, staged: list[str], config: Config, emit: Callable[[Event], None],
) -> dict[str, Any] | None:
    """Lateral scale factors from the run's atomically resolved frames (confidence-weighted)."""
    emit(Event("pass", name="lattice", total=len(staged)))
    found = []
    for _, res in executor.map_unordered(tasks.lattice_of_frame,
                                         [(p, config) for p in staged]):
        emit(Event("advance", name="lattice"))
        if res is not None:
            found.append(res)
    if not found:
        emit(Event("warning", message="lateral scale not calibrated: no atomically resolved "
                   "frame in the run"))
        return None
    w = np.array([c.confidence for c in found], dtype=float)
    sx = np.array([c.scale_x for c in found])
    sy = np.array([c.scale_y for c in found])
    skew = np.array([c.skew_deg for c in found])

    def spread(v: np.ndarray) -> float:  # standard error of the mean over frames
        return float(np.std(v, ddof=1) / np.sqrt(v.size)) if v.size > 1 else float("nan")
    return {
        "lateral_scale_x": float(np.average(sx, weights=w)),
        "lateral_scale_y": float(np.average(sy, weights=w)),
        "lateral_scale_x_uncertainty": spread(sx),
        "lateral_scale_y_uncertainty": spread(sy),
        "lateral_skew_deg": float(np.average(skew, weights=w)),
        "lateral_calibration_frames": ", ".join(c.frame_id for c in found),
    }


def _finalize(staged: str, store: str, config: Config, drift_model: Any, run_t0: str,
              z_scale: float, z_unc: float, extra: dict[str, Any]) -> tasks.FrameSummary:
    return tasks.finalize_frame(staged, store, config=config, drift_model=drift_model,
                                run_t0=run_t0,
                                z_scale=z_scale, z_scale_uncertainty=z_unc, extra_attrs=extra)


def _drift(
    executor: Any, order: list[str], staged: dict[str, str], run_t0: str, config: Config,
    emit: Callable[[Event], None],
) -> tuple[DriftModel | None, xr.Dataset | None]:
    """Register compatible frame pairs (in parallel) and fit the run's drift model."""
    d = config.drift
    headers = [staged_header(staged[f]) for f in order]
    frames = [{**a, "nx": n["x"], "ny": n["y"]} for a, n in headers]
    # shape-only stand-ins carry what the frame clock needs (sizes + attrs), not the maps
    stand_ins = [xr.Dataset(coords={"y": np.zeros(n["y"]), "x": np.zeros(n["x"])}, attrs=a)
                 for a, n in headers]
    times = np.array([frame_times_s(ds, run_start=run_t0)[1] for ds in stand_ins])
    pairs = plan_frame_pairs(frames)
    if not pairs:
        emit(Event("warning", message="drift not measured: no two frames of the same area and "
                   "pixel size"))
        return None, None
    jobs = [(staged[order[i]], staged[order[j]], config) for i, j in pairs]
    emit(Event("pass", name="drift", total=len(jobs)))
    shifts: list[Any] = [None] * len(jobs)
    updowns = []
    for k, (shift, updown) in executor.map_unordered(tasks.register_pair, jobs):
        shifts[k] = shift
        if updown is not None and updown.confidence >= d.min_confidence:
            updowns.append(updown)
        emit(Event("advance", name="drift"))
    try:
        model = fit_drift_series(times, shifts, frame_ids=order, min_confidence=d.min_confidence,
                                 model=d.model, smooth_degree=d.smooth_degree,
                                 outlier_threshold_sigma=d.outlier_threshold_sigma)
    except IsogapError as exc:
        emit(Event("warning", message=f"drift not corrected: {exc}"))
        return None, None
    for w in model.warnings:
        emit(Event("warning", message=f"drift: {w}"))
    means = np.array([float(a.get("mean_height_before_levelling_m", np.nan)) for a, _ in headers])
    z_drift = fit_z_drift(times, means) if np.isfinite(means).sum() >= 3 else None
    starts = np.array([frame_times_s(ds, run_start=run_t0)[0] for ds in stand_ins])
    table = drift_table(order, times, shifts, model, frame_start_s=starts,
                        mean_heights_m=means, z_drift=z_drift, run_start=run_t0)
    if updowns:
        table.attrs.update(_combine_up_down(updowns, model, emit))
    return (model if model.is_usable else None), table


def _combine_up_down(
    updowns: list[Any], model: DriftModel, emit: Callable[[Event], None],
) -> dict[str, Any]:
    """Inverse-variance mean of the up/down-pair velocities: an independent check of the model
    (it needs no second frame time, only the shear between opposite slow directions)."""
    attrs: dict[str, Any] = {"drift_updown_pairs": len(updowns)}
    for axis in ("x", "y"):
        v = np.array([getattr(u, f"velocity_{axis}_m_per_s") for u in updowns])
        s = np.array([getattr(u, f"uncertainty_{axis}_m_per_s") for u in updowns])
        w = 1.0 / np.maximum(s, 1e-30) ** 2
        mean, unc = float(np.sum(w * v) / np.sum(w)), float(np.sqrt(1.0 / np.sum(w)))
        attrs[f"drift_updown_velocity_{axis}_m_per_s"] = mean
        attrs[f"drift_updown_velocity_uncertainty_{axis}_m_per_s"] = unc
        fitted = getattr(model, f"velocity_{axis}_m_per_s")
        fitted_unc = getattr(model, f"velocity_uncertainty_{axis}_m_per_s")
        if model.is_usable and abs(mean - fitted) > 4 * np.hypot(unc, fitted_unc):
            emit(Event("warning", message=f"drift: up/down pairs give v_{axis} = "
                       f"{mean * 6e10:+.3f} nm/min, the frame-to-frame model "
                       f"{fitted * 6e10:+.3f} nm/min"))
    return attrs
