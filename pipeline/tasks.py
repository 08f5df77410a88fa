"""Per-file recipes a worker runs: read its own input, call the stages in order, stage it.

Each task takes file paths and plain parameters (never arrays), so it can run in this process,
in a local worker process or on a Dask worker; it returns a small summary (never the maps) and
turns every expected error into a :class:`~pipeline.io.store.Failure`, so one bad file never stops
a run. The sequence of named stages of a frame is visible here, in :func:`process_frame`.
Scheduling lives in :mod:`pipeline.batch`.
"""

from __future__ import annotations

import hashlib
import json
import math
import traceback
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline._version import __version__
from pipeline.config import Config
from pipeline.errors import IsogapError
from pipeline.io.readers import read_file, read_header
from pipeline.io.staging import (
    read_staged,
    read_staged_record,
    staged_header,
    staged_path,
    write_staged,
    write_staged_record,
)
from pipeline.io.store import Failure
from pipeline.model import BAD_PIXELS, parse_time
from pipeline.stages.barrier import FIT_CURVES_CONFIG_KEYS, apparent_barrier_map, fit_curves
from pipeline.stages.calibrate import scale_height
from pipeline.stages.drift import (
    DriftModel,
    FrameShift,
    UpDownDrift,
    correct_drift,
    drift_from_up_down_pair,
    measure_frame_shift,
)
from pipeline.stages.height import reconstruct_height
from pipeline.stages.lattice import LatticeCalibration, measure_lattice
from pipeline.stages.level import level_lines, level_terraces, repair_scars, subtract_background
from pipeline.stages.quality import assess_quality, compare_step_with_run, flag_tip_changes

__all__ = [
    "FrameSummary",
    "SurveyResult",
    "curve_fit_options",
    "finalize_frame",
    "lattice_of_frame",
    "process_frame",
    "register_pair",
    "survey_file",
]


@dataclass
class SurveyResult:
    """What a first look at one input file found."""

    path: str
    kind: str = ""  # "frame" or "curve"
    sha256: str = ""
    sidecar_sha256: str = ""
    attrs: dict[str, Any] = field(default_factory=dict)
    curve_table: xr.Dataset | None = None
    barrier_map: xr.Dataset | None = None
    warnings: list[str] = field(default_factory=list)
    failure: Failure | None = None


@dataclass
class FrameSummary:
    """The small result a frame task returns to the scheduler."""

    path: str
    frame_id: str = ""
    staged: str = ""
    status: str = ""
    start_time: str = ""
    step_height_m: float | None = None
    step_height_uncertainty_m: float | None = None
    failure: Failure | None = None
    #: attributes and dimension sizes of the staged result, as read back from it
    header: tuple[dict[str, Any], dict[str, int]] | None = None
    #: the finished frame itself, when it is handed to the scheduler instead of staged
    dataset: xr.Dataset | None = None


def _failure(path: str, stage: str, exc: BaseException) -> Failure:
    if isinstance(exc, IsogapError):
        msg = str(exc)
    else:  # a defect, not bad input: keep the traceback's last line so it can be reported
        tb = traceback.format_exception_only(type(exc), exc)[-1].strip()
        msg = f"internal error in stage {stage}: {tb}"
    return Failure(file=path, stage=stage, message=msg)


def curve_fit_options(config: Config) -> dict[str, Any]:
    """The ``[barrier]`` keys that are :func:`fit_curves` arguments."""
    return config.barrier.model_dump(include=set(FIT_CURVES_CONFIG_KEYS))


