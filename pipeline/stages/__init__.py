"""Processing stages: pure functions ``Dataset (+ params) -> new Dataset`` with provenance.

The implementation lives in one private-by-convention module per concern; the public names are
gathered here.
"""

from pipeline.stages.barrier import (
    BarrierModelFit,
    CurveFit,
    WorkFunctionEstimate,
    apparent_barrier_map,
    combine_fit_tables,
    estimate_work_function,
    fit_approach_curve,
    fit_barrier_model,
    fit_curves,
    two_setpoint_work_function,
)
from pipeline.stages.calibrate import scale_height, scale_lateral, z_scale_from_steps
from pipeline.stages.drift import (
    DriftModel,
    FrameShift,
    correct_drift,
    drift_from_up_down_pair,
    drift_table,
    fit_drift_model,
    fit_z_drift,
    measure_frame_shift,
)
from pipeline.stages.height import estimate_trace_lag, reconstruct_height
from pipeline.stages.lattice import LatticeCalibration, measure_lattice
from pipeline.stages.level import level_lines, level_terraces, repair_scars, subtract_background
from pipeline.stages.quality import areal_parameters, assess_quality, flag_tip_changes
from pipeline.stages.registration import Registration, register_images
from pipeline.stages.tip_changes import detect_tip_changes

__all__ = [
    "BarrierModelFit",
    "CurveFit",
    "DriftModel",
    "FrameShift",
    "LatticeCalibration",
    "Registration",
    "WorkFunctionEstimate",
    "apparent_barrier_map",
    "areal_parameters",
    "assess_quality",
    "combine_fit_tables",
    "correct_drift",
    "detect_tip_changes",
    "drift_from_up_down_pair",
    "drift_table",
    "estimate_trace_lag",
    "estimate_work_function",
    "fit_approach_curve",
    "fit_barrier_model",
    "fit_curves",
    "fit_drift_model",
    "fit_z_drift",
    "flag_tip_changes",
    "level_lines",
    "level_terraces",
    "measure_frame_shift",
    "measure_lattice",
    "reconstruct_height",
    "register_images",
    "repair_scars",
    "scale_height",
    "scale_lateral",
    "subtract_background",
    "two_setpoint_work_function",
    "z_scale_from_steps",
]
