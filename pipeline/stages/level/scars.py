"""Scars: short streaks along the fast axis, found against the neighbouring lines."""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr
from scipy import ndimage

from pipeline.errors import ProcessingError
from pipeline.model import Flag, add_warning, stage
from pipeline.stages.level.frame import _copy_with, _inputs, _name, _require, _warn_if_constant
from pipeline.stages.level.robust import _TINY_M, _mad_scale
from pipeline.stages.stats import nanmedian

#: Gaps (pixels) bridged when measuring the length of a streak in :func:`repair_scars`.
_SCAR_GAP_PX = 4


def _close_rows(mask: np.ndarray, radius: int) -> np.ndarray:
    """Binary closing along each row by a segment of ``2 radius + 1`` pixels.

    The same as ``ndimage.binary_closing`` with a (1, 2 radius + 1) structure (outside the
    frame counts as False in both the dilation and the erosion), done as running max / min.
    """
    size = 2 * radius + 1
    m = mask.view(np.uint8) if mask.dtype == bool else mask.astype(np.uint8)
    grown = ndimage.maximum_filter1d(m, size, axis=1, mode="constant", cval=0)
    return ndimage.minimum_filter1d(grown, size, axis=1, mode="constant", cval=0).astype(bool)


def _shifted_or(mask: np.ndarray, offsets: list[tuple[int, int]]) -> np.ndarray:
    """``mask`` OR its copies moved by each (dy, dx) (pixels moved in from outside: False)."""
    out = mask.copy()
    ny, nx = mask.shape
    for dy, dx in offsets:
        if abs(dy) >= ny or abs(dx) >= nx:
            continue
        ty, sy = (slice(dy, None), slice(None, ny - dy)) if dy >= 0 else (
            slice(None, ny + dy), slice(-dy, None))
        tx, sx = (slice(dx, None), slice(None, nx - dx)) if dx >= 0 else (
            slice(None, nx + dx), slice(-dx, None))
        out[ty, tx] |= mask[sy, sx]
    return out


def _dilate_square(mask: np.ndarray, radius: int) -> np.ndarray:
    """``ndimage.binary_dilation`` by a (2r+1)² square, as running ORs along each axis."""
    rows = _shifted_or(mask, [(d, 0) for r in range(1, radius + 1) for d in (r, -r)])
    return _shifted_or(rows, [(0, d) for r in range(1, radius + 1) for d in (r, -r)])


def _dilate_cross(mask: np.ndarray, iterations: int) -> np.ndarray:
    """``ndimage.binary_dilation(mask, iterations=n)`` (4-neighbour cross, outside False)."""
    out = mask
    for _ in range(iterations):
        out = _shifted_or(out, [(1, 0), (-1, 0), (0, 1), (0, -1)])
    return out


def _row_median(a: np.ndarray) -> np.ndarray:
    """Median of each row over its finite entries (0 for rows without any)."""
    med = nanmedian(a, axis=1)
    return np.where(np.isnan(med), 0.0, med)


