"""Terraces: one common plane and an offset per segmented terrace, the step heights."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import Flag, add_warning, stage
from pipeline.stages.level.frame import (
    _add_variance,
    _coords,
    _copy_with,
    _inputs,
    _name,
    _require,
    _warn_if_constant,
)
from pipeline.stages.level.robust import _Basis, _fit, _grid_variance, _term_names
from pipeline.stages.level.segmentation import _adjacent_pairs, _merge, _segment


def _unit_step(diffs: np.ndarray, min_step_m: float) -> tuple[float, bool]:
    """Largest height h such that every difference is a whole multiple of it (within 0.2 h)."""
    cand = np.abs(diffs[np.abs(diffs) >= min_step_m])
    if cand.size == 0:
        return float("nan"), False
    trials = np.unique(np.concatenate([cand / m for m in (1, 2, 3, 4)]))
    trials = trials[trials >= min_step_m]
    for h0 in trials[::-1]:
        ratio = cand / h0
        if np.all(np.abs(ratio - np.round(ratio)) < 0.2):
            return float(h0), True
    return float(cand.min()), False


def _residual_correlation_factor(res: np.ndarray, mask: np.ndarray) -> float:
    """Variance inflation for spatially correlated residuals (lag-1 AR(1) approximation)."""
    factor = 1.0
    r = np.where(mask, res, 0.0)
    den = float(np.sum(r * r))
    if den <= 0:
        return 1.0
    for axis in (0, 1):
        a = np.moveaxis(r, axis, 0)
        mm = np.moveaxis(mask, axis, 0)
        both = mm[1:] & mm[:-1]
        num = float(np.sum((a[1:] * a[:-1])[both]))
        nrm = float(np.sum((a[1:] ** 2)[both]))
        rho = min(max(num / nrm, 0.0), 0.95) if nrm > 0 else 0.0
        factor *= (1 + rho) / (1 - rho)
    return factor


def _gls_step(d: np.ndarray, cov: np.ndarray, levels: np.ndarray) -> tuple[float, float, float]:
    """Unit step h0 from terrace offsets d = d0 + n h0 (generalised least squares).

    Returns (h0, standard uncertainty, reduced chi^2 or nan). The uncertainty is the fit's,
    inflated by the Birge ratio when the offsets scatter about whole multiples more than
    their covariance allows.
    """
    x = np.stack([np.ones_like(d), levels.astype(np.float64)], axis=1)
    wmat = np.linalg.pinv(cov, hermitian=True)
    a = x.T @ wmat @ x
    ainv = np.linalg.pinv(a, hermitian=True)
    beta = ainv @ (x.T @ wmat @ d)
    res = d - x @ beta
    dof = d.size - 2
    chi2 = float(res @ wmat @ res) / dof if dof > 0 else float("nan")
    var = float(ainv[1, 1])
    if dof > 0 and chi2 > 1:
        var *= chi2
    return float(beta[1]), math.sqrt(max(var, 0.0)), chi2


#: Terrace levels assigned to the wrong multiples of the unit step miss those multiples both
#: significantly (a reduced chi² above this, a Birge ratio of 5: chi²(1) exceeds 25 with
#: probability below 1e-6; common practice) and by a physically large amount (more than this
#: fraction of the step at some terrace). Measured: 11 frames of the sample run give chi²
#: 0.001-0.8; a 256² staircase with a removed tip jump 31-57 but deviations of 0.1 %;
#: simulated staircases with a missed tip change 500-1e5 and 5-31 %.
STEP_CHI2_LIMIT = 25.0
STEP_MULTIPLE_TOLERANCE = 0.02


@stage(version="2")
def level_terraces(
    ds: xr.Dataset,
    *,
    min_terrace_px: int = 256,
    min_step_height_m: float = 5e-11,
    edge_threshold_sigma: float = 6.0,
    edge_smoothing_px: float = 1.0,
    order: int = 1,
    robust: bool = True,
) -> xr.Dataset:
    """Segment terraces, fit one common plane plus one offset per terrace, report step heights.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``; coordinates ``x``, ``y`` in m), ideally
        after :func:`level_lines`.
    min_terrace_px : int
        Connected regions smaller than this (pixels) are not terraces (adsorbates, islands too
        small to fit, fragments); they get label -1.
    min_step_height_m : float
        Neighbouring regions whose fitted levels differ by less than this are one terrace
        (merged), and smaller edges are not looked for.
    edge_threshold_sigma : float
        Pixels whose smoothed height gradient exceeds the median gradient by more than this many
        robust standard deviations are edges between regions.
    edge_smoothing_px : float
        Gaussian smoothing (pixels) before the gradient; suppresses noise and atomic
        corrugation.
    order : int
        Total degree of the common background (1 = plane; up to 8 for a bowed piezo).
    robust : bool
        Iteratively reweighted joint fit (adsorbates, remaining outliers get no weight; such
        pixels are flagged ``EXCLUDED``).

    Returns
    -------
    xarray.Dataset
        New frame with the common background removed and the terraces kept (the lowest
        terrace at height 0), a variable ``terrace`` (int16 label map, -1 unassigned; labels in
        order of increasing height) and attributes ``n_terraces``, ``terrace_offsets_m``,
        ``terrace_levels`` (whole unit steps above the lowest terrace), ``terrace_pixel_counts``,
        ``tilt_x_rad``, ``tilt_y_rad`` (removed tilt at the frame centre), ``residual_tilt_rad``
        (standard uncertainty of the removed tilt: the tilt that may remain),
        ``terrace_fit_terms``, ``terrace_fit_coefficients_m``, and for comparison the result of
        a plain least-squares plane over all usable pixels (``plane_only_tilt_x_rad``,
        ``plane_only_tilt_y_rad``, and with two or more terrace levels
        ``plane_only_step_height_m``). With two or more terrace levels also ``step_height_m``
        and ``step_height_uncertainty_m`` (the monatomic unit step) and
        ``step_height_chi2_reduced``; with two or more terraces ``step_levels_consistent``
        (1 when every height difference of neighbouring terraces is a whole multiple of the
        unit step, 0 when not, or when the offsets miss those multiples both significantly
        and by a large part of a step (:data:`STEP_CHI2_LIMIT`,
        :data:`STEP_MULTIPLE_TOLERANCE`): a tip change that was not detected, or steps of
        different kinds; the step height is then unreliable and the quality stage flags the
        frame).

    Raises
    ------
    ProcessingError
        Bad parameters, or too few usable pixels for the model.

    Notes
    -----
    Segmentation: a robust polynomial of the same order is removed, the result is smoothed by a
    normalised (mask-aware) Gaussian, and pixels whose Sobel gradient is an outlier of the
    frame's gradient distribution (median + ``edge_threshold_sigma`` MADs, but at least what a
    step of ``min_step_height_m`` would give) become edges; the edges are dilated by one pixel
    and the 4-connected remaining regions of at least ``min_terrace_px`` pixels are terraces.
    The joint model is ``h = sum_k c_k P_i(u) P_j(v) + d_t`` (no constant term; one offset per
    terrace), solved by iteratively reweighted least squares (Huber, then Tukey biweight [1]_)
    over the terrace pixels; neighbouring regions whose offsets differ by less than
    ``min_step_height_m`` are merged and the fit repeated. Because the plane is common and the
    offsets free, the staircase does not leak into the tilt (a plain plane fit tilts towards
    the staircase and biases every step), and the step heights come out unbiased.

    Step heights: the offset differences of adjacent terraces are grouped into whole
    multiples of one unit (the largest height of which all of them are multiples within 20 %);
    each terrace gets its whole number of units above the lowest, and the unit is fitted by
    generalised least squares to all offsets with their covariance. That covariance comes from
    the joint fit (residual variance times the inverse normal matrix), inflated for spatially
    correlated residuals by the lag-1 autocorrelation factor (1+rho)/(1-rho) per axis [2]_; with
    three or more terraces it is inflated further by the Birge ratio [3]_ when the offsets
    scatter about whole multiples more than their covariance allows. The uncertainty map grows
    by the variance of the subtracted background.

    A frame with one terrace is levelled by the (robust) background alone and gets no
    step-height attributes. Steps that end inside the frame (the two terraces connect around
    the end) are not separated.

    References
    ----------
    .. [1] A. E. Beaton, J. W. Tukey, Technometrics 16, 147 (1974).
       DOI 10.1080/00401706.1974.10489171
    .. [2] G. V. Bayley, J. M. Hammersley, "The 'effective' number of independent observations
       in an autocorrelated time series", Suppl. J. R. Stat. Soc. 8, 184 (1946).
       DOI 10.2307/2983560
    .. [3] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932). DOI 10.1103/PhysRev.40.207
    """
    if (isinstance(order, bool) or not isinstance(order, int | np.integer)
            or not 1 <= order <= 8):
        raise ProcessingError(f"frame {_name(ds)}: terrace background order {order!r} must be "
                              "an integer from 1 to 8")
    if not (int(min_terrace_px) >= 4 and min_step_height_m > 0 and edge_threshold_sigma > 0
            and edge_smoothing_px >= 0):
        raise ProcessingError(
            f"frame {_name(ds)}: level_terraces needs min_terrace_px >= 4 (got "
            f"{min_terrace_px}), min_step_height_m > 0 (got {min_step_height_m}), "
            f"edge_threshold_sigma > 0 (got {edge_threshold_sigma}) and edge_smoothing_px >= 0 "
            f"(got {edge_smoothing_px})")
    order = int(order)
    h, flags, valid = _inputs(ds, "level_terraces")
    u, v, hx, hy, _, _ = _coords(ds)
    basis_c = _Basis(u, v, order, constant=True)
    _require(ds, valid, basis_c.n + 1, "terrace levelling")
    basis = _Basis(u, v, order, constant=False)
    iy, ix = np.nonzero(valid)
    phi_c = basis_c.at_t(iy, ix)
    z = h[iy, ix]
    pre = _fit(phi_c, z, robust=True, grid=basis_c if iy.size == h.size else None)
    r = h - basis_c.surface(pre.beta)
    labels, _thr = _segment(r, valid, sigma_px=float(edge_smoothing_px),
                            threshold_sigma=float(edge_threshold_sigma),
                            min_step_m=float(min_step_height_m), min_px=int(min_terrace_px))
    n_lab = int(labels.max()) + 1
    warn: list[str] = []
    if n_lab == 0:
        warn.append(f"level_terraces: no region of at least {int(min_terrace_px)} pixels "
                    "between height edges; the whole frame is treated as one terrace")
        labels = np.where(valid, 0, -1)
        n_lab = 1
    labels = np.where(valid, labels, -1)
    reach = math.ceil(3 * edge_smoothing_px) + 3
    for _ in range(8):
        sel = labels >= 0
        jy, jx = np.nonzero(sel)
        if jy.size < basis.n + n_lab + 1:
            raise ProcessingError(
                f"frame {_name(ds)}: terrace levelling needs at least {basis.n + n_lab + 1} "
                f"pixels on terraces, found {jy.size}")
        # the terrace pixels' rows of the design without its constant column (same numbers
        # as basis.at(jy, jx): basis_c's terms are (0, 0) followed by basis's)
        fit = _fit(phi_c[1:, sel[iy, ix]], h[jy, jx], labels[jy, jx], n_lab, robust=robust)
        d = fit.beta[basis.n:]
        pairs = _adjacent_pairs(labels, n_lab, reach)
        merge = [p for p in pairs if abs(d[p[0]] - d[p[1]]) < min_step_height_m]
        if not merge:
            break
        labels, n_lab = _merge(labels, n_lab, merge)
    # order terraces by height (label 0 = lowest)
    rank = np.argsort(d, kind="stable")
    inv = np.empty_like(rank)
    inv[rank] = np.arange(n_lab)
    labels = np.where(labels >= 0, inv[np.maximum(labels, 0)], -1)
    perm = np.concatenate([np.arange(basis.n), basis.n + rank])
    beta = fit.beta[perm]
    cov_all = fit.cov[np.ix_(perm, perm)]
    d = beta[basis.n:]
    pairs = _adjacent_pairs(labels, n_lab, reach)
    jy, jx = np.nonzero(labels >= 0)
    weights = np.zeros(h.shape)
    weights[jy, jx] = fit.weights  # fit order of pixels is unchanged by relabelling
    resid = np.zeros(h.shape)
    resid[jy, jx] = fit.resid
    inflate = _residual_correlation_factor(resid, weights > 0)
    cov_all = cov_all * inflate
    plane = basis.surface(beta[:basis.n])
    out_h = h - plane - d[0]
    # uncertainty of the subtracted plane + reference offset
    sub = np.r_[np.arange(basis.n), basis.n]
    csub = cov_all[np.ix_(sub, sub)]
    ones_u, ones_v = np.ones((basis.pu_t.shape[0], 1)), np.ones((basis.pv_t.shape[0], 1))
    var_sub = _grid_variance(np.concatenate([basis.pu_t, ones_u], axis=1),
                             np.concatenate([basis.pv_t, ones_v], axis=1), csub)
    # tilt and its uncertainty
    gx, gy = basis.slope_at_centre(beta[:basis.n], hx, hy)
    jac = np.zeros((2, basis.n))
    for t in range(basis.n):
        e = np.zeros(basis.n)
        e[t] = 1.0
        jac[:, t] = basis.slope_at_centre(e, hx, hy)
    ctilt = jac @ cov_all[:basis.n, :basis.n] @ jac.T
    residual_tilt = math.sqrt(max(float(np.trace(ctilt)), 0.0))
    # plain least-squares plane (order 1, all usable pixels) for comparison
    basis_p = _Basis(u, v, 1, constant=True)
    plain = _fit(phi_c if order == 1 else basis_p.at_t(iy, ix), z, robust=False,
                 need_scale=False)
    pgx, pgy = basis_p.slope_at_centre(plain.beta, hx, hy)
    new_flags = flags.copy()
    if robust:
        new_flags[(labels >= 0) & (weights == 0)] |= np.uint8(Flag.EXCLUDED)
    attrs: dict[str, Any] = {
        "n_terraces": int(n_lab),
        "terrace_offsets_m": (d - d[0]).astype(np.float64),
        "terrace_pixel_counts": np.bincount(labels[labels >= 0], minlength=n_lab).astype(
            np.int64),
        "terrace_fit_order": order,
        "terrace_fit_terms": _term_names(basis.terms) + "; u, v = x, y scaled to [-1, 1]",
        "terrace_fit_coefficients_m": beta[:basis.n].astype(np.float64),
        "tilt_x_rad": math.atan(gx),
        "tilt_y_rad": math.atan(gy),
        "residual_tilt_rad": residual_tilt,
        "plane_only_tilt_x_rad": math.atan(pgx),
        "plane_only_tilt_y_rad": math.atan(pgy),
    }
    levels = np.zeros(n_lab, dtype=np.int64)
    if n_lab >= 2:
        diffs = np.array([d[t] - d[s] for s, t in pairs]) if pairs else np.diff(d)
        h0, consistent = _unit_step(diffs, float(min_step_height_m))
        attrs["step_levels_consistent"] = int(consistent)
        if not consistent:
            warn.append("level_terraces: terrace height differences are not whole multiples "
                        "of one step; the smallest difference is used as the unit step")
        if math.isfinite(h0):
            levels = np.round((d - d[0]) / h0).astype(np.int64)
        if np.unique(levels).size >= 2:
            cov_d = cov_all[basis.n:, basis.n:]
            step, step_u, chi2 = _gls_step(d, cov_d, levels)
            # the same unit fitted to the plain plane's terrace means
            rp = h - basis_p.surface(plain.beta)
            sel = labels >= 0
            cnt = np.bincount(labels[sel], minlength=n_lab)
            means = np.bincount(labels[sel], weights=rp[sel], minlength=n_lab) / np.maximum(
                cnt, 1)
            xl = np.stack([np.ones(n_lab), levels.astype(float)], axis=1)
            pstep = float(np.linalg.lstsq(xl, means, rcond=None)[0][1])
            attrs.update({
                "step_height_m": step,
                "step_height_uncertainty_m": step_u,
                "step_height_chi2_reduced": chi2,
                "plane_only_step_height_m": pstep,
            })
            dev = d - levels * step
            worst = float(np.max(np.abs(dev - dev.mean()))) / abs(step) if step else math.inf
            if consistent and math.isfinite(chi2) and chi2 > STEP_CHI2_LIMIT and \
                    worst > STEP_MULTIPLE_TOLERANCE:
                attrs["step_levels_consistent"] = 0
                warn.append(f"level_terraces: the terrace levels miss whole multiples of the "
                            f"unit step by up to {100 * worst:.0f} % of it, {math.sqrt(chi2):.0f} "
                            "times their uncertainty (levels assigned to the wrong multiples)")
    attrs["terrace_levels"] = levels
    terrace_attrs = {
        "long_name": "terrace label",
        "description": "index into terrace_offsets_m and terrace_levels (0 = lowest terrace); "
        "-1 = not assigned (step edge, adsorbate, region smaller than min_terrace_px, "
        "unusable pixel)",
        "unassigned_value": np.int16(-1),
    }
    out = _copy_with(ds, height=out_h, flags=new_flags,
                     uncertainty=_add_variance(ds, var_sub),
                     extra={"terrace": (labels.astype(np.int16), terrace_attrs)}, attrs=attrs)
    for key in ("step_height_m", "step_height_uncertainty_m", "step_height_chi2_reduced",
                "plane_only_step_height_m", "step_levels_consistent"):
        if key not in attrs:
            out.attrs.pop(key, None)
    for w in warn:
        add_warning(out, w)
    _warn_if_constant(out, h, valid, "level_terraces")
    return out
