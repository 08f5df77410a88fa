"""Intra-frame drift correction, and the drift velocity of an up/down frame pair (private).

Public API in :mod:`pipeline.stages.drift`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import xarray as xr
from scipy import ndimage as ndi

from pipeline.errors import ProcessingError
from pipeline.model import Flag, add_warning, stage
from pipeline.stages.drift_frames import (
    MIN_OVERLAP_PX,
    PIXEL_SIZE_TOLERANCE,
    Geometry,
    affine_times,
    frame_geometry,
    frame_id,
    pixel_times,
    seconds_between,
    start_time,
    usable_pixels,
)
from pipeline.stages.drift_model import DriftModel, m_per_s_to_nm_per_min
from pipeline.stages.registration import register_images

__all__ = ["UpDownDrift", "correct_drift", "drift_from_up_down_pair"]

#: Fixed-point iterations for the nominal position of each corrected pixel (the contraction
#: factor is the drift during one line over the pixel size, far below 1e-2 in practice).
CORRECTION_ITERATIONS = 4

#: Fraction of a corrected frame brought in from outside the recorded area that earns a warning.
OUTSIDE_WARNING_FRACTION = 0.25


def _nearest_filled(values: np.ndarray, valid: np.ndarray) -> np.ndarray:
    if valid.all():
        return values
    if not valid.any():
        return np.zeros_like(values)
    idx = ndi.distance_transform_edt(~valid, return_distances=False, return_indices=True)
    return values[tuple(idx)]


@stage(version="1")
def correct_drift(
    ds: xr.Dataset,
    *,
    model: DriftModel,
    frame_t0_s: float,
    order: int = 1,
    reference: Literal["run-start", "frame-mid"] = "run-start",
) -> xr.Dataset:
    """Undo the drift within (and up to) one frame by resampling every pixel.

    Parameters
    ----------
    ds : xarray.Dataset
        A processed height frame (``height``, ``flags``, optional ``height_uncertainty`` and
        other (y, x) maps) with ``line_time_s``, ``scan_size_*`` and the optional placement
        attributes.
    model : DriftModel
        The run's drift ``d(t)`` (:func:`fit_drift_model`).
    frame_t0_s : float
        Start time of this frame, seconds since the run start (:func:`frame_times_s`).
    order : {1, 3}
        Interpolation order of the float maps (linear or cubic spline).
    reference : {"run-start", "frame-mid"}
        ``"run-start"``: the corrected frame shows the surface as it lay at the run start
        (absolute positions referenced to the run start; the whole frame moves by ``d(t)``).
        ``"frame-mid"``: only the drift relative to the frame's mean acquisition time is undone
        (shear and stretch), the frame stays where it was recorded at that time.

    Returns
    -------
    xarray.Dataset
        A new frame on the same grid and extent. Attributes ``drift_corrected`` (1, or 0 when
        the model is unusable), ``drift_shift_x_m`` / ``drift_shift_y_m`` (the correction
        applied at the frame's mean time, lab axes), ``drift_displacement_x_m`` / ``_y_``
        (the drift ``d`` at the frame's mean time relative to the run start, whatever the
        reference), ``drift_reference``,
        ``drift_frame_mid_time_s``, ``drift_velocity_x_m_per_s`` / ``_y_`` (at mid-time) and
        ``drift_outside_fraction``.

    Raises
    ------
    ProcessingError, MissingAttributeError
        For a frame without height or timing attributes, or a bad option.

    Notes
    -----
    The pixel at nominal ``r'`` recorded at ``t'`` shows the surface at ``r' + d(t')``, so the
    surface point of nominal position ``r`` (at the reference time ``t_ref``) is found where
    ``r' + d(t(r')) − d(t_ref) = r``. The per-pixel time ``t(r')`` is the frame start plus
    :func:`pipeline.model.pixel_time_s`, extended affinely between pixels (rows at
    ``line_time_s``, the forward trace along the fast axis). The equation is solved by
    fixed-point iteration from ``r' = r`` (:data:`CORRECTION_ITERATIONS` steps; each shrinks the
    error by the drift during one line over the pixel size) and the maps are interpolated there
    with :func:`scipy.ndimage.map_coordinates`. Non-finite heights are filled from their
    nearest neighbour before interpolating and the output stays non-finite wherever the nearest
    source pixel was; flags are taken from the nearest source pixel. Pixels whose source lies
    outside the recorded area (more than half a pixel beyond the edge pixel centres) are set to
    NaN and flagged :attr:`~pipeline.model.Flag.OUTSIDE`: the grid is never cropped (DESIGN.md
    §4). ``height_uncertainty`` is interpolated linearly and combined in quadrature with the
    height gradient times the model's position uncertainty at each pixel's time.
    """
    where = "correct_drift"
    if order not in (1, 3):
        raise ProcessingError(f"{where}: order = {order!r}; allowed 1 (linear) or 3 (cubic)")
    if reference not in ("run-start", "frame-mid"):
        raise ProcessingError(f"{where}: reference = {reference!r}; expected 'run-start' or "
                              "'frame-mid'")
    if not math.isfinite(float(frame_t0_s)):
        raise ProcessingError(f"{where}: frame_t0_s = {frame_t0_s!r} must be finite")
    g = frame_geometry(ds, where)
    tau = pixel_times(ds, where)
    t_mid = float(frame_t0_s) + float(tau.mean())
    out = ds.copy(deep=True)
    if not model.is_usable:
        out.attrs.update({"drift_corrected": 0, "drift_reference": reference,
                          "drift_shift_x_m": 0.0, "drift_shift_y_m": 0.0})
        add_warning(out, "drift not corrected: the drift model has no usable frame pairs")
        return out
    t_ref = 0.0 if reference == "run-start" else t_mid
    rx0, ry0 = (float(v) for v in model.position_m(t_ref))
    rows, cols = np.mgrid[0:g.ny, 0:g.nx].astype(np.float64)
    affine = affine_times(tau)

    def times_at(rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
        if affine is not None:
            t0, a, b = affine
            return float(frame_t0_s) + t0 + a * rr + b * cc
        return float(frame_t0_s) + ndi.map_coordinates(tau, [rr, cc], order=1, mode="nearest")

    rr, cc = rows, cols
    for _ in range(CORRECTION_ITERATIONS):
        lx, ly = model.position_m(times_at(rr, cc))
        ux, uy = g.to_scan(lx - rx0, ly - ry0)
        rr, cc = rows - uy / g.px_y, cols - ux / g.px_x
    t_src = times_at(rr, cc)
    outside = (rr < -0.5) | (rr > g.ny - 0.5) | (cc < -0.5) | (cc > g.nx - 0.5)
    near_r = np.clip(np.rint(rr), 0, g.ny - 1).astype(np.intp)
    near_c = np.clip(np.rint(cc), 0, g.nx - 1).astype(np.intp)
    coords = np.array([rr, cc])

    h = np.asarray(ds["height"].values, dtype=np.float64)
    valid = np.isfinite(h)
    h_new = ndi.map_coordinates(_nearest_filled(h, valid), coords, order=order, mode="nearest")
    bad = outside | ~valid[near_r, near_c]
    h_new[bad] = np.nan

    for name in list(ds.data_vars):
        v = ds[name]
        if v.dims != ("y", "x") or name in ("height", "height_uncertainty"):
            continue
        arr = np.asarray(v.values)
        if name == "flags":
            f = arr[near_r, near_c].astype(np.uint8)
            f[outside] = int(Flag.OUTSIDE)
            out[name] = (v.dims, f, dict(v.attrs))
        elif np.issubdtype(arr.dtype, np.floating):
            fv = np.isfinite(arr)
            res = ndi.map_coordinates(_nearest_filled(arr.astype(np.float64), fv), coords,
                                      order=order, mode="nearest")
            res[outside | ~fv[near_r, near_c]] = np.nan
            out[name] = (v.dims, res.astype(arr.dtype), dict(v.attrs))
        else:
            res = arr[near_r, near_c]
            out[name] = (v.dims, res, dict(v.attrs))
    if "flags" not in ds.data_vars:
        f = np.where(np.isfinite(h_new), 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
        f[outside] = int(Flag.OUTSIDE)
        out["flags"] = (("y", "x"), f, {"long_name": "pixel quality flags"})
    out["height"] = (("y", "x"), h_new.astype(ds["height"].dtype), dict(ds["height"].attrs))

    if "height_uncertainty" in ds.data_vars:
        u = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
        uv = np.isfinite(u)
        u_new = ndi.map_coordinates(_nearest_filled(u, uv), coords, order=1, mode="nearest")
        sx, sy = model.position_uncertainty_m(t_src, t_ref)
        sx, sy = np.nan_to_num(sx), np.nan_to_num(sy)
        hz = np.where(np.isfinite(h_new), h_new, np.nanmean(h_new) if np.any(~bad) else 0.0)
        gy, gx = np.gradient(hz, g.px_y, g.px_x) if min(g.ny, g.nx) > 1 else (0.0, 0.0)
        # the position uncertainty is given in lab axes; for a rotated scan use the larger
        sxs, sys_ = (sx, sy) if g.angle_rad == 0 else (np.maximum(sx, sy),) * 2
        u_tot = np.sqrt(u_new**2 + (gx * sxs) ** 2 + (gy * sys_) ** 2)
        u_tot[bad | ~uv[near_r, near_c]] = np.nan
        out["height_uncertainty"] = (("y", "x"), u_tot.astype(ds["height_uncertainty"].dtype),
                                     dict(ds["height_uncertainty"].attrs))

    mx, my = (float(v) for v in model.position_m(t_mid))
    vx, vy = (float(v) for v in model.velocity_m_per_s(t_mid))
    frac = float(outside.mean())
    out.attrs.update({
        "drift_corrected": 1,
        "drift_reference": reference,
        "drift_shift_x_m": mx - rx0,
        "drift_shift_y_m": my - ry0,
        "drift_displacement_x_m": mx,
        "drift_displacement_y_m": my,
        "drift_frame_t0_s": float(frame_t0_s),
        "drift_frame_mid_time_s": t_mid,
        "drift_velocity_x_m_per_s": vx,
        "drift_velocity_y_m_per_s": vy,
        "drift_outside_fraction": frac,
        "drift_model": model.kind,
    })
    if frac > OUTSIDE_WARNING_FRACTION:
        add_warning(out, f"drift correction brought {100 * frac:.0f}% of the frame in from "
                    f"outside the recorded area (shift {1e9 * (mx - rx0):.3g}, "
                    f"{1e9 * (my - ry0):.3g} nm at mid-frame, reference {reference}); those "
                    "pixels are flagged outside_recorded_area")
    return out


@dataclass(frozen=True)
class UpDownDrift:
    """Drift velocity from one frame pair of opposite slow directions (lab axes)."""

    velocity_x_m_per_s: float
    velocity_y_m_per_s: float
    uncertainty_x_m_per_s: float
    uncertainty_y_m_per_s: float
    confidence: float
    n_bands_used: int
    iterations: int
    warnings: tuple[str, ...] = ()

    @property
    def velocity_nm_per_min(self) -> tuple[float, float]:
        return (m_per_s_to_nm_per_min(self.velocity_x_m_per_s),
                m_per_s_to_nm_per_min(self.velocity_y_m_per_s))


def _band_shifts(up: xr.Dataset, down: xr.Dataset, n_bands: int, upsample_factor: int,
                 g: Geometry, min_confidence: float) -> tuple[np.ndarray, ...]:
    """Feature displacement up → down of horizontal bands (scan axes, m) and its uncertainty."""
    hu = np.asarray(up["height"].values, dtype=np.float64)
    hd = np.asarray(down["height"].values, dtype=np.float64)
    mu, md = usable_pixels(up), usable_pixels(down)
    whole = register_images(hu, hd, upsample_factor=upsample_factor, reference_mask=mu,
                            moving_mask=md)
    ky = round(whole.shift_y_px) if whole.confidence > 0 else 0
    kx = round(whole.shift_x_px) if whole.confidence > 0 else 0
    edges = np.linspace(0, g.ny, n_bands + 1).round().astype(int)
    c0, c1 = max(0, -kx), min(g.nx, g.nx - kx)
    out = []
    for b in range(n_bands):
        # rows of this band in "up" whose content lies inside "down" too
        lo, hi = max(int(edges[b]), -ky), min(int(edges[b + 1]), g.ny - ky)
        if hi - lo < MIN_OVERLAP_PX or c1 - c0 < MIN_OVERLAP_PX:
            out.append((math.nan,) * 4 + (0.5 * (edges[b] + edges[b + 1]), 0.0))
            continue
        su = (slice(lo, hi), slice(c0, c1))
        sd = (slice(lo + ky, hi + ky), slice(c0 + kx, c1 + kx))
        reg = register_images(hu[su], hd[sd], upsample_factor=upsample_factor,
                              reference_mask=mu[su], moving_mask=md[sd])
        out.append(((reg.shift_x_px + kx) * g.px_x, (reg.shift_y_px + ky) * g.px_y,
                    reg.uncertainty_x_px * g.px_x, reg.uncertainty_y_px * g.px_y,
                    0.5 * (lo + hi), reg.confidence))
    arr = np.array(out, dtype=float)
    keep = arr[:, 5] >= min_confidence
    return arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3], arr[:, 4], arr[:, 5], keep


def drift_from_up_down_pair(
    frame_up: xr.Dataset,
    frame_down: xr.Dataset,
    *,
    upsample_factor: int = 20,
    n_bands: int = 6,
    iterations: int = 4,
    min_confidence: float = 0.3,
    initial_velocity_m_per_s: tuple[float, float] = (0.0, 0.0),
) -> UpDownDrift:
    """Drift velocity from a frame and the next one of the same area scanned the other way.

    Parameters
    ----------
    frame_up, frame_down : xarray.Dataset
        Two processed frames of the same grid (pixel size, shape, angle) whose
        ``slow_direction`` differ; their order in time does not matter.
    upsample_factor : int
        Registration precision (1/upsample_factor pixel).
    n_bands : int
        Number of horizontal bands (slow-axis slices) registered separately (at least 3).
    iterations : int
        Rounds of "undo the current estimate, measure what is left".
    min_confidence : float
        Bands whose registration confidence is lower are not used.
    initial_velocity_m_per_s : (float, float)
        Starting estimate (e.g. from the run's drift model), lab axes.

    Returns
    -------
    UpDownDrift
        Velocity (lab axes) with standard uncertainties from the band regression.

    Notes
    -----
    In the two frames the same row is recorded at times that differ by
    ``Δt(row) = t_down(row) − t_up(row)``, which changes by twice the frame time from top to
    bottom. The feature displacement of band ``b`` between the frames is therefore
    ``s_b = c − v·Δt_b``: the constant ``c`` takes up whatever does not depend on the row
    (window moves, piezo hysteresis between the two scan directions), and the slope against
    ``Δt_b`` is the drift within one frame time — the opposite shear/stretch of the two
    frames. Each round corrects both frames with the current estimate (reference: their own
    mid-times) and fits the residual slope, so the band registrations converge on nearly
    undistorted images.
    """
    where = "drift_from_up_down_pair"
    gu, gd = frame_geometry(frame_up, where), frame_geometry(frame_down, where)
    if (gu.ny, gu.nx) != (gd.ny, gd.nx) or abs(gu.px_x / gd.px_x - 1) > PIXEL_SIZE_TOLERANCE \
            or abs(gu.px_y / gd.px_y - 1) > PIXEL_SIZE_TOLERANCE or gu.angle_rad != gd.angle_rad:
        raise ProcessingError(f"{where}: frames {frame_id(frame_up)} and {frame_id(frame_down)}"
                              " must have the same shape, pixel size and scan angle")
    su = frame_up.attrs.get("slow_direction", "increasing")
    sd = frame_down.attrs.get("slow_direction", "increasing")
    if su == sd:
        raise ProcessingError(f"{where}: frames {frame_id(frame_up)} and "
                              f"{frame_id(frame_down)} have the same slow_direction {su!r}; "
                              "an up/down pair needs opposite ones")
    if n_bands < 3:
        raise ProcessingError(f"{where}: n_bands = {n_bands}; at least 3 are needed")
    t_up0 = 0.0
    t_dn0 = seconds_between(start_time(frame_up, where), start_time(frame_down, where), where)
    tau_u, tau_d = pixel_times(frame_up, where), pixel_times(frame_down, where)
    cov = np.full((2,), math.inf)
    warnings: list[str] = []
    conf_used = 0.0
    n_used = 0
    done = 0
    v_scan = np.array(gu.to_scan(*initial_velocity_m_per_s), dtype=float)
    for it in range(max(1, iterations)):
        # the first round uses three tall bands: before any correction the two frames are
        # stretched against each other by twice the drift during one frame
        nb = 3 if it == 0 and not any(initial_velocity_m_per_s) else n_bands
        edges = np.linspace(0, gu.ny, nb + 1).round().astype(int)
        vx_lab, vy_lab = gu.to_lab(v_scan[0], v_scan[1])
        trial = DriftModel.constant(float(vx_lab), float(vy_lab))
        cu = correct_drift(frame_up, model=trial, frame_t0_s=t_up0, reference="frame-mid")
        cd = correct_drift(frame_down, model=trial, frame_t0_s=t_dn0, reference="frame-mid")
        sx, sy, ex, ey, _rows, conf, keep = _band_shifts(cu, cd, nb, upsample_factor, gu,
                                                           min_confidence)
        # time difference of each band's rows, taken at the rows the band occupies in "up"
        dt_b = np.array([
            float((t_dn0 + tau_d[int(edges[b]):int(edges[b + 1])]).mean()
                  - (t_up0 + tau_u[int(edges[b]):int(edges[b + 1])]).mean())
            for b in range(nb)])
        keep &= np.isfinite(sx) & np.isfinite(sy) & np.isfinite(ex) & np.isfinite(ey)
        n_used = int(keep.sum())
        done += 1
        if n_used < 3:
            warnings.append(f"only {n_used} of {nb} bands registered with confidence >= "
                            f"{min_confidence}; no velocity")
            return UpDownDrift(math.nan, math.nan, math.inf, math.inf, 0.0, n_used, done,
                               tuple(warnings))
        step = np.zeros(2)
        cov = np.zeros(2)
        design = np.column_stack([np.ones(n_used), -dt_b[keep]])
        for axis, (s, e) in enumerate(((sx, ex), (sy, ey))):
            w = 1.0 / e[keep]
            coef, *_ = np.linalg.lstsq(design * w[:, None], s[keep] * w, rcond=None)
            c = np.linalg.inv((design * w[:, None]).T @ (design * w[:, None]))
            res = (s[keep] - design @ coef) * w
            chi2 = float(np.sum(res**2) / (n_used - 2)) if n_used > 2 else 1.0
            step[axis] = coef[1]
            cov[axis] = c[1, 1] * max(1.0, chi2)
        v_scan = v_scan + step
        conf_used = float(np.mean(conf[keep]))
        if np.all(np.abs(step) <= 0.1 * np.sqrt(cov)):
            break
    vx_lab, vy_lab = gu.to_lab(v_scan[0], v_scan[1])
    ux, uy = math.sqrt(cov[0]), math.sqrt(cov[1])
    if gu.angle_rad != 0:
        ux = uy = max(ux, uy)
    return UpDownDrift(float(vx_lab), float(vy_lab), ux, uy, conf_used, n_used, done,
                       tuple(warnings))