@stage(version="1")
def repair_scars(
    ds: xr.Dataset,
    *,
    threshold_sigma: float = 6.0,
    max_length_px: int = 32,
    min_length_px: int = 1,
) -> xr.Dataset:
    """Detect short streaks within one line, flag them ``SCAR`` and interpolate across them.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``).
    threshold_sigma : float
        A pixel is a scar candidate when it deviates from the mean of the lines above and below
        by more than this many robust standard deviations of that deviation over the frame
        (a run is extended along the line while the deviation exceeds half of this).
    max_length_px, min_length_px : int
        Allowed length of a streak along the fast axis (pixels); longer runs are line offsets
        (:func:`level_lines`), not scars.

    Returns
    -------
    xarray.Dataset
        New frame; repaired pixels flagged ``SCAR`` with interpolated heights and an
        uncertainty that includes the interpolation error. Attrs ``scar_count`` (streaks),
        ``scar_pixel_count`` and ``scar_threshold_m``.

    Notes
    -----
    For every interior line k the differences to lines k-1 and k+1 are taken pixel by pixel
    and the median of each line pair is removed (so line offsets and tilt do not matter).
    A candidate deviates from both neighbours with the same sign, its neighbours agree with
    each other, and the neighbours agree with their own outer neighbours (k-2, k+2): the
    feature is one line thin, which an adsorbate or a step edge is not. Candidates are grown
    along the line by hysteresis and kept when the run length is within limits. The repaired
    value is the mean of the two neighbouring lines, each shifted by the median difference of
    its pair, i.e. the line's own level is kept. The first and last lines, and pixels without
    both neighbours usable, are not examined. The threshold scale is the MAD of the
    deviation [1]_.

    References
    ----------
    .. [1] P. J. Rousseeuw, C. Croux, "Alternatives to the median absolute deviation",
       J. Am. Stat. Assoc. 88, 1273 (1993). DOI 10.1080/01621459.1993.10476408
    """
    if not (threshold_sigma > 0 and 1 <= int(min_length_px) <= int(max_length_px)):
        raise ProcessingError(
            f"frame {_name(ds)}: repair_scars needs threshold_sigma > 0 (got {threshold_sigma}) "
            f"and 1 <= min_length_px <= max_length_px (got {min_length_px}, {max_length_px})")
    h, flags, valid = _inputs(ds, "repair_scars")
    _require(ds, valid, 1, "scar repair")
    ny, nx = h.shape
    attrs: dict[str, Any] = {"scar_count": 0, "scar_pixel_count": 0, "scar_threshold_m": 0.0}
    if ny < 3:
        out = _copy_with(ds, height=h, attrs=attrs)
        add_warning(out, f"repair_scars: frame has {ny} line(s); scars need a line above and "
                    "below")
        return out
    hv = np.where(valid, h, np.nan)
    d1 = hv[1:] - hv[:-1]  # d1[i] = h[i+1] - h[i]
    d1 = d1 - _row_median(d1)[:, None]
    up = d1[:-1]  # line k minus line k-1, k = 1 .. ny-2
    dn = -d1[1:]  # line k minus line k+1
    dev = 0.5 * (up + dn)
    fin = np.isfinite(dev)
    scale = _mad_scale(dev[fin])
    thr = threshold_sigma * scale
    attrs["scar_threshold_m"] = float(thr)
    if scale <= _TINY_M:
        out = _copy_with(ds, height=h, attrs=attrs)
        _warn_if_constant(out, h, valid, "repair_scars")
        return out
    nanpad = np.full((1, nx), np.nan)
    outer_up = np.vstack([nanpad, d1[:-2]])  # h[k-1] - h[k-2]
    outer_dn = np.vstack([-d1[2:], nanpad])  # h[k+1] - h[k+2]
    outer = np.fmax(np.abs(np.nan_to_num(outer_up)), np.abs(np.nan_to_num(outer_dn)))
    with np.errstate(invalid="ignore"):
        adev = np.where(fin, np.abs(dev), 0.0)
        same = np.where(fin, up * dn, 0.0) > 0
        agree = np.fmin(np.abs(np.nan_to_num(up)), np.abs(np.nan_to_num(dn))) > 0.5 * adev
        thin = outer < 0.5 * adev
    base = fin & same & agree & thin
    high = base & (adev > thr)
    low = base & (adev > 0.5 * thr)
    # runs along the line; gaps of a few pixels (where the streak crosses a step edge or an
    # adsorbate and the neighbour tests fail) are bridged so that the length test sees the
    # whole streak
    row = np.array([[0, 0, 0], [1, 1, 1], [0, 0, 0]])
    bridged = low | (_close_rows(low, _SCAR_GAP_PX)
                     & np.where(fin, (np.abs(dev) > 0.25 * thr), False))
    lab, n = ndimage.label(bridged, structure=row)
    scar_inner = np.zeros_like(low)
    n_runs = 0
    if n:
        length = np.bincount(lab.ravel(), minlength=n + 1)
        has_high = np.bincount(lab[high], minlength=n + 1) > 0
        keep = has_high & (length >= int(min_length_px)) & (length <= int(max_length_px))
        keep[0] = False
        scar_inner = keep[lab] & low
        n_runs = int(keep.sum())
    scar = np.zeros((ny, nx), dtype=bool)
    scar[1:-1] = scar_inner
    new_h = h.copy()
    new_h[1:-1] = np.where(scar_inner, h[1:-1] - np.nan_to_num(dev), h[1:-1])
    new_flags = flags.copy()
    new_flags[scar] |= np.uint8(Flag.SCAR)
    unc = None
    if "height_uncertainty" in ds:
        u0 = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
        uin = np.sqrt(0.25 * (u0[:-2] ** 2 + u0[2:] ** 2) + scale**2)
        unc = u0.copy()
        unc[1:-1] = np.where(scar_inner, uin, u0[1:-1])
    attrs.update({"scar_count": n_runs, "scar_pixel_count": int(scar.sum())})
    out = _copy_with(ds, height=new_h, flags=new_flags, uncertainty=unc, attrs=attrs)
    return out
