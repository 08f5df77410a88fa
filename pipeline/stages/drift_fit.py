"""The run's drift model fitted to frame-to-frame displacements (private).

Public API in :mod:`pipeline.stages.drift`; the model is
:class:`~pipeline.stages.drift_model.DriftModel`. A frame pair measures ``d(t₂) − d(t₁)`` as
minus its feature displacement.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np

from pipeline.errors import ProcessingError
from pipeline.stages.drift_model import DriftModel, m_per_s_to_nm_per_min
from pipeline.stages.drift_shift import FrameShift

__all__ = ["fit_drift_model", "fit_drift_series"]

#: Up to this many excluded pairs are warned about one by one; more are grouped by reason.
MAX_LISTED_EXCLUSIONS = 4


def exclusion_warnings(names: Sequence[str], reasons: Sequence[str]) -> list[str]:
    """Warning texts for the pairs left out of the drift model (non-empty ``reasons``).

    One line per pair while there are at most :data:`MAX_LISTED_EXCLUSIONS`; beyond that one
    line per kind of reason (the text before its parenthesis) with the count and the first
    pairs, so that a run whose pairs all fail does not bury its other messages. Each pair's
    full reason stays in the drift table.
    """
    excluded = [(name, why) for name, why in zip(names, reasons, strict=True) if why]
    if len(excluded) <= MAX_LISTED_EXCLUSIONS:
        return [f"{name}: excluded from the drift model: {why}" for name, why in excluded]
    groups: dict[str, list[str]] = {}
    for name, why in excluded:
        groups.setdefault(why.split(" (")[0], []).append(name)
    out = []
    for kind, members in groups.items():
        shown = ", ".join(members[:2]) + (", …" if len(members) > 2 else "")
        out.append(f"{len(members)} of {len(names)} pairs excluded from the drift model: "
                   f"{kind} ({shown}; each pair's reason is in the drift table)")
    return out


def _none_model(n_pairs: int, reasons: Sequence[str], warnings: list[str],
                labels: tuple[str, ...]) -> DriftModel:
    warnings = [*warnings, "no usable frame pairs: drift not measured; frames are not corrected"]
    nan = np.full((1, 1), np.nan)
    return DriftModel("none", np.zeros(1), np.zeros(1), nan, nan.copy(),
                      used=(False,) * n_pairs, reasons=tuple(reasons),
                      warnings=tuple(warnings), labels=labels)


def _as_pair_sigma(values: Any, n: int) -> tuple[np.ndarray, np.ndarray]:
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape == (n,):
        return arr, arr
    if arr.shape == (n, 2):
        return arr[:, 0], arr[:, 1]
    raise ProcessingError(f"fit_drift_model: uncertainties_m has shape {arr.shape}; expected "
                          f"({n},) or ({n}, 2) for {n} frame pairs")


def fit_drift_model(
    times_s: Sequence[float] | np.ndarray,
    dx_m: Sequence[float] | np.ndarray,
    dy_m: Sequence[float] | np.ndarray,
    *,
    uncertainties_m: Any,
    confidence: Sequence[float] | np.ndarray,
    min_confidence: float = 0.3,
    model: Literal["constant", "smooth"] = "constant",
    smooth_degree: int = 2,
    outlier_threshold_sigma: float = 4.0,
    pairs: np.ndarray | Sequence[tuple[int, int]] | None = None,
    tip_change: Sequence[bool] | np.ndarray | None = None,
    reasons: Sequence[str] | None = None,
    labels: Sequence[str] | None = None,
    pair_dt_s: Sequence[float] | np.ndarray | None = None,
    pair_time_offsets_s: Sequence[float] | np.ndarray | None = None,
) -> DriftModel:
    """Fit the run's drift ``d(t)`` to frame-to-frame feature displacements.

    Parameters
    ----------
    times_s : array, shape (n_frames,)
        Effective mean acquisition time of each frame, seconds since the run start
        (:func:`frame_times_s`).
    dx_m, dy_m : array, shape (n_pairs,)
        Feature displacement of each pair (:attr:`FrameShift.dx_m`), ``≈ −(d(t₁) − d(t₀))``.
    uncertainties_m : float or array, shape (n_pairs,) or (n_pairs, 2)
        Standard uncertainty of each displacement (same for x and y, or per axis).
    confidence : array, shape (n_pairs,)
        Registration confidence; pairs below ``min_confidence`` are excluded.
    min_confidence : float
        Confidence threshold in [0, 1].
    model : {"constant", "smooth"}
        ``"constant"``: one velocity for the whole run. ``"smooth"``: a polynomial of position
        against time of degree ``smooth_degree`` (for the first hours after cool-down, when the
        drift decays).
    smooth_degree : int
        Degree of the smooth model (reduced, with a warning, when there are too few pairs).
    outlier_threshold_sigma : float
        Pairs further than this many (robustly scaled) standard deviations from the model are
        excluded, one at a time.
    pairs : array of int, shape (n_pairs, 2), optional
        Frame indices ``(earlier, later)`` of each pair; default consecutive frames.
    tip_change : array of bool, optional
        Pairs spanning a tip change are excluded.
    reasons : sequence of str, optional
        Non-empty entries exclude the pair with that reason (e.g. :attr:`FrameShift.reason`).
    labels : sequence of str, optional
        Names of the pairs for warning texts.
    pair_dt_s, pair_time_offsets_s : array, shape (n_pairs,), optional
        Observation times of each pair (:attr:`FrameShift.dt_s`, :attr:`FrameShift.time_offset_s`):
        the displacement spans ``[tᵢ + offset, tᵢ + offset + dt]`` instead of ``[tᵢ, tⱼ]``.
        Pass them (or use :func:`fit_drift_series`): without them fast drift is biased by its own
        intra-frame stretch.

    Returns
    -------
    DriftModel

    Raises
    ------
    ProcessingError
        On inconsistent array lengths or option values.

    Notes
    -----
    Each usable pair ``(i, j)`` is one linear equation for the coefficients,
    ``d(tⱼ) − d(tᵢ) = −Δfeature``, so rejected pairs leave gaps without breaking anything and
    frames may pair with any earlier frame. Weighted least squares with the registration
    uncertainties; the covariance is multiplied by the reduced χ² when that exceeds 1 (Birge
    ratio), so the quoted velocity uncertainty covers scatter the registration does not know
    about (non-uniform drift, tip changes, creep). Outliers are removed one at a time while the
    largest normalised residual, scaled by ``max(1, 1.4826·MAD)``, exceeds the threshold (needs
    at least three more pairs than coefficients).
    """
    t = np.asarray(times_s, dtype=float)
    dx = np.asarray(dx_m, dtype=float)
    dy = np.asarray(dy_m, dtype=float)
    n = dx.shape[0] if dx.ndim == 1 else -1
    if t.ndim != 1 or dx.ndim != 1 or dy.shape != dx.shape:
        raise ProcessingError("fit_drift_model: times_s, dx_m and dy_m must be 1-D with "
                              f"len(dx_m) == len(dy_m) (got {t.shape}, {dx.shape}, {dy.shape})")
    if model not in ("constant", "smooth"):
        raise ProcessingError(f"fit_drift_model: model = {model!r}; expected 'constant' or "
                              "'smooth'")
    if not 0 <= min_confidence <= 1:
        raise ProcessingError(f"fit_drift_model: min_confidence = {min_confidence}; must be in "
                              "[0, 1]")
    if not 1 <= int(smooth_degree) <= 6:
        raise ProcessingError(f"fit_drift_model: smooth_degree = {smooth_degree}; allowed 1 … 6")
    if pairs is None:
        if t.shape[0] != n + 1:
            raise ProcessingError(
                f"fit_drift_model: {t.shape[0]} frame times for {n} consecutive pairs; expected "
                f"{n + 1} (or pass pairs=)")
        idx = np.column_stack([np.arange(n), np.arange(1, n + 1)])
    else:
        idx = np.asarray(pairs, dtype=int).reshape(-1, 2)
        if idx.shape[0] != n or idx.min(initial=0) < 0 or idx.max(initial=0) >= t.shape[0]:
            raise ProcessingError(f"fit_drift_model: pairs must be {n} index pairs into the "
                                  f"{t.shape[0]} frame times")
    conf = np.asarray(confidence, dtype=float).reshape(-1)
    if conf.shape != (n,):
        raise ProcessingError(f"fit_drift_model: confidence has {conf.size} values for {n} pairs")
    sx, sy = _as_pair_sigma(uncertainties_m, n)
    tips = np.zeros(n, bool) if tip_change is None else np.asarray(tip_change, bool).reshape(-1)
    pre = [""] * n if reasons is None else [str(r) for r in reasons]
    names = tuple(labels) if labels is not None else tuple(
        f"pair {k} (frames {i} → {j})" for k, (i, j) in enumerate(idx))
    if len(pre) != n or tips.shape != (n,) or len(names) != n:
        raise ProcessingError("fit_drift_model: tip_change, reasons and labels need one entry "
                              f"per pair ({n})")

    t_a = t[idx[:, 0]].copy()
    t_b = t[idx[:, 1]].copy()
    if pair_time_offsets_s is not None:
        off = np.asarray(pair_time_offsets_s, dtype=float).reshape(-1)
        if off.shape != (n,):
            raise ProcessingError(f"fit_drift_model: pair_time_offsets_s has {off.size} values "
                                  f"for {n} pairs")
        t_a += np.nan_to_num(off)
    if pair_dt_s is not None:
        pdt = np.asarray(pair_dt_s, dtype=float).reshape(-1)
        if pdt.shape != (n,):
            raise ProcessingError(f"fit_drift_model: pair_dt_s has {pdt.size} values for {n} "
                                  "pairs")
        t_b = np.where(np.isfinite(pdt), t_a + pdt, t_b)
    why = list(pre)
    for k in range(n):
        if why[k]:
            continue
        if not (np.isfinite(dx[k]) and np.isfinite(dy[k]) and sx[k] > 0 and sy[k] > 0
                and np.isfinite(sx[k]) and np.isfinite(sy[k])):
            why[k] = "shift or its uncertainty not finite"
        elif conf[k] < min_confidence:
            why[k] = f"low registration confidence ({conf[k]:.2f} < {min_confidence:.2f})"
        elif tips[k]:
            why[k] = "tip change in one of the frames"
        elif not t_b[k] > t_a[k]:
            why[k] = "later frame is not later in time"
    warnings: list[str] = []
    ok = np.array([not w for w in why])
    if not ok.any():
        return _none_model(n, why, exclusion_warnings(names, why), names)

    used_t = np.concatenate([t_a[ok], t_b[ok]])
    scale = float(max(np.max(np.abs(used_t)), 1.0))
    degree = 1 if model == "constant" else int(smooth_degree)
    if model == "smooth" and degree > ok.sum() - 1:
        new = max(1, int(ok.sum()) - 1)
        if new != degree:
            warnings.append(f"smooth drift model: degree reduced from {degree} to {new} "
                            f"({int(ok.sum())} usable pairs)")
        degree = new
    jj = np.arange(1, degree + 1)
    a = (t_b[:, None] / scale) ** jj - (t_a[:, None] / scale) ** jj
    obs_x, obs_y = -dx, -dy  # drift increments d(t1) - d(t0)

    def _solve(mask: np.ndarray) -> tuple[np.ndarray, ...]:
        out = []
        for obs, sig in ((obs_x, sx), (obs_y, sy)):
            aw = a[mask] / sig[mask, None]
            bw = obs[mask] / sig[mask]
            coef, *_ = np.linalg.lstsq(aw, bw, rcond=None)
            cov = np.linalg.pinv(aw.T @ aw)
            res = (obs - a @ coef) / sig
            dof = int(mask.sum()) - degree
            chi2 = float(np.sum(res[mask] ** 2) / dof) if dof > 0 else math.nan
            out += [coef, cov, res, chi2]
        return tuple(out)

    while True:
        cx, vx, rx, chix, cy, vy, ry, chiy = _solve(ok)
        if ok.sum() < degree + 3:
            break
        z = np.maximum(np.abs(rx), np.abs(ry))
        mad = 1.4826 * float(np.median(z[ok]))
        zs = z / max(1.0, mad)
        zs[~ok] = -np.inf
        worst = int(np.argmax(zs))
        if zs[worst] <= outlier_threshold_sigma:
            break
        ok[worst] = False
        span = float(t_b[worst] - t_a[worst])
        rate_x = m_per_s_to_nm_per_min(-dx[worst] / span)
        rate_y = m_per_s_to_nm_per_min(-dy[worst] / span)
        why[worst] = (f"outlier ({zs[worst]:.1f} σ from the drift model; this pair alone "
                      f"gives {rate_x:.3g}, {rate_y:.3g} nm/min)")
    for chi, cov in ((chix, vx), (chiy, vy)):
        if math.isfinite(chi) and chi > 1:
            cov *= chi
    warnings += exclusion_warnings(names, why)
    return DriftModel(
        kind=model, coef_x=cx, coef_y=cy, cov_x=vx, cov_y=vy, time_scale_s=scale,
        t_first_s=float(used_t.min()), t_last_s=float(used_t.max()),
        used=tuple(bool(v) for v in ok), reasons=tuple(why), warnings=tuple(warnings),
        reduced_chi2=(chix, chiy), labels=names)


def fit_drift_series(
    times_s: Sequence[float] | np.ndarray,
    shifts: Sequence[FrameShift],
    *,
    frame_ids: Sequence[str] | None = None,
    min_confidence: float = 0.3,
    model: Literal["constant", "smooth"] = "constant",
    smooth_degree: int = 2,
    outlier_threshold_sigma: float = 4.0,
) -> DriftModel:
    """:func:`fit_drift_model` from a list of :class:`FrameShift` results.

    With ``frame_ids`` (one per entry of ``times_s``) each shift is matched to its two frames by
    id, so pairs need not be consecutive; without, shift ``k`` joins frames ``k`` and ``k+1``.
    """
    pairs = None
    if frame_ids is not None:
        pos = {str(f): i for i, f in enumerate(frame_ids)}
        try:
            pairs = [(pos[s.previous_id], pos[s.current_id]) for s in shifts]
        except KeyError as exc:
            raise ProcessingError(f"fit_drift_series: frame {exc.args[0]!r} of a shift is not "
                                  "among frame_ids") from None
    return fit_drift_model(
        times_s, [s.dx_m for s in shifts], [s.dy_m for s in shifts],
        uncertainties_m=np.array([[s.uncertainty_x_m, s.uncertainty_y_m] for s in shifts],
                                 dtype=float).reshape(-1, 2),
        confidence=[s.confidence for s in shifts], min_confidence=min_confidence, model=model,
        smooth_degree=smooth_degree, outlier_threshold_sigma=outlier_threshold_sigma,
        pairs=pairs, tip_change=[s.tip_change for s in shifts],
        reasons=[s.reason for s in shifts],
        labels=[f"pair {s.previous_id} → {s.current_id}" for s in shifts],
        pair_dt_s=[s.dt_s for s in shifts], pair_time_offsets_s=[s.time_offset_s for s in shifts])
