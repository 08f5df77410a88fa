"""The drift series as a table for the store's ``run`` group, and the z creep (private).

Public API in :mod:`pipeline.stages.drift`.
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr
from scipy.special import ndtri

from pipeline.errors import MissingAttributeError, ProcessingError
from pipeline.stages.drift_model import DriftModel, m_per_s_to_nm_per_min
from pipeline.stages.drift_shift import FrameShift

__all__ = ["ZDrift", "drift_table", "fit_z_drift", "model_from_table", "theil_sen"]


@dataclass(frozen=True)
class ZDrift:
    """Creep of the frame-mean height: ``h̄(t) ≈ offset_m + rate_m_per_s·t``."""

    rate_m_per_s: float
    rate_uncertainty_m_per_s: float
    offset_m: float
    n_used: int

    @property
    def rate_nm_per_min(self) -> float:
        return m_per_s_to_nm_per_min(self.rate_m_per_s)


def fit_z_drift(
    times_s: Sequence[float] | np.ndarray, mean_heights_m: Sequence[float] | np.ndarray
) -> ZDrift:
    """Rate of the frame-mean height creep over the run (Theil–Sen slope).

    Parameters
    ----------
    times_s : array
        Frame mean acquisition times, s since the run start.
    mean_heights_m : array
        Frame-mean heights (m) *before* levelling (levelled frames have zero mean by
        construction); non-finite entries are skipped.

    Returns
    -------
    ZDrift
        Rate (m/s) with the half-width of its 68 % confidence interval as uncertainty; NaN with
        fewer than three frames.

    Notes
    -----
    The median of pairwise slopes is insensitive to the occasional jump of the mean height at a
    tip change (breakdown point 29 %), which a least-squares line is not.

    References
    ----------
    .. [1] P. K. Sen, "Estimates of the regression coefficient based on Kendall's tau",
       J. Am. Stat. Assoc. 63, 1379-1389 (1968). doi:10.1080/01621459.1968.10480934
    """
    t = np.asarray(times_s, dtype=float).reshape(-1)
    h = np.asarray(mean_heights_m, dtype=float).reshape(-1)
    if t.shape != h.shape:
        raise ProcessingError(f"fit_z_drift: {t.size} times for {h.size} mean heights")
    ok = np.isfinite(t) & np.isfinite(h)
    if ok.sum() < 3 or np.ptp(t[ok]) <= 0:
        return ZDrift(math.nan, math.nan, math.nan, int(ok.sum()))
    slope, intercept, low, high = theil_sen(t[ok], h[ok], confidence=0.6827)
    return ZDrift(slope, 0.5 * (high - low), intercept, int(ok.sum()))


def _tie_term(v: np.ndarray) -> float:
    """Σ k(k−1)(2k+5) over the groups of k > 1 equal values (Sen's tie correction)."""
    _, counts = np.unique(v, return_counts=True)
    k = counts[counts > 1].astype(float)
    return float(np.sum(k * (k - 1) * (2 * k + 5)))


def theil_sen(x: np.ndarray, y: np.ndarray, *, confidence: float = 0.95
              ) -> tuple[float, float, float, float]:
    """Theil–Sen line through ``(x, y)``: slope, intercept and the slope's confidence interval.

    The slope is the median of the pairwise slopes over pairs with ``x_j > x_i``, the intercept
    ``median(y) − slope·median(x)``; the interval comes from the normal approximation to the
    distribution of Kendall's statistic with ties corrected (Sen 1968, eq. 2.6). The numbers
    are those of ``scipy.stats.theilslopes`` (tested), without importing ``scipy.stats`` (a
    fifth of a second of the scheduler's start-up).

    Returns
    -------
    tuple of float
        ``(slope, intercept, low_slope, high_slope)``; the interval bounds are NaN when no pair
        of distinct ``x`` exists.
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    dx = x[:, None] - x[None, :]
    dy = y[:, None] - y[None, :]
    pos = dx > 0
    slopes = np.sort(dy[pos] / dx[pos])
    if not slopes.size:
        return math.nan, math.nan, math.nan, math.nan
    slope = float(np.median(slopes))
    intercept = float(np.median(y) - slope * np.median(x))
    alpha = 1.0 - confidence if confidence > 0.5 else confidence
    z = float(ndtri(alpha / 2.0))  # standard normal quantile (negative)
    n, nt = y.size, slopes.size
    sigma = math.sqrt((n * (n - 1) * (2 * n + 5) - _tie_term(x) - _tie_term(y)) / 18.0)
    upper = min(int(np.round((nt - z * sigma) / 2.0)), nt - 1)
    lower = max(int(np.round((nt + z * sigma) / 2.0)) - 1, 0)
    return slope, intercept, float(slopes[lower]), float(slopes[upper])


def drift_table(
    frame_ids: Sequence[str],
    times_s: Sequence[float] | np.ndarray,
    shifts: Sequence[FrameShift],
    model: DriftModel,
    *,
    frame_start_s: Sequence[float] | np.ndarray | None = None,
    mean_heights_m: Sequence[float] | np.ndarray | None = None,
    z_drift: ZDrift | None = None,
    run_start: str | None = None,
) -> xr.Dataset:
    """The drift series and model as a dataset for the store's ``run`` group.

    One row per frame (dimension ``drift_frame``; variable names start with ``drift_`` so the
    table merges with the other run tables). ``drift_position_x_m/_y_m`` is the measured drift
    displacement ``d`` (tip relative to sample) accumulated along the usable pairs, anchored to
    the model at the first frame; a frame whose pair was excluded continues from its partner by
    the model's increment (``drift_pair_used = 0`` and the reason say so). The attributes carry
    the model: ``drift_velocity_x_m_per_s`` / ``_y_`` (run-mean velocity) with uncertainties,
    the rates in nm/min, the model kind and coefficients (see :func:`model_from_table`), and the
    z creep rate when given.
    """
    ids = [str(f) for f in frame_ids]
    t = np.asarray(times_s, dtype=float).reshape(-1)
    nf = len(ids)
    if t.shape != (nf,):
        raise ProcessingError(f"drift_table: {t.size} times for {nf} frames")
    pos = {f: i for i, f in enumerate(ids)}
    by_current: dict[int, tuple[int, FrameShift]] = {}
    for k, s in enumerate(shifts):
        j = pos.get(s.current_id)
        if j is None or s.previous_id not in pos:
            raise ProcessingError(f"drift_table: shift {s.previous_id} → {s.current_id} names a "
                                  "frame that is not in frame_ids")
        used = bool(model.used[k]) if k < len(model.used) else False
        if j not in by_current or (used and not by_current[j][1].reason):
            by_current.setdefault(j, (k, s))
            if used:
                by_current[j] = (k, s)
    mx, my = model.position_m(t)
    px, py = np.full(nf, np.nan), np.full(nf, np.nan)
    ux, uy = np.zeros(nf), np.zeros(nf)
    prev = [""] * nf
    sdx, sdy = np.full(nf, np.nan), np.full(nf, np.nan)
    conf = np.full(nf, np.nan)
    used_flag = np.zeros(nf, np.int8)
    reason = [""] * nf
    order = np.argsort(t, kind="stable")
    for j in order:
        entry = by_current.get(int(j))
        if entry is None or not np.isfinite(px[pos[entry[1].previous_id]]):
            px[j], py[j] = mx[j], my[j]
            reason[j] = "first frame (anchored to the model)" if entry is None else \
                "partner frame has no position"
            continue
        k, s = entry
        i = pos[s.previous_id]
        prev[j], sdx[j], sdy[j], conf[j] = s.previous_id, s.dx_m, s.dy_m, s.confidence
        if k < len(model.used) and model.used[k]:
            # the pair measured d(t_b) − d(t_a) at its observation times; carry it over to the
            # frames' mean times with the model (a small correction for fast drift)
            t_a = t[i] + (s.time_offset_s if math.isfinite(s.time_offset_s) else 0.0)
            t_b = t_a + s.dt_s if math.isfinite(s.dt_s) else t[j]
            (ax_, bx_), (ay_, by_) = model.position_m(np.array([t_a, t_b]))
            cx = (mx[j] - bx_) - (mx[i] - ax_)
            cy = (my[j] - by_) - (my[i] - ay_)
            px[j], py[j] = px[i] - s.dx_m + cx, py[i] - s.dy_m + cy
            ux[j] = math.hypot(ux[i], s.uncertainty_x_m)
            uy[j] = math.hypot(uy[i], s.uncertainty_y_m)
            used_flag[j] = 1
        else:
            ex, ey = model.position_uncertainty_m(t[j], t[i]) if model.is_usable else (0.0, 0.0)
            px[j], py[j] = px[i] + (mx[j] - mx[i]), py[i] + (my[j] - my[i])
            ux[j], uy[j] = math.hypot(ux[i], float(ex)), math.hypot(uy[i], float(ey))
            reason[j] = (model.reasons[k] if k < len(model.reasons) else s.reason) or "not used"

    def var(data: Any, units: str, long: str) -> tuple[Any, ...]:
        return ("drift_frame", data, {"units": units, "long_name": long} if units else
                {"long_name": long})

    data = {
        "drift_frame_id": var(np.array(ids, dtype=object), "", "frame id"),
        "drift_time_s": var(t, "s", "effective mean acquisition time since the run start"),
        "drift_position_x_m": var(px, "m", "measured drift displacement x (tip relative to "
                                  "sample), accumulated over frame pairs"),
        "drift_position_y_m": var(py, "m", "measured drift displacement y (tip relative to "
                                  "sample), accumulated over frame pairs"),
        "drift_position_uncertainty_x_m": var(ux, "m", "standard uncertainty of "
                                              "drift_position_x_m relative to the first frame"),
        "drift_position_uncertainty_y_m": var(uy, "m", "standard uncertainty of "
                                              "drift_position_y_m relative to the first frame"),
        "drift_model_x_m": var(mx, "m", "drift model displacement x at the frame time"),
        "drift_model_y_m": var(my, "m", "drift model displacement y at the frame time"),
        "drift_pair_previous_id": var(np.array(prev, dtype=object), "",
                                      "earlier frame of the pair ending at this frame"),
        "drift_pair_shift_x_m": var(sdx, "m", "measured feature displacement x of the pair"),
        "drift_pair_shift_y_m": var(sdy, "m", "measured feature displacement y of the pair"),
        "drift_pair_confidence": var(conf, "1", "registration confidence of the pair"),
        "drift_pair_used": var(used_flag, "", "1 if the pair entered the drift model"),
        "drift_pair_reason": var(np.array(reason, dtype=object), "",
                                 "why the pair was not used (empty if used)"),
    }
    if frame_start_s is not None:
        data["drift_frame_start_s"] = var(np.asarray(frame_start_s, float).reshape(-1), "s",
                                          "frame start time since the run start")
    if mean_heights_m is not None:
        data["drift_mean_height_m"] = var(np.asarray(mean_heights_m, float).reshape(-1), "m",
                                          "frame-mean height (z creep)")
    vx, vy = model.velocity_x_m_per_s, model.velocity_y_m_per_s
    attrs: dict[str, Any] = {
        "drift_velocity_x_m_per_s": vx,
        "drift_velocity_y_m_per_s": vy,
        "drift_velocity_uncertainty_x_m_per_s": model.velocity_uncertainty_x_m_per_s,
        "drift_velocity_uncertainty_y_m_per_s": model.velocity_uncertainty_y_m_per_s,
        "drift_rate_x_nm_per_min": m_per_s_to_nm_per_min(vx),
        "drift_rate_y_nm_per_min": m_per_s_to_nm_per_min(vy),
        "drift_rate_nm_per_min": m_per_s_to_nm_per_min(math.hypot(vx, vy)),
        "drift_rate_uncertainty_x_nm_per_min":
            m_per_s_to_nm_per_min(model.velocity_uncertainty_x_m_per_s),
        "drift_rate_uncertainty_y_nm_per_min":
            m_per_s_to_nm_per_min(model.velocity_uncertainty_y_m_per_s),
        "drift_model": model.kind,
        "drift_model_degree": model.degree,
        "drift_model_time_scale_s": model.time_scale_s,
        "drift_model_coefficients_x_m": np.asarray(model.coef_x, float),
        "drift_model_coefficients_y_m": np.asarray(model.coef_y, float),
        "drift_model_covariance_x_m2": np.asarray(model.cov_x, float).reshape(-1),
        "drift_model_covariance_y_m2": np.asarray(model.cov_y, float).reshape(-1),
        "drift_model_t_first_s": model.t_first_s,
        "drift_model_t_last_s": model.t_last_s,
        "drift_pairs_used": model.n_used,
        "drift_pairs_rejected": len(shifts) - model.n_used,
        "drift_reference": "run-start",
        "drift_warnings": json.dumps(list(model.warnings)),
    }
    if run_start is not None:
        attrs["drift_run_start"] = str(run_start)
    if z_drift is not None:
        attrs["z_drift_rate_m_per_s"] = z_drift.rate_m_per_s
        attrs["z_drift_rate_uncertainty_m_per_s"] = z_drift.rate_uncertainty_m_per_s
        attrs["z_drift_rate_nm_per_min"] = z_drift.rate_nm_per_min
    return xr.Dataset(data, attrs=attrs)


def model_from_table(table: xr.Dataset) -> DriftModel:
    """Rebuild the :class:`DriftModel` stored in a :func:`drift_table` dataset."""
    a = table.attrs
    try:
        kind = str(a["drift_model"])
        cx = np.atleast_1d(np.asarray(a["drift_model_coefficients_x_m"], float))
        cy = np.atleast_1d(np.asarray(a["drift_model_coefficients_y_m"], float))
        d = cx.size
        vx = np.asarray(a["drift_model_covariance_x_m2"], float).reshape(d, d)
        vy = np.asarray(a["drift_model_covariance_y_m2"], float).reshape(d, d)
        scale = float(a["drift_model_time_scale_s"])
    except KeyError as exc:
        raise MissingAttributeError(f"model_from_table: attribute {exc.args[0]!r} is missing "
                                    "(not a drift table?)") from None
    used = tuple(bool(u) for u in np.asarray(table["drift_pair_used"].values)) \
        if "drift_pair_used" in table else ()
    warnings = tuple(json.loads(a.get("drift_warnings", "[]")))
    return DriftModel(kind, cx, cy, vx, vy, time_scale_s=scale,
                      t_first_s=float(a.get("drift_model_t_first_s", 0.0)),
                      t_last_s=float(a.get("drift_model_t_last_s", 0.0)),
                      used=used, warnings=warnings)
