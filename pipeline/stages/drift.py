"""Thermal drift: frame-to-frame shifts, a drift model over the run, intra-frame correction.

Convention (DESIGN.md §4, binding): the drift velocity ``v`` is that of the tip relative to the
sample. The pixel at nominal position ``r`` recorded at time ``t`` (seconds since the start of the
run's first frame) shows the surface at ``r + d(t)`` with ``d(t) = ∫v dt`` and ``d(0) = 0``, so
image features move by ``−d(t)``. Everything here uses that sign:

- :func:`measure_frame_shift` returns the *feature* displacement between two frames that the
  scan windows do not explain, ``dx_m ≈ −(d(t₂) − d(t₁))``;
- :class:`DriftModel` holds ``d(t)`` (``position_m``) and ``v(t)`` (``velocity_m_per_s``);
- :func:`correct_drift` resamples a frame so that every pixel shows the surface point of its
  nominal position at the reference time (by default the run start: absolute positions in the
  corrected frames are referenced to the run start).

Typical use by the batch (three passes over levelled frames)::

    pairs = plan_frame_pairs([{**ds.attrs, "nx": ds.sizes["x"], "ny": ds.sizes["y"]}
                              for ds in frames])            # skip other series in between
    shifts = [measure_frame_shift(frames[i], frames[j], upsample_factor=20) for i, j in pairs]
    times = [frame_times_s(ds, run_start=run_start)[1] for ds in frames]
    model = fit_drift_series(times, shifts, frame_ids=ids, model="constant")
    corrected = correct_drift(ds, model=model, frame_t0_s=frame_times_s(ds, run_start)[0])
    table = drift_table(ids, times, shifts, model)            # -> store group "run"

This module is the public face; the work is done in private-by-convention modules:
:mod:`~pipeline.stages.drift_frames` (frame geometry, pixel clocks, :func:`frame_times_s`,
:func:`plan_frame_pairs`), :mod:`~pipeline.stages.drift_shift` (:class:`FrameShift`,
:func:`measure_frame_shift`), :mod:`~pipeline.stages.drift_model` (:class:`DriftModel`, unit
conversions), :mod:`~pipeline.stages.drift_fit` (:func:`fit_drift_model`,
:func:`fit_drift_series`), :mod:`~pipeline.stages.drift_table` (:func:`drift_table`,
:func:`model_from_table`, z creep) and :mod:`~pipeline.stages.drift_correct`
(:func:`correct_drift`, up/down pairs). Sub-pixel registration is
:mod:`pipeline.stages.registration`.
"""

from __future__ import annotations

from pipeline.stages.drift_correct import (
    CORRECTION_ITERATIONS as CORRECTION_ITERATIONS,
)
from pipeline.stages.drift_correct import (
    OUTSIDE_WARNING_FRACTION as OUTSIDE_WARNING_FRACTION,
)
from pipeline.stages.drift_correct import UpDownDrift, correct_drift, drift_from_up_down_pair
from pipeline.stages.drift_fit import fit_drift_model, fit_drift_series
from pipeline.stages.drift_frames import MIN_OVERLAP_PX as MIN_OVERLAP_PX
from pipeline.stages.drift_frames import PIXEL_SIZE_TOLERANCE as PIXEL_SIZE_TOLERANCE
from pipeline.stages.drift_frames import REGISTRATION_EXCLUDED as REGISTRATION_EXCLUDED
from pipeline.stages.drift_frames import frame_times_s, plan_frame_pairs
from pipeline.stages.drift_model import NM_PER_MIN_PER_M_PER_S as NM_PER_MIN_PER_M_PER_S
from pipeline.stages.drift_model import (
    DriftModel,
    m_per_s_to_nm_per_min,
    nm_per_min_to_m_per_s,
)
from pipeline.stages.drift_shift import FrameShift, measure_frame_shift
from pipeline.stages.drift_table import (
    ZDrift,
    drift_table,
    fit_z_drift,
    model_from_table,
    theil_sen,
)

__all__ = [
    "DriftModel",
    "FrameShift",
    "UpDownDrift",
    "ZDrift",
    "correct_drift",
    "drift_from_up_down_pair",
    "drift_table",
    "fit_drift_model",
    "fit_drift_series",
    "fit_z_drift",
    "frame_times_s",
    "m_per_s_to_nm_per_min",
    "measure_frame_shift",
    "model_from_table",
    "nm_per_min_to_m_per_s",
    "plan_frame_pairs",
    "theil_sen",
]
