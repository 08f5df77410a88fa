"""Approach-curve fitting: apparent barrier height, decay constant and the run's work function.

The chain is: :func:`fit_approach_curve` (one curve: usable range found automatically, robust
fit of ln|I| against z, honest uncertainty, accept/reject with a reason) → :func:`fit_curves`
(a curve dataset → a table with dim ``curve``) → :func:`estimate_work_function` (the run's
weighted mean with outlier rejection). :func:`fit_barrier_model` corrects a curve's apparent
barrier for bias with the numerical WKB model. :func:`two_setpoint_work_function` and
:func:`apparent_barrier_map` are the alternatives for runs without curves and for maps.

This module is the public face; the implementation lives in private-by-convention modules:

- ``barrier_range``: the usable range of one curve (floor, offset, saturation, contact and
  far-end plateaus, the final range from a first fit);
- ``barrier_lines``: robust and weighted line fits, the two-segment (tip-change) statistic;
- ``barrier_noise``: the noise model of ln|I| (relative AR(1) noise plus floor noise);
- ``barrier_curve``: :class:`CurveFit` and :func:`fit_approach_curve`, the steps in sequence;
- ``barrier_model``: :class:`BarrierModelFit` and :func:`fit_barrier_model`;
- ``barrier_table``: :func:`fit_curves`, :func:`combine_fit_tables`,
  :data:`FIT_CURVES_CONFIG_KEYS`;
- ``barrier_run``: :class:`WorkFunctionEstimate`, :func:`estimate_work_function`,
  :func:`two_setpoint_work_function`;
- ``barrier_map``: :func:`apparent_barrier_map`.

Import from here: the private modules may be reorganised.
"""

from pipeline.stages.barrier_curve import (
    MAX_RELATIVE_UNCERTAINTY,
    PLAUSIBLE_PHI_EV,
    CurveFit,
    fit_approach_curve,
)
from pipeline.stages.barrier_lines import HUBER_C
from pipeline.stages.barrier_map import apparent_barrier_map
from pipeline.stages.barrier_model import BarrierModelFit, fit_barrier_model
from pipeline.stages.barrier_noise import MAD_TO_SIGMA
from pipeline.stages.barrier_range import (
    CONTACT_MARGIN,
    FLAT_SLOPE_FRACTION,
    SATURATION_MARGIN,
    SLOPE_WINDOW,
)
from pipeline.stages.barrier_run import (
    WorkFunctionEstimate,
    estimate_work_function,
    two_setpoint_work_function,
)
from pipeline.stages.barrier_table import FIT_CURVES_CONFIG_KEYS, combine_fit_tables, fit_curves

__all__ = [
    "CONTACT_MARGIN",
    "FIT_CURVES_CONFIG_KEYS",
    "FLAT_SLOPE_FRACTION",
    "HUBER_C",
    "MAD_TO_SIGMA",
    "MAX_RELATIVE_UNCERTAINTY",
    "PLAUSIBLE_PHI_EV",
    "SATURATION_MARGIN",
    "SLOPE_WINDOW",
    "BarrierModelFit",
    "CurveFit",
    "WorkFunctionEstimate",
    "apparent_barrier_map",
    "combine_fit_tables",
    "estimate_work_function",
    "fit_approach_curve",
    "fit_barrier_model",
    "fit_curves",
    "two_setpoint_work_function",
]
