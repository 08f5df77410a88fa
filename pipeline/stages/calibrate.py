"""Calibration: z scale from known step heights, and applying scale factors to a frame.

- :func:`z_scale_from_steps` (run level, pure function) combines the step heights that
  :func:`pipeline.stages.level.level_terraces` measured on a run's frames into one z scale
  factor (:func:`step_consensus` and :func:`step_disagreement` say which frames agree);
  :func:`scale_height` (stage) applies a factor to a frame.
- :func:`scale_lateral` (stage) applies the lateral scale factors that
  :func:`pipeline.stages.lattice.measure_lattice` measures on atomically resolved frames.

Conventions: a scale factor is *true length / nominal length*; multiplying the nominal
coordinates (heights) by it gives calibrated ones.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import xarray as xr
from numpy.typing import ArrayLike

from pipeline.errors import ProcessingError
from pipeline.model import stage

__all__ = [
    "scale_height",
    "scale_lateral",
    "step_consensus",
    "step_disagreement",
    "z_scale_from_steps",
]

_MAD_TO_SIGMA = 1.482602218505602

#: Height-valued attributes (m) of a processed frame (height, levelling, quality stages);
#: :func:`scale_height` scales them with the map.
_HEIGHT_ATTRS = (
    "step_height_m", "plane_only_step_height_m", "terrace_offsets_m", "line_offsets_m",
    "line_step_heights_m", "line_offset_rms_m", "background_coefficients_m",
    "terrace_fit_coefficients_m", "background_residual_rms_m", "scar_threshold_m",
    "tip_jumps_m", "height_noise_m", "mean_height_before_levelling_m",
    "Sa_m", "Sq_m", "Sp_m", "Sv_m", "Sz_m",
)
#: Height-valued attributes with their standard uncertainty attribute (same shape).
_HEIGHT_UNCERTAINTIES = (("step_height_m", "step_height_uncertainty_m"),
                         ("tip_jumps_m", "tip_jump_uncertainties_m"))
#: Tilt attributes (rad, atan of a slope along x or y) written by the levelling stages.
_TILT_X = ("tilt_x_rad", "background_tilt_x_rad", "plane_only_tilt_x_rad")
_TILT_Y = ("tilt_y_rad", "background_tilt_y_rad", "plane_only_tilt_y_rad")
#: Slopes along x (height per length, one per line) written by line levelling.
_SLOPES_X = ("line_slopes",)
#: Lateral lengths (m) and velocities (m/s) along x and y; :func:`scale_lateral` scales them.
_LATERAL_X = ("scan_size_x_m", "scan_center_x_m", "drift_displacement_x_m", "drift_shift_x_m",
              "drift_velocity_x_m_per_s")
_LATERAL_Y = ("scan_size_y_m", "scan_center_y_m", "drift_displacement_y_m", "drift_shift_y_m",
              "drift_velocity_y_m_per_s")


def _name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def _positive(value: float, what: str, where: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ProcessingError(f"{where}: {what} = {value!r} is not a number") from None
    if not (math.isfinite(v) and v > 0):
        raise ProcessingError(f"{where}: {what} = {value!r} must be a positive finite number")
    return v


# --------------------------------------------------------------------------------------------
# z scale
# --------------------------------------------------------------------------------------------


def step_consensus(step_heights_m: ArrayLike, uncertainties_m: ArrayLike) -> tuple[float, float]:
    """The unit step a run's frames agree on, and how much they scatter about it.

    Parameters
    ----------
    step_heights_m, uncertainties_m : array_like
        Finite unit step heights of the frames (m) and their positive standard uncertainties.

    Returns
    -------
    step_m, scatter_m : float
        Weighted median (weights 1/u², the lower one at an exact half) and the robust scatter
        of the heights about it (1.4826 × median absolute deviation [1]_), m.

    References
    ----------
    .. [1] P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273 (1993).
       DOI 10.1080/01621459.1993.10476408
    """
    h = np.asarray(step_heights_m, dtype=np.float64).ravel()
    u = np.asarray(uncertainties_m, dtype=np.float64).ravel()
    if h.size == 0 or h.shape != u.shape:
        raise ProcessingError(f"step consensus: {h.size} step heights and {u.size} "
                              "uncertainties (need the same number, at least one)")
    order = np.argsort(h)
    cw = np.cumsum(1 / u[order] ** 2)
    wmed = float(h[order][np.searchsorted(cw, 0.5 * cw[-1])])
    return wmed, _MAD_TO_SIGMA * float(np.median(np.abs(h - wmed)))


#: A frame's unit step off the run's by more than this fraction (as well as beyond its
#: uncertainty) disagrees: 2 %, the tolerance of a staircase's whole multiples.
STEP_RUN_TOLERANCE = 0.02


def step_disagreement(step_m: float, uncertainty_m: float, run_step_m: float,
                      run_scatter_m: float, threshold_sigma: float) -> tuple[bool, float]:
    """Whether one frame's unit step disagrees with the run's, and by how many σ.

    The σ is that of the difference with the frame's own uncertainty and the run's scatter
    combined, ``|s − m| / sqrt(u² + S²)`` (inf when both are 0). The frame disagrees when it
    exceeds ``threshold_sigma`` and the step is also more than :data:`STEP_RUN_TOLERANCE` off
    (``|s/m − 1|``): a deviation far beyond the noise but below 2 % is a calibration detail,
    not a wrong step.
    """
    diff = abs(step_m - run_step_m)
    sd = math.hypot(uncertainty_m, run_scatter_m)
    sigma = diff / sd if sd > 0 else (math.inf if diff else 0.0)
    return bool(sigma > threshold_sigma and diff > STEP_RUN_TOLERANCE * run_step_m), sigma


def z_scale_from_steps(
    step_heights_m: ArrayLike,
    uncertainties_m: ArrayLike,
    *,
    known_step_height_m: float,
    outlier_threshold_sigma: float | None = 5.0,
) -> tuple[float, float]:
    """z scale factor that makes a run's measured step heights equal a known step height.

    Parameters
    ----------
    step_heights_m : array_like
        Measured unit (monatomic) step heights, one per frame (m). Non-finite entries (frames
        without steps) are ignored.
    uncertainties_m : array_like
        Their standard uncertainties (m), same shape; must be positive where the height is
        finite.
    known_step_height_m : float
        True step height (m), e.g. a/sqrt(3) for an fcc(111) surface of cubic lattice
        constant a.
    outlier_threshold_sigma : float or None
        Heights further than this many combined standard deviations (own uncertainty and the
        robust scatter of the set) from the weighted median are left out; ``None`` keeps all.

    Returns
    -------
    scale, scale_uncertainty : float
        ``known / mean`` and its standard uncertainty.

    Raises
    ------
    ProcessingError
        No usable step height, mismatching shapes, non-positive uncertainties or known height.

    Notes
    -----
    The mean is the inverse-variance weighted mean; its uncertainty sqrt(1/sum w) is inflated
    by the Birge ratio sqrt(chi^2/(n-1)) when the heights scatter more than their
    uncertainties allow [1]_, and propagated to the ratio to first order
    (u_scale = scale * u_mean / mean).

    References
    ----------
    .. [1] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932). DOI 10.1103/PhysRev.40.207
    """
    where = "z scale from steps"
    known = _positive(known_step_height_m, "known_step_height_m", where)
    h = np.asarray(step_heights_m, dtype=np.float64).ravel()
    u = np.asarray(uncertainties_m, dtype=np.float64).ravel()
    if h.shape != u.shape:
        raise ProcessingError(f"{where}: {h.size} step heights but {u.size} uncertainties")
    use = np.isfinite(h)
    bad_u = use & ~(np.isfinite(u) & (u > 0))
    if bad_u.any():
        raise ProcessingError(f"{where}: uncertainties must be positive and finite; got "
                              f"{u[bad_u][:3].tolist()} for step heights {h[bad_u][:3].tolist()}")
    if not np.any(use & (h > 0)):
        raise ProcessingError(f"{where}: no usable step height (need at least one positive "
                              f"finite value, got {h[:5].tolist()})")
    use &= h > 0
    h, u = h[use], u[use]
    if outlier_threshold_sigma is not None and h.size >= 3:
        wmed, spread = step_consensus(h, u)
        keep = np.abs(h - wmed) <= outlier_threshold_sigma * np.sqrt(u**2 + spread**2)
        h, u = h[keep], u[keep]
    w = 1.0 / u**2
    mean = float(np.sum(w * h) / np.sum(w))
    u_mean = math.sqrt(1.0 / float(np.sum(w)))
    if h.size > 1:
        chi2 = float(np.sum(w * (h - mean) ** 2)) / (h.size - 1)
        if chi2 > 1:
            u_mean *= math.sqrt(chi2)
    scale = known / mean
    return scale, scale * u_mean / mean


def _like(old: Any, new: np.ndarray) -> Any:
    """``new`` as a float when ``old`` was a scalar, else as an array."""
    return float(new) if np.ndim(old) == 0 else new


def _rescale_tilts(attrs: dict[str, Any], fx: float, fy: float) -> None:
    """Tilts and slopes after multiplying every slope along x by ``fx``, along y by ``fy``."""
    for keys, f in ((_TILT_X, fx), (_TILT_Y, fy)):
        for k in keys:
            if k in attrs:
                attrs[k] = math.atan(f * math.tan(float(attrs[k])))
    for k in _SLOPES_X:
        if k in attrs:
            attrs[k] = _like(attrs[k], np.asarray(attrs[k], dtype=np.float64) * fx)
    if "residual_tilt_rad" in attrs:
        attrs["residual_tilt_rad"] = float(attrs["residual_tilt_rad"]) * max(abs(fx), abs(fy))


@stage(version="2")
def scale_height(ds: xr.Dataset, *, factor: float,
                 factor_uncertainty: float = 0.0) -> xr.Dataset:
    """Multiply a frame's heights (and its height-valued attributes) by a z scale factor.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame.
    factor : float
        z scale factor (true / nominal), e.g. from :func:`z_scale_from_steps`.
    factor_uncertainty : float
        Standard uncertainty of ``factor``.

    Returns
    -------
    xarray.Dataset
        New frame: ``height`` times ``factor``; ``height_uncertainty`` = sqrt((f u)^2 +
        (h u_f)^2) with h measured from the frame's own zero (after
        :func:`~pipeline.stages.level.level_terraces`, the lowest terrace); every
        height-valued attribute scaled likewise (:data:`_HEIGHT_ATTRS`: step heights, terrace
        offsets, line offsets, tip-change jumps, the noise, the ISO 25178-2 heights ``Sq_m``
        and the others), ``step_height_uncertainty_m`` and ``tip_jump_uncertainties_m`` with
        the same propagation, the tilts as atan(f tan t) and the line slopes times f; attrs
        ``z_scale_factor`` and ``z_scale_factor_uncertainty`` (cumulative when scaled
        twice).

    Raises
    ------
    ProcessingError
        A factor that is not positive and finite, or a negative uncertainty.
    """
    f = _positive(factor, "factor", f"frame {_name(ds)}: scale_height")
    uf = float(factor_uncertainty)
    if not (math.isfinite(uf) and uf >= 0):
        raise ProcessingError(f"frame {_name(ds)}: scale_height factor_uncertainty = "
                              f"{factor_uncertainty!r} must be >= 0 and finite")
    if "height" not in ds.data_vars:
        raise ProcessingError(f"frame {_name(ds)}: scale_height needs a variable 'height'")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    out = ds.copy()
    attrs = dict(ds.attrs)
    out["height"] = (ds["height"].dims, (f * h).astype(np.float32), dict(ds["height"].attrs))
    if "height_uncertainty" in ds:
        u = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
        hz = np.where(np.isfinite(h), h, 0.0)
        out["height_uncertainty"] = (ds["height_uncertainty"].dims,
                                     np.sqrt((f * u) ** 2 + (hz * uf) ** 2).astype(np.float32),
                                     dict(ds["height_uncertainty"].attrs))
    for k, ku in _HEIGHT_UNCERTAINTIES:  # GUM first order, from the unscaled values
        if k in attrs and ku in attrs:
            v, uv = (np.asarray(attrs[key], dtype=np.float64) for key in (k, ku))
            attrs[ku] = _like(attrs[ku], np.hypot(f * uv, v * uf))
    for k in _HEIGHT_ATTRS:
        if k in attrs:
            attrs[k] = _like(attrs[k], np.asarray(attrs[k], dtype=np.float64) * f)
    _rescale_tilts(attrs, f, f)
    f0 = float(attrs.get("z_scale_factor", 1.0))
    u0 = float(attrs.get("z_scale_factor_uncertainty", 0.0))
    attrs["z_scale_factor"] = f0 * f
    attrs["z_scale_factor_uncertainty"] = f0 * f * math.hypot(u0 / f0, uf / f)
    out.attrs = attrs
    return out


# --------------------------------------------------------------------------------------------
# lateral scale
# --------------------------------------------------------------------------------------------


@stage(version="2")
def scale_lateral(ds: xr.Dataset, *, scale_x: float, scale_y: float) -> xr.Dataset:
    """Rescale a frame's coordinates and scan size by lateral scale factors.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame with coordinates ``x``, ``y`` (m).
    scale_x, scale_y : float
        True / nominal length along x and y (e.g.
        :attr:`pipeline.stages.lattice.LatticeCalibration.scale_x`).

    Returns
    -------
    xarray.Dataset
        New frame with ``x``, ``y``, ``scan_size_*_m`` and ``scan_center_*_m`` multiplied by the
        factors (so the pixel-centre formula of the raw contract still holds), likewise the
        frame's drift displacement, shift and velocity (:data:`_LATERAL_X`,
        :data:`_LATERAL_Y`), the tilt attributes of the levelling stages and the line slopes
        adjusted to the new slopes, and cumulative attrs
        ``lateral_scale_x``, ``lateral_scale_y``. Skew is not resampled here (it would need an
        interpolation of the map); it is reported by
        :func:`pipeline.stages.lattice.measure_lattice`.

    Raises
    ------
    ProcessingError
        A factor that is not positive and finite.
    """
    where = f"frame {_name(ds)}: scale_lateral"
    sx = _positive(scale_x, "scale_x", where)
    sy = _positive(scale_y, "scale_y", where)
    out = ds.copy()
    for c, s in (("x", sx), ("y", sy)):
        if c in ds.coords:
            out = out.assign_coords({c: (c, np.asarray(ds[c].values) * s, dict(ds[c].attrs))})
    attrs = dict(ds.attrs)
    for keys, s in ((_LATERAL_X, sx), (_LATERAL_Y, sy)):
        for key in keys:
            if key in attrs:
                attrs[key] = float(attrs[key]) * s
    _rescale_tilts(attrs, 1.0 / sx, 1.0 / sy)
    attrs["lateral_scale_x"] = float(attrs.get("lateral_scale_x", 1.0)) * sx
    attrs["lateral_scale_y"] = float(attrs.get("lateral_scale_y", 1.0)) * sy
    out.attrs = attrs
    return out
