"""Frame quality: areal roughness parameters, tip-change flags, status and warnings.

The last stage of a frame: it summarises the flags the earlier stages set, adds the
``TIP_CHANGE`` flags, computes the ISO 25178-2 height parameters and decides the frame's
``status`` (``"ok"`` or ``"flagged"``) with a human-readable warning for every reason.
"""

from __future__ import annotations

import json
import math

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import (
    BAD_PIXELS,
    Flag,
    add_warning,
    flag_attrs,
    get_tip_change_rows,
    get_warnings,
    replace_maps,
    stage,
)
from pipeline.stages.calibrate import step_disagreement
from pipeline.stages.tip_changes import detect_tip_changes, valid_height

__all__ = ["areal_parameters", "assess_quality", "compare_step_with_run", "flag_tip_changes"]

# --------------------------------------------------------------------------------------------
# areal parameters
# --------------------------------------------------------------------------------------------


def areal_parameters(height: np.ndarray, *, mask: np.ndarray | None = None) -> dict[str, float]:
    """ISO 25178-2 height parameters of a height map.

    Parameters
    ----------
    height : numpy.ndarray
        Height map in m; non-finite pixels are ignored. The caller levels it first (plane or
        terraces removed as wanted): the parameters are taken about the mean of what is given.
    mask : numpy.ndarray of bool, optional
        ``True`` for pixels to leave out.

    Returns
    -------
    dict
        ``Sq_m`` (root-mean-square height), ``Sa_m`` (arithmetic mean height), ``Ssk``
        (skewness), ``Sku`` (kurtosis), ``Sp_m`` (maximum peak height), ``Sv_m`` (maximum pit
        depth, positive), ``Sz_m = Sp_m + Sv_m`` (maximum height). ``Ssk`` and ``Sku`` are NaN
        for a flat map (``Sq = 0``), where they are undefined.

    Raises
    ------
    ProcessingError
        No usable pixel.

    Notes
    -----
    Discrete forms of the ISO definitions over the ``n`` valid pixels with ``z`` the heights
    minus their mean: ``Sq = √(Σz²/n)``, ``Sa = Σ|z|/n``, ``Ssk = Σz³/(n·Sq³)``,
    ``Sku = Σz⁴/(n·Sq⁴)``, ``Sp = max z``, ``Sv = |min z|``. No filtering (S-filter, L-operator)
    is applied: the scale limitation is the caller's levelling.

    References
    ----------
    ISO 25178-2:2012, *Geometrical product specifications (GPS) — Surface texture: Areal —
    Part 2: Terms, definitions and surface texture parameters*, §4.1.
    """
    h = np.asarray(height, dtype=np.float64)
    ok = np.isfinite(h)
    if mask is not None:
        ok &= ~np.asarray(mask, dtype=bool)
    if not ok.any():
        raise ProcessingError("areal parameters: no valid pixel (all non-finite or masked)")
    v = h[ok]
    z = v - v.mean() if np.ptp(v) > 0 else np.zeros_like(v)  # no rounding noise if flat
    sq = float(np.sqrt(np.mean(z * z)))
    sa = float(np.mean(np.abs(z)))
    if sq > 0:
        z2 = z * z  # products, not z**3 / z**4 (a generic power is ~50x slower per pixel)
        ssk = float(np.mean(z2 * z) / sq**3)
        sku = float(np.mean(z2 * z2) / sq**4)
    else:
        ssk = sku = math.nan
    sp = float(z.max())
    sv = float(-z.min())
    return {"Sq_m": sq, "Sa_m": sa, "Ssk": ssk, "Sku": sku, "Sp_m": sp, "Sv_m": sv,
            "Sz_m": sp + sv}


# --------------------------------------------------------------------------------------------
# the stage
# --------------------------------------------------------------------------------------------


@stage(version="2")
def flag_tip_changes(ds: xr.Dataset, *, threshold_sigma: float = 8.0) -> xr.Dataset:
    """Find tip changes (:func:`detect_tip_changes`) and flag their lines ``TIP_CHANGE``.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame, before line levelling (which would remove the height jumps).
    threshold_sigma : float
        Threshold of :func:`detect_tip_changes`.

    Returns
    -------
    xarray.Dataset
        Copy with the flags set and the attr ``tip_change_rows`` (JSON list), which
        :func:`assess_quality` later reports instead of detecting again.
    """
    rows = detect_tip_changes(ds, threshold_sigma=threshold_sigma)
    flags = _flags_of(ds)
    if rows:
        flags[rows, :] |= np.uint8(Flag.TIP_CHANGE)
    out = _with_flags(ds, flags)
    out.attrs["tip_change_rows"] = json.dumps(rows)
    return out