def survey_file(path: str, config: Config, store: str = "") -> SurveyResult:
    """Read one input; fit its approach curves if it holds curves, else note the frame's attrs.

    With ``store``, the fits of a curve file are staged under it, keyed by the file's path and
    content hashes, the fit settings and the software version, and reused by later runs (a
    resumed or ``--follow`` run fits only new curve files).
    """
    res = SurveyResult(path=path)
    header = read_header(path)
    if header is not None and header["kind"] == "frame":
        # a frame is read (and validated) once, by its own task: its header is enough here
        res.kind, res.sha256 = "frame", str(header["source_sha256"])
        res.sidecar_sha256 = str(header.get("source_sidecar_sha256", ""))
        res.attrs = {k: v for k, v in header.items() if isinstance(v, str | int | float)}
        return res
    key = _curve_key(header, config) if store and header is not None else ""
    if key:
        cached = _cached_survey(store, key, path)
        if cached is not None:
            return cached
    try:
        ds = read_file(path, piezo_z_m_per_V=config.input.piezo_z_m_per_V)
    except Exception as exc:  # every failure is recorded, none stops the run
        res.failure = _failure(path, "read", exc)
        return res
    res.kind = str(ds.attrs["kind"])
    res.sha256 = str(ds.attrs.get("source_sha256", ""))
    res.sidecar_sha256 = str(ds.attrs.get("source_sidecar_sha256", ""))
    res.attrs = {k: v for k, v in ds.attrs.items() if isinstance(v, str | int | float)}
    if res.kind == "curve":
        try:
            res.curve_table = fit_curves(ds, **curve_fit_options(config))
        except Exception as exc:
            res.failure = _failure(path, "fit_curves", exc)
            return res
        if _on_grid(ds):  # curves recorded on a grid of positions also give a map of φ_ap
            try:
                res.barrier_map = apparent_barrier_map(ds, **curve_fit_options(config))
            except IsogapError as exc:
                res.warnings.append(f"{path}: no barrier map from the curve grid ({exc})")
        if key and res.sha256 == header.get("source_sha256"):  # unchanged since the header
            _stage_survey(store, key, res)
    return res


def _curve_key(header: dict[str, Any], config: Config) -> str:
    """What the fits of a curve file depend on: its path and content, the fit settings, the
    piezo calibration and the software version."""
    if header.get("kind") != "curve":
        return ""
    parts = [str(header.get(k, "")) for k in ("source_file", "source_sha256",
                                              "source_sidecar_sha256")]
    parts += [json.dumps(curve_fit_options(config), sort_keys=True, default=str),
              repr(config.input.piezo_z_m_per_V), __version__]
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:24]


def _stage_survey(store: str, key: str, res: SurveyResult) -> None:
    write_staged(store, "curves", f"{key}-table", res.curve_table)
    if res.barrier_map is not None:
        write_staged(store, "curves", f"{key}-map", res.barrier_map)
    attrs = {k: (v.item() if isinstance(v, np.generic) else v) for k, v in res.attrs.items()}
    # the record last: it marks the entry complete
    write_staged_record(store, "curves", key, {
        "kind": res.kind, "sha256": res.sha256, "sidecar_sha256": res.sidecar_sha256,
        "attrs": attrs, "warnings": res.warnings, "map": res.barrier_map is not None})


def _cached_survey(store: str, key: str, path: str) -> SurveyResult | None:
    record = read_staged_record(store, "curves", key)
    if record is None:
        return None
    try:
        table = read_staged(staged_path(store, "curves", f"{key}-table"))
        bmap = read_staged(staged_path(store, "curves", f"{key}-map")) if record["map"] else None
        return SurveyResult(path=path, kind=str(record["kind"]), sha256=str(record["sha256"]),
                            sidecar_sha256=str(record["sidecar_sha256"]),
                            attrs=dict(record["attrs"]), curve_table=table, barrier_map=bmap,
                            warnings=list(record["warnings"]))
    except (IsogapError, KeyError, TypeError):  # an incomplete entry: fit again
        return None


def _on_grid(curves: xr.Dataset, tolerance_m: float = 1e-12) -> bool:
    """True if the curves' positions fill a regular grid of at least 2 × 2 nodes."""
    if "position_x_m" not in curves.attrs or "position_y_m" not in curves.attrs:
        return False
    x = np.atleast_1d(np.asarray(curves.attrs["position_x_m"], dtype=float))
    y = np.atleast_1d(np.asarray(curves.attrs["position_y_m"], dtype=float))
    if x.size != curves.sizes["curve"] or y.size != x.size or x.size < 4:
        return False
    nx = np.unique(np.round(x / tolerance_m)).size
    ny = np.unique(np.round(y / tolerance_m)).size
    return nx >= 2 and ny >= 2 and nx * ny == x.size


