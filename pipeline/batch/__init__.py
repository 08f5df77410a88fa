"""A run folder → tasks → executor (serial / processes / Dask) → one writer → the store.

The passes of a run, each a set of independent tasks carrying file paths (DESIGN.md §7):

1. **survey** every input: approach curves are fitted, frames only looked at;
2. the run's **work function** from the curve fits (or the configured fixed value);
3. **frames**: height → levelling → quality, each result staged as its own file;
4. **drift**: consecutive staged frames registered pairwise, a drift model fitted;
5. **finalise**: drift corrected inside each frame, z scale from known steps applied; each
   finished frame comes back to this process and is added to the new store (built under a
   temporary name) while the workers finish the others;
6. **lattice** (when a lattice constant is configured): the finished frames are staged
   instead, the lateral scale is measured on the atomically resolved, drift-corrected ones, and
   the frames are then added with it applied to their coordinates;
7. **commit**: the run, map and failure groups written, the store replaced atomically.

Workers read their own input and return small summaries; only this process writes the store.
Memory therefore depends on frame size × workers, not on the length of the run. Staged results
carry the hash of their source file and a key of everything else they depend on, so rerunning
the same command resumes: only what is missing or changed is recomputed.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline import tasks
from pipeline._version import __version__
from pipeline.batch.events import Event, RunSummary, run_pass
from pipeline.batch.executors import make_executor
from pipeline.batch.runlevel import calibration_steps, run_step
from pipeline.batch.runlevel import drift_model as _drift
from pipeline.batch.runlevel import lateral_scale as _lateral_scale
from pipeline.batch.runlevel import work_function as _work_function
from pipeline.config import Config, config_sha256, dump_toml
from pipeline.errors import ConfigError, IsogapError
from pipeline.io.readers import find_inputs
from pipeline.io.staging import read_staged, staged_frames, staged_header, staging_dir
from pipeline.io.store import (
    Failure,
    StoreBuilder,
    StoreLock,
    check_writable,
    remove_stale_temporaries,
)
from pipeline.model import parse_time
from pipeline.stages.calibrate import scale_lateral, z_scale_from_steps

__all__ = ["Event", "RunSummary", "make_executor", "own_files", "run_batch"]

log = logging.getLogger(__name__)


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


def run_batch(
    run_dir: str | os.PathLike[str],
    store: str | os.PathLike[str],
    config: Config,
    *,
    on_event: Callable[[Event], None] | None = None,
    inputs: list[Path] | None = None,
    history: str = "",
    extra_run_attrs: dict[str, Any] | None = None,
    executor: Any | None = None,
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
    history, extra_run_attrs : optional
        The store's history line and further attributes of its ``run`` group.
    executor : optional
        An executor from :func:`make_executor` to run the tasks on and leave open (``--follow``
        keeps one across its commits, so the workers start once); by default one is made from
        ``config`` and closed at the end.
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
        for tmp in remove_stale_temporaries(store):
            log.info("removed %s, left by a writer that was stopped", tmp)
        own = executor is None
        run_on = make_executor(config) if executor is None else executor
        try:
            _run(run_on, inputs, store, config, summary, emit, history, extra_run_attrs or {})
        finally:
            if own:
                run_on.close()
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
    for _, res in run_pass(executor, "reading", tasks.survey_file,
                     [(str(p), config, str(store)) for p in inputs], emit):
        if res.failure:
            fail(res.failure)
        for w in res.warnings:
            emit(Event("warning", message=w))
        surveys.append(res)
    surveys.sort(key=lambda r: r.path)
    frames = [s for s in surveys if s.kind == "frame" and not s.failure]
    summary.n_curves_files = sum(1 for s in surveys if s.kind == "curve")

    # duplicate frame ids would overwrite each other's staged result: refuse the later ones
    # time stamps must all carry a zone or all be local instrument time: the few that differ
    # from the rest cannot be placed on the run's clock
    zones: dict[str, bool] = {}
    for s in frames:
        try:
            zones[s.path] = parse_time(str(s.attrs.get("start_time")),
                                       source=s.path).tzinfo is not None
        except IsogapError as exc:
            fail(Failure(s.path, "read", str(exc)))
    zoned = sum(zones.values()) > len(zones) / 2
    seen: dict[str, str] = {}
    unique = []
    for s in frames:
        fid = str(s.attrs.get("frame_id"))
        if s.path not in zones:
            continue
        if zones[s.path] != zoned:
            fail(Failure(s.path, "read", f"{s.path}: start_time {s.attrs.get('start_time')!r} "
                         f"{'has' if zones[s.path] else 'lacks'} a time zone, unlike the other "
                         "frames of the run; use one convention for the whole run"))
            continue
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
    headers: dict[str, tuple[dict[str, Any], dict[str, int]]] = {}  # of every staged frame
    for s in frames:
        fid = str(s.attrs["frame_id"])
        old = staged.get(fid)
        if old is not None:
            try:
                head = staged_header(old)
            except IsogapError:
                head = ({}, {})
            a = head[0]
            if (a.get("source_sha256") == s.sha256 and a.get("run_key") == run_key
                    and str(a.get("source_sidecar_sha256", "")) == s.sidecar_sha256):
                reused.append(str(old))
                headers[fid] = head
                continue
        todo.append(s)
    summary.n_reused = len(reused)
    done: list[tasks.FrameSummary] = []
    for _, res in run_pass(executor, "frames", tasks.process_frame,
                     [(s.path, str(store), config, phi, phi_unc, run_key) for s in todo], emit):
        if res.failure:
            fail(res.failure)
        else:
            done.append(res)
    staged_paths = {Path(r.staged).stem: r.staged for r in done}
    staged_paths.update({Path(p).stem: p for p in reused})
    headers.update({Path(r.staged).stem: r.header for r in done if r.header is not None})
    starts = {fid: str(headers[fid][0]["start_time"]) for fid in staged_paths}
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
        "input_sidecar_sha256": (("input",), np.array([s.sidecar_sha256 for s in ok_inputs],
                                                       dtype=str),
                                 {"long_name": "SHA-256 of the TOML sidecar (sidecar formats)"}),
        "input_kind": (("input",), np.array([s.kind for s in ok_inputs], dtype=str)),
    }))

    # 4. drift
    drift_model = None
    run_t0 = starts[order[0]] if order else ""
    if config.drift.enabled and len(order) >= 2:
        drift_model, dtab = _drift(executor, store, order, staged_paths, headers, run_t0,
                                   config, emit)
        if dtab is not None:
            run_tables.append(dtab)
            run_attrs.update({k: v for k, v in dtab.attrs.items()})
    run_attrs.setdefault("drift_velocity_x_m_per_s", np.nan)
    run_attrs.setdefault("drift_velocity_y_m_per_s", np.nan)

    # 5. finalise: the run's unit step, z scale from known steps, drift inside frames
    z_scale, z_unc = 1.0, 0.0
    # from every frame of the run, recomputed or reused from an earlier run
    heads = [headers[f][0] for f in order]
    consensus = run_step(heads)  # frames that disagree are flagged and calibrate nothing
    if config.calibrate.known_step_height_m:
        steps = calibration_steps(heads, consensus, config.quality.step_disagreement_sigma)
        if steps:
            h, u = np.array(steps, dtype=float).T
            z_scale, z_unc = z_scale_from_steps(
                h, u, known_step_height_m=config.calibrate.known_step_height_m)
            run_attrs.update(z_scale_factor=z_scale, z_scale_factor_uncertainty=z_unc)
        else:
            emit(Event("warning", message="no steps measured: z scale not calibrated"))
    if consensus is not None:  # in the calibrated units of the frames' steps
        run_attrs.update(step_consensus_m=consensus[0] * z_scale,
                         step_consensus_scatter_m=consensus[1] * z_scale)
    extra = {"work_function_eV": phi}
    with StoreBuilder(store, title=config.run.title, history=history or
                      f"isogap process ({datetime.now(UTC):%Y-%m-%d})") as builder:
        _finish(executor, builder, order, staged_paths, config, drift_model, run_t0,
                (z_scale, z_unc), consensus, extra, run_attrs, summary, fail, emit)
        run_attrs.update(extra_run_attrs)
        emit(Event("pass", name="writing store", total=1))
        run_ds = xr.merge(run_tables, combine_attrs="drop") if run_tables else xr.Dataset()
        run_ds.attrs = run_attrs
        builder.commit(run=run_ds, failures=summary.failures,
                       extra_groups=_barrier_maps(surveys, emit).items())
    emit(Event("advance", name="writing store"))


def _finish(
    executor: Any, builder: StoreBuilder, order: list[str], staged_paths: dict[str, str],
    config: Config, drift_model: Any, run_t0: str, z_scale: tuple[float, float],
    consensus: tuple[float, float] | None, extra: dict[str, Any], run_attrs: dict[str, Any],
    summary: RunSummary,
    fail: Callable[[Failure], None], emit: Callable[[Event], None],
) -> None:
    """Finishing pass (drift inside frames, z scale), then the lateral scale; every finished
    frame goes into ``builder`` as it arrives, or, when the lateral scale is still to be
    measured from the finished frames, once it is known."""
    finals: list[str] = []
    summary.frames = []
    # without a lateral scale to measure, finished frames go straight into the store (written
    # while the workers finish the others); otherwise they are staged until it is known
    calibrate_lateral = bool(config.calibrate.lattice_constant_m)
    jobs = [(staged_paths[f], str(builder.path), config, drift_model
             if config.drift.correct_within_frames else None, run_t0, *z_scale, extra,
             calibrate_lateral, consensus) for f in order]
    for _, res in run_pass(executor, "finishing", tasks.finalize_frame, jobs, emit):
        if res.failure:
            fail(res.failure)
            continue
        summary.frames.append(res)
        if res.dataset is not None:
            builder.add_frame(res.dataset)
            res.dataset = None  # memory stays at the frames in flight
        else:
            finals.append(res.staged)
    summary.n_frames = len(summary.frames)
    summary.n_ok = sum(1 for r in summary.frames if r.status == "ok")
    summary.n_flagged = sum(1 for r in summary.frames if r.status != "ok")
    if drift_model is not None:
        summary.drift_velocity_m_per_s = (float(run_attrs["drift_velocity_x_m_per_s"]),
                                          float(run_attrs["drift_velocity_y_m_per_s"]))
    # lateral scale from the atomically resolved frames, measured after the drift correction
    # (drift shears a frame) and applied to the coordinates as the store is written
    if not calibrate_lateral:
        return
    lateral = _lateral_scale(executor, finals, config, emit) if finals else None
    if lateral is not None:
        run_attrs.update(lateral)
        for axis in ("x", "y"):  # the drift was measured in nominal lengths
            factor = lateral[f"lateral_scale_{axis}"]
            for name in (f"drift_velocity_{axis}_m_per_s",
                         f"drift_velocity_uncertainty_{axis}_m_per_s",
                         f"drift_velocity_{axis}_nm_per_min"):
                if name in run_attrs:
                    run_attrs[name] = float(run_attrs[name]) * factor
    for p in finals:
        ds = read_staged(p)
        if lateral is not None:
            ds = scale_lateral(ds, scale_x=lateral["lateral_scale_x"],
                               scale_y=lateral["lateral_scale_y"])
        builder.add_frame(ds)


def _barrier_maps(surveys: list[tasks.SurveyResult], emit: Callable[[Event], None]
                  ) -> dict[str, xr.Dataset]:
    """The apparent-barrier maps of the run's curve grids, by group name."""
    maps: dict[str, xr.Dataset] = {}
    for s in surveys:
        if s.barrier_map is None:
            continue
        name = f"maps/{s.attrs.get('curve_set_id') or Path(s.path).stem}"
        if name in maps:
            emit(Event("warning", message=f"{s.path}: a barrier map named {name!r} exists "
                       "already; this one is not stored (give the curve set its own "
                       "'curve_set_id')"))
            continue
        maps[name] = s.barrier_map
    return maps