def _flags_of(ds: xr.Dataset) -> np.ndarray:
    """The frame's flags (NOT_RECORDED added on non-finite heights), as a new uint8 array."""
    h = np.asarray(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        flags = np.asarray(ds["flags"].values).astype(np.uint8)
    else:
        flags = np.zeros(h.shape, np.uint8)
    flags[~np.isfinite(h)] |= np.uint8(Flag.NOT_RECORDED)
    return flags


def _with_flags(ds: xr.Dataset, flags: np.ndarray) -> xr.Dataset:
    if "flags" in ds.data_vars:
        out = replace_maps(ds, flags=flags)
    else:
        out = ds.copy()
        out["flags"] = (("y", "x"), flags, flag_attrs())
    out.attrs = dict(ds.attrs)
    return out


@stage(version="3")
def assess_quality(
    ds: xr.Dataset,
    *,
    tip_change_threshold_sigma: float = 8.0,
    bad_pixel_fraction_limit: float = 0.01,
    trace_mismatch_fraction_limit: float = 0.02,
) -> xr.Dataset:
    """Flag tip changes, compute roughness, and set the frame's status with its reasons.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height``, ``flags``), ideally levelled.
    tip_change_threshold_sigma : float
        Threshold of :func:`detect_tip_changes`.
    bad_pixel_fraction_limit : float
        The frame is flagged when more than this fraction of its pixels is unusable
        (:data:`pipeline.model.BAD_PIXELS`).
    trace_mismatch_fraction_limit : float
        The frame is flagged when more than this fraction of its pixels has disagreeing
        forward and backward traces.

    Returns
    -------
    xarray.Dataset
        Copy with ``TIP_CHANGE`` set on the first line after each tip change (the rows of an
        earlier :func:`flag_tip_changes` when its ``tip_change_rows`` attr is present, since
        line levelling removes height jumps; detected here otherwise); attrs ``Sq_m``,
        ``Sa_m``, ``Ssk``, ``Sku``, ``Sp_m``, ``Sv_m``, ``Sz_m`` (NaN when undefined),
        ``bad_pixel_fraction``, ``tip_change_rows`` (JSON list), ``status`` and ``warnings``.

    Notes
    -----
    ``status`` is ``"flagged"`` when any of these holds, each with its own warning: some
    pixels were not recorded (DESIGN.md §3: a frame with missing data is always flagged),
    more than ``bad_pixel_fraction_limit`` of the pixels are unusable, a tip change was found,
    more than ``trace_mismatch_fraction_limit`` of the pixels have mismatching traces, the
    terrace levels are not whole multiples of one step (``step_levels_consistent = 0`` from
    :func:`pipeline.stages.level.level_terraces`), no pixel is usable, or the height is the
    same everywhere. Otherwise ``"ok"`` (earlier
    warnings are kept, and may be informational). The areal parameters use every usable pixel
    (adsorbates left out of background fits included: they are topography).
    """
    frame = str(ds.attrs.get("frame_id", "<frame>"))
    for name, val in (("bad_pixel_fraction_limit", bad_pixel_fraction_limit),
                      ("trace_mismatch_fraction_limit", trace_mismatch_fraction_limit)):
        if not (math.isfinite(val) and 0 <= val <= 1):
            raise ProcessingError(f"frame {frame}: {name} = {val!r} must be within [0, 1]")
    h = valid_height(ds)
    flags = _flags_of(ds)
    reasons: list[str] = []

    not_rec = (flags & np.uint8(Flag.NOT_RECORDED)) != 0
    lost_lines = int(np.all(not_rec, axis=1).sum())
    if not_rec.any():
        reasons.append(f"{int(not_rec.sum())} pixel(s) ({100 * not_rec.mean():.1f}%) not "
                       "recorded" + (f", {lost_lines} whole line(s)" if lost_lines else ""))
    bad = (flags & np.uint8(BAD_PIXELS)) != 0
    bad_frac = float(bad.mean())
    if bad_frac > bad_pixel_fraction_limit:
        parts = [f"{int(((flags & np.uint8(f)) != 0).sum())} {label}" for f, label in (
            (Flag.NOT_RECORDED, "not recorded"), (Flag.SATURATED, "saturated"),
            (Flag.NOISE_FLOOR, "below the noise floor"), (Flag.OUTSIDE, "outside the recorded "
                                                          "area"))]
        reasons.append(f"{100 * bad_frac:.1f}% of pixels unusable (limit "
                       f"{100 * bad_pixel_fraction_limit:g}%): " + ", ".join(parts))
    mism = float(((flags & np.uint8(Flag.TRACE_MISMATCH)) != 0).mean())
    if mism > trace_mismatch_fraction_limit:
        reasons.append(f"forward and backward traces disagree on {100 * mism:.1f}% of pixels "
                       f"(limit {100 * trace_mismatch_fraction_limit:g}%)")

    tip_rows: list[int] = []
    if np.isfinite(h).any():
        recorded = get_tip_change_rows(ds)  # found by flag_tip_changes before levelling
        tip_rows = recorded if recorded is not None else detect_tip_changes(
            ds, threshold_sigma=tip_change_threshold_sigma)
        if tip_rows:
            flags[tip_rows, :] |= np.uint8(Flag.TIP_CHANGE)
            reasons.append(f"tip change at line(s) {', '.join(map(str, tip_rows))}")
        if ds.attrs.get("step_levels_consistent") == 0:
            reasons.append("terrace height differences are not whole multiples of one step "
                           "(a tip change that was not detected, or steps of different kinds): "
                           "the step height is unreliable")
        params = areal_parameters(h)
        if params["Sq_m"] == 0:
            reasons.append("height is the same at every usable pixel (Sq = 0): no topography "
                           "recorded")
    else:
        params = dict.fromkeys(("Sq_m", "Sa_m", "Ssk", "Sku", "Sp_m", "Sv_m", "Sz_m"), math.nan)
        reasons.append("no usable pixel: every pixel is not recorded or flagged unusable")

    out = _with_flags(ds, flags)
    out.attrs.update(params)
    out.attrs["bad_pixel_fraction"] = bad_frac
    out.attrs["tip_change_rows"] = json.dumps(tip_rows)
    out.attrs["warnings"] = json.dumps(get_warnings(ds))
    for msg in reasons:
        add_warning(out, msg)
    out.attrs["status"] = "flagged" if reasons else "ok"
    return out


@stage(version="1")
def compare_step_with_run(ds: xr.Dataset, *, run_step_m: float, run_scatter_m: float,
                          threshold_sigma: float = 5.0) -> xr.Dataset:
    """Flag a frame whose unit step disagrees with the one the run's frames agree on.

    Parameters
    ----------
    ds : xarray.Dataset
        Levelled frame (``step_height_m``, ``step_height_uncertainty_m`` from
        :func:`pipeline.stages.level.level_terraces`; a frame without them is returned
        unchanged but for the attribute below).
    run_step_m, run_scatter_m : float
        The run's unit step and the scatter of its frames about it
        (:func:`pipeline.stages.calibrate.step_consensus`), m.
    threshold_sigma : float
        The frame disagrees when its step is further than this many standard deviations (its
        own uncertainty and the run's scatter combined) and more than
        :data:`pipeline.stages.calibrate.STEP_RUN_TOLERANCE` from the run's.

    Returns
    -------
    xarray.Dataset
        Copy with attr ``step_run_deviation_sigma`` (NaN without a step); a disagreeing frame
        is ``"flagged"`` with a warning that gives both steps and their ratio.

    Notes
    -----
    Within one frame a tip change too small to be detected can leave a staircase of whole
    multiples of the wrong unit (an 80 pm jump beside 235 pm steps: three "steps" each), and
    a frame showing only double steps reports twice the unit; only the other frames of the run
    tell. A staircase already found inconsistent (``step_levels_consistent = 0``) keeps its
    own flag and is not compared.
    """
    frame = str(ds.attrs.get("frame_id", "<frame>"))
    if not (math.isfinite(threshold_sigma) and threshold_sigma > 0):
        raise ProcessingError(f"frame {frame}: compare_step_with_run threshold_sigma = "
                              f"{threshold_sigma!r} must be > 0")
    if not (math.isfinite(run_step_m) and run_step_m > 0 and math.isfinite(run_scatter_m)
            and run_scatter_m >= 0):
        raise ProcessingError(f"frame {frame}: compare_step_with_run needs a positive run step "
                              f"and a scatter >= 0 (got {run_step_m!r}, {run_scatter_m!r})")
    out = ds.copy()
    step = float(ds.attrs.get("step_height_m", math.nan))
    unc = float(ds.attrs.get("step_height_uncertainty_m", math.nan))
    if not (math.isfinite(step) and math.isfinite(unc)) or \
            ds.attrs.get("step_levels_consistent") == 0:
        out.attrs["step_run_deviation_sigma"] = math.nan
        return out
    disagrees, sigma = step_disagreement(step, unc, run_step_m, run_scatter_m, threshold_sigma)
    out.attrs["step_run_deviation_sigma"] = sigma
    if disagrees:
        add_warning(out, f"unit step {step * 1e12:.1f} ± {unc * 1e12:.1f} pm disagrees with the "
                    f"run's {run_step_m * 1e12:.1f} pm (scatter {run_scatter_m * 1e12:.1f} pm; "
                    f"{sigma:.0f} σ, ratio {step / run_step_m:.3f}): a tip change too small to "
                    "be found, steps of another kind, or a bad terrace fit; left out of the z "
                    "calibration")
        out.attrs["status"] = "flagged"
    return out