def process_frame(
    path: str, store: str, config: Config, work_function_eV: float,
    work_function_uncertainty_eV: float, run_key: str,
) -> FrameSummary:
    """Raw frame → height → levelling → quality; the result is staged under ``store``.

    ``run_key`` identifies everything the result depends on besides the source file (config
    sections, work function); it is stored so a resumed run can tell whether to recompute.
    """
    out = FrameSummary(path=path)
    stage = "read"
    try:
        raw = read_file(path, piezo_z_m_per_V=config.input.piezo_z_m_per_V)
        if raw.attrs.get("kind") != "frame":
            raise IsogapError(f"{path}: expected a frame, found kind {raw.attrs.get('kind')!r}")
        h, lv, q = config.height, config.level, config.quality
        stage = "reconstruct_height"
        ds = reconstruct_height(
            raw, work_function_eV=work_function_eV,
            work_function_uncertainty_eV=work_function_uncertainty_eV,
            combine_traces=h.combine_traces, trace_mismatch_sigma=h.trace_mismatch_sigma,
            noise_floor_A=h.noise_floor_A, current_noise_A=h.current_noise_A)
        del raw
        ds.attrs["mean_height_before_levelling_m"] = _valid_mean(ds)
        # before levelling: line levelling would remove the jumps that mark a tip change
        stage = "flag_tip_changes"
        ds = flag_tip_changes(ds, threshold_sigma=q.tip_change_threshold_sigma)
        if lv.scars:
            stage = "repair_scars"
            ds = repair_scars(ds, threshold_sigma=lv.scar_threshold_sigma,
                              max_length_px=lv.scar_max_length_px)
        if lv.line_offsets:
            stage = "level_lines"
            ds = level_lines(ds, slopes=lv.line_slopes,
                             step_threshold_sigma=lv.line_step_threshold_sigma,
                             min_step_height_m=lv.min_step_height_m,
                             tip_jumps=lv.tip_jumps)
        if lv.terraces:
            # one common background plus one offset per terrace; a background subtracted
            # before it would be refitted (plane) or would eat into the staircase (polynomial)
            stage = "level_terraces"
            ds = level_terraces(ds, min_terrace_px=lv.min_terrace_px,
                                min_step_height_m=lv.min_step_height_m,
                                edge_threshold_sigma=lv.edge_threshold_sigma,
                                order=lv.polynomial_order if lv.method == "polynomial" else 1,
                                robust=lv.robust)
        elif lv.method != "none":
            stage = "subtract_background"
            ds = subtract_background(ds, method=lv.method, order=lv.polynomial_order,
                                     robust=lv.robust)
        stage = "assess_quality"
        ds = assess_quality(ds, tip_change_threshold_sigma=q.tip_change_threshold_sigma,
                            bad_pixel_fraction_limit=q.bad_pixel_fraction_limit,
                            trace_mismatch_fraction_limit=q.trace_mismatch_fraction_limit)
        ds.attrs["run_key"] = run_key
        stage = "stage-write"
        out.staged = str(write_staged(store, "frames", ds.attrs["frame_id"], ds))
        out.header = staged_header(out.staged)  # here, so the scheduler need not read it
        _summarise(ds, out)
    except Exception as exc:
        out.failure = _failure(path, stage, exc)
    return out


def _valid_mean(ds: xr.Dataset) -> float:
    good = (ds["flags"].values & int(BAD_PIXELS)) == 0
    hv = ds["height"].values
    vals = hv[good & np.isfinite(hv)]
    return float(vals.mean()) if vals.size else float("nan")


def _summarise(ds: xr.Dataset, out: FrameSummary) -> None:
    out.frame_id = str(ds.attrs["frame_id"])
    out.status = str(ds.attrs.get("status", "ok"))
    out.start_time = str(ds.attrs["start_time"])
    if "step_height_m" in ds.attrs:
        out.step_height_m = float(ds.attrs["step_height_m"])
        out.step_height_uncertainty_m = float(ds.attrs.get("step_height_uncertainty_m", np.nan))


