"""Run-level steps between the per-frame passes: work function, drift model, lateral scale.

Each takes the results of a pass (small summaries and staged-file paths), may schedule a pass of
its own on the executor, and returns what the next pass needs.
"""

from __future__ import annotations

import hashlib
import itertools
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline import tasks
from pipeline.batch.events import Event, run_pass
from pipeline.config import Config
from pipeline.errors import ConfigError, IsogapError
from pipeline.io.readers import read_file
from pipeline.io.staging import read_staged_record, write_staged_record
from pipeline.model import parse_time
from pipeline.stages.barrier import (
    WorkFunctionEstimate,
    combine_fit_tables,
    estimate_work_function,
    two_setpoint_work_function,
)
from pipeline.stages.calibrate import step_consensus, step_disagreement
from pipeline.stages.drift import (
    DriftModel,
    drift_table,
    fit_drift_series,
    fit_z_drift,
    frame_times_s,
    m_per_s_to_nm_per_min,
    plan_frame_pairs,
)

__all__ = ["calibration_steps", "drift_model", "lateral_scale", "run_step", "work_function"]


def work_function(
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

    cc = []
    for s in surveys:
        if s.kind == "frame" and not s.failure and s.attrs.get("mode") == "constant-current":
            try:
                cc.append((parse_time(str(s.attrs["start_time"])), float(s.attrs["setpoint_A"]),
                           s))
            except (KeyError, ValueError, IsogapError):
                continue  # its own frame task reports what is wrong with it
    cc.sort(key=lambda t: t[0])
    cc = [s for _, _, s in cc]
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


def calibration_steps(frame_attrs: list[dict[str, Any]],
                      consensus: tuple[float, float] | None = None,
                      threshold_sigma: float = 5.0) -> list[tuple[float, float]]:
    """The (step height, uncertainty) pairs of the frames that can calibrate the z scale.

    Frames without a step height are left out, and so are staircases whose levels are not
    whole multiples of one step (``step_levels_consistent = 0``): their unit step is not the
    surface's. With the run's ``consensus`` (:func:`run_step`), so are the frames whose step
    disagrees with it (the rule of :func:`pipeline.stages.quality.compare_step_with_run`,
    which flags them).
    """
    steps = [(float(a["step_height_m"]), float(a.get("step_height_uncertainty_m", np.nan)))
             for a in frame_attrs if np.isfinite(float(a.get("step_height_m", np.nan)))
             and int(a.get("step_levels_consistent", 1)) == 1]
    if consensus is None:
        return steps
    return [(s, u) for s, u in steps
            if not step_disagreement(s, u, *consensus, threshold_sigma)[0]]


def run_step(frame_attrs: list[dict[str, Any]]) -> tuple[float, float] | None:
    """The unit step the run's frames agree on and their scatter about it, m.

    :func:`pipeline.stages.calibrate.step_consensus` of the frames that could calibrate the z
    scale (:func:`calibration_steps`) with a positive uncertainty; None with fewer than 3 (two
    frames that disagree cannot tell which one is wrong).
    """
    steps = [(s, u) for s, u in calibration_steps(frame_attrs) if np.isfinite(u) and u > 0]
    if len(steps) < 3:
        return None
    h, u = np.array(steps, dtype=float).T
    return step_consensus(h, u)


def lateral_scale(
    executor: Any, staged: list[str], config: Config, emit: Callable[[Event], None],
) -> dict[str, Any] | None:
    """Lateral scale factors from the run's atomically resolved frames (confidence-weighted)."""
    found = []
    for _, res in run_pass(executor, "lattice", tasks.lattice_of_frame,
                           [(p, config) for p in staged], emit):
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


def drift_model(
    executor: Any, store: Path, order: list[str], staged: dict[str, str],
    staged_headers: dict[str, tuple[dict[str, Any], dict[str, int]]], run_t0: str,
    config: Config, emit: Callable[[Event], None],
) -> tuple[DriftModel | None, xr.Dataset | None]:
    """Register compatible frame pairs (in parallel) and fit the run's drift model.

    ``staged`` and ``staged_headers`` give each staged frame's path and its attributes and
    dimension sizes (:func:`pipeline.io.staging.staged_header`), by frame id. Each pair's
    result is staged as a record keyed by what it depends on (both staged frames' sources and
    run keys, the registration settings), so a resumed or ``--follow`` run registers only
    the pairs it has not seen.
    """
    d = config.drift
    headers = [staged_headers[f] for f in order]
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
    keys = [_pair_key(headers[i][0], headers[j][0], config) for i, j in pairs]
    results: list[Any] = [tasks.pair_from_record(read_staged_record(store, "pairs", k))
                          for k in keys]
    todo = [n for n, r in enumerate(results) if r is None]
    jobs = [(staged[order[pairs[n][0]]], staged[order[pairs[n][1]]], config) for n in todo]
    for k, res in run_pass(executor, "drift", tasks.register_pair, jobs, emit):
        results[todo[k]] = res
        write_staged_record(store, "pairs", keys[todo[k]], tasks.pair_record(res))
    shifts = [shift for shift, _ in results]
    updowns = [u for _, u in results if u is not None and u.confidence >= d.min_confidence]
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


def _pair_key(previous: dict[str, Any], current: dict[str, Any], config: Config) -> str:
    """What a pair's registration depends on: both staged frames (source hashes and run keys,
    which include the software version) and the registration settings."""
    parts = [str(a.get(k, "")) for a in (previous, current)
             for k in ("frame_id", "source_sha256", "source_sidecar_sha256", "run_key")]
    parts += [str(config.drift.upsample_factor), str(config.drift.min_confidence)]
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:24]


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
                       f"{m_per_s_to_nm_per_min(mean):+.3f} nm/min, the frame-to-frame model "
                       f"{m_per_s_to_nm_per_min(fitted):+.3f} nm/min"))
    return attrs
