"""Plane / polynomial background of a frame."""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import Flag, stage
from pipeline.stages.level.frame import (
    _add_variance,
    _coords,
    _copy_with,
    _inputs,
    _name,
    _require,
    _warn_if_constant,
)
from pipeline.stages.level.robust import _Basis, _fit, _term_names, _terms


@stage(version="1")
def subtract_background(
    ds: xr.Dataset,
    *,
    method: Literal["plane", "polynomial", "none"] = "plane",
    order: int = 2,
    robust: bool = True,
) -> xr.Dataset:
    """Subtract a least-squares plane or polynomial surface in x and y.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``; coordinates ``x``, ``y`` in m).
    method : {"plane", "polynomial", "none"}
        Background model. ``"none"`` returns an unchanged copy (with the choice recorded).
    order : int
        Total degree of the polynomial (1-8) when ``method="polynomial"``; a plane is order 1.
    robust : bool
        Iteratively reweighted fit, so that adsorbates, other terraces and outliers do not tilt
        the background. Pixels the robust fit rejects (weight 0) are flagged ``EXCLUDED``.

    Returns
    -------
    xarray.Dataset
        New frame with the whole fitted surface (constant included) subtracted. Attributes:
        ``background_method``, ``background_order``, ``background_terms`` (the basis),
        ``background_coefficients_m``, ``background_tilt_x_rad``, ``background_tilt_y_rad``
        (slope of the removed surface at the frame centre, ``atan(dh/dx)``),
        ``background_excluded_fraction``, ``background_residual_rms_m`` (robust).

    Raises
    ------
    ProcessingError
        Unknown method or order, or fewer usable pixels than the model has terms.

    Notes
    -----
    The model is a sum of Legendre products P_i(u) P_j(v), i + j <= order, on coordinates
    normalised to [-1, 1]; this basis keeps the normal equations well conditioned up to order 8
    (a plane is the same as in monomials). The robust fit is iteratively reweighted least
    squares [1]_: three Huber steps from the ordinary solution, then Tukey's biweight [2]_ with
    the residual MAD as scale, so points more than about 4.7 robust standard deviations away
    get zero weight. On a frame with several terraces the robust plane locks on to the largest
    terrace; an unbiased common plane across terraces is :func:`level_terraces`' job. The
    uncertainty map grows by the variance of the fitted surface at each pixel.

    References
    ----------
    .. [1] P. W. Holland, R. E. Welsch, "Robust regression using iteratively reweighted
       least-squares", Commun. Stat. Theory Methods 6, 813 (1977).
       DOI 10.1080/03610927708827533
    .. [2] A. E. Beaton, J. W. Tukey, "The fitting of power series, meaning polynomials,
       illustrated on band-spectroscopic data", Technometrics 16, 147 (1974).
       DOI 10.1080/00401706.1974.10489171
    """
    if method not in ("plane", "polynomial", "none"):
        raise ProcessingError(f"frame {_name(ds)}: background method {method!r} is not one of "
                              "'plane', 'polynomial', 'none'")
    if method == "none":
        out = ds.copy()
        out.attrs = {**ds.attrs, "background_method": "none"}
        return out
    if method == "plane":
        order = 1
    if isinstance(order, bool) or not isinstance(order, int | np.integer) or not 1 <= order <= 8:
        raise ProcessingError(f"frame {_name(ds)}: polynomial order {order!r} must be an "
                              "integer from 1 to 8")
    order = int(order)
    h, flags, valid = _inputs(ds, "subtract_background")
    basis_check = _terms(order, constant=True)
    _require(ds, valid, len(basis_check) + 1, f"a {method} fit of order {order}")
    u, v, hx, hy, _, _ = _coords(ds)
    basis = _Basis(u, v, order, constant=True)
    iy, ix = np.nonzero(valid)
    fit = _fit(basis.at_t(iy, ix), h[iy, ix], robust=robust,
               grid=basis if iy.size == h.size else None)
    surf = basis.surface(fit.beta)
    new_flags = flags.copy()
    rejected = np.zeros_like(valid)
    if robust:
        rejected[iy, ix] = fit.weights == 0
        new_flags[rejected] |= np.uint8(Flag.EXCLUDED)
    gx, gy = basis.slope_at_centre(fit.beta, hx, hy)
    attrs = {
        "background_method": method,
        "background_order": order,
        "background_terms": _term_names(basis.terms) + "; u, v = x, y scaled to [-1, 1]",
        "background_coefficients_m": fit.beta.astype(np.float64),
        "background_tilt_x_rad": math.atan(gx),
        "background_tilt_y_rad": math.atan(gy),
        "background_excluded_fraction": float(rejected.sum() / max(valid.sum(), 1)),
        "background_residual_rms_m": float(fit.scale),
    }
    out = _copy_with(ds, height=h - surf, flags=new_flags,
                     uncertainty=_add_variance(ds, basis.variance(fit.cov)), attrs=attrs)
    _warn_if_constant(out, h, valid, "subtract_background")
    return out