def register_pair(
    previous: str, current: str, config: Config,
) -> tuple[FrameShift, UpDownDrift | None]:
    """Drift shift between two staged, levelled frames; for a pair of one area scanned in
    opposite slow directions also the drift velocity within one frame time."""
    try:
        a, b = (read_staged(p, ("height", "flags")) for p in (previous, current))
        up = config.drift.upsample_factor
        shift = measure_frame_shift(a, b, upsample_factor=up)
    except IsogapError as exc:  # one pair that cannot be measured is left out, with the reason
        return FrameShift(Path(previous).stem, Path(current).stem, math.nan, math.nan,
                          math.inf, math.inf, 0.0, 0.0, reason=str(exc)), None
    updown = None
    same_area = all(np.isclose(float(a.attrs.get(k, 0.0)), float(b.attrs.get(k, 0.0)),
                               rtol=0, atol=1e-12)
                    for k in ("scan_center_x_m", "scan_center_y_m"))
    if same_area and a.attrs.get("slow_direction") != b.attrs.get("slow_direction"):
        try:
            updown = drift_from_up_down_pair(a, b, upsample_factor=up,
                                             min_confidence=config.drift.min_confidence)
        except IsogapError:
            updown = None
    return shift, updown


def pair_record(result: tuple[FrameShift, UpDownDrift | None]) -> dict[str, Any]:
    """A :func:`register_pair` result as a JSON-able record (exact: floats keep every digit,
    infinities and NaN included)."""
    shift, updown = result
    return {"shift": asdict(shift),
            "updown": None if updown is None else asdict(updown)}


def pair_from_record(record: dict[str, Any] | None
                     ) -> tuple[FrameShift, UpDownDrift | None] | None:
    """The result a :func:`pair_record` holds; None for no record or one that does not fit
    (a record of another software version: the pair is measured again)."""
    if record is None:
        return None
    try:
        shift = FrameShift(**record["shift"])
        up = record.get("updown")
        updown = None if up is None else UpDownDrift(**{**up, "warnings": tuple(up["warnings"])})
    except (KeyError, TypeError):
        return None
    return shift, updown


def lattice_of_frame(staged: str, config: Config) -> LatticeCalibration | None:
    """The lateral calibration from one staged frame, or None if it is not atomically resolved."""
    try:
        return measure_lattice(read_staged(staged),
                               lattice_constant_m=float(config.calibrate.lattice_constant_m),
                               min_peak_snr=config.calibrate.min_lattice_peak_snr)
    except IsogapError:
        return None


def finalize_frame(
    staged: str, store: str, config: Config, drift_model: DriftModel | None, run_t0: str,
    z_scale: float, z_scale_uncertainty: float, extra_attrs: dict[str, Any],
    stage_result: bool = True, consensus: tuple[float, float] | None = None,
) -> FrameSummary:
    """Run-level corrections of one staged frame: drift inside it, the comparison of its unit
    step with the run's ``consensus`` (step and scatter, m; skipped when None), the z scale.

    The finished frame is staged under ``store`` (``final/``), or, with ``stage_result=False``,
    returned in the summary's ``dataset`` for the scheduler to write into the store at once.
    """
    out = FrameSummary(path=staged)
    stage = "read-staged"
    try:
        ds = read_staged(staged)
        out.path = str(ds.attrs.get("source_file", staged))
        stage = "correct_drift"
        if drift_model is not None:
            d = config.drift
            t0 = (parse_time(ds.attrs["start_time"]) - parse_time(run_t0)).total_seconds()
            ds = correct_drift(ds, model=drift_model, frame_t0_s=t0,
                               order=d.interpolation_order, reference=d.correction_reference)
        if consensus is not None:
            stage = "compare_step_with_run"
            ds = compare_step_with_run(
                ds, run_step_m=consensus[0], run_scatter_m=consensus[1],
                threshold_sigma=config.quality.step_disagreement_sigma)
        if z_scale != 1.0:
            stage = "scale_height"
            ds = scale_height(ds, factor=z_scale, factor_uncertainty=z_scale_uncertainty)
        ds.attrs.update(extra_attrs)
        if stage_result:
            stage = "stage-write"
            out.staged = str(write_staged(store, "final", ds.attrs["frame_id"], ds))
        else:
            out.dataset = ds
        _summarise(ds, out)
    except Exception as exc:
        out.failure = _failure(out.path, stage, exc)
    return out
