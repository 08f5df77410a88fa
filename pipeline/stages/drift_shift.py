"""Frame-to-frame drift displacement from the registration of two frames (private).

Public API in :mod:`pipeline.stages.drift`. Sign convention of DESIGN.md §4: the returned
displacement is that of the image *features*, ``≈ −(d(t_current) − d(t_previous))``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import xarray as xr

from pipeline.stages.drift_frames import (
    MIN_OVERLAP_PX,
    PIXEL_SIZE_TOLERANCE,
    frame_geometry,
    frame_id,
    has_tip_change,
    pixel_times,
    seconds_between,
    start_time,
    time_at,
    usable_pixels,
)
from pipeline.stages.registration import register_images

__all__ = ["FrameShift", "measure_frame_shift"]


@dataclass(frozen=True)
class FrameShift:
    """Drift-relevant displacement of the surface between two frames (lab axes, metres).

    ``dx_m, dy_m`` is the displacement of image features from ``previous`` to ``current`` that
    the scan windows do not explain: a deliberate window move by ``Δc`` moves features by
    ``−Δc``, which is removed; what remains is ``≈ −(d(t_current) − d(t_previous))`` (features
    move by ``−v·Δt``). ``reason`` is non-empty when the pair could not be measured at all
    (``confidence`` is then 0 and ``dx_m, dy_m`` are NaN). ``uncertainty_m`` is the RMS of the
    two per-axis uncertainties (set automatically).

    ``dt_s`` is the time between the two *observations of the same surface*: from the moment the
    centre of the overlap was scanned in ``previous`` to the moment that surface was scanned in
    ``current``, which is the frames' time difference plus the pixel-clock difference over the
    displacement. (Drift stretches and shears each frame, so a feature displaced by ``s`` is
    recorded ``∇τ·s`` later or earlier; using plain frame times would bias the velocity by the
    relative intra-frame distortion, 10 % at 1 nm/min for 20 nm frames of 2 min.)
    ``time_offset_s`` is the first observation's time relative to the mean acquisition time of
    ``previous``.
    """

    previous_id: str
    current_id: str
    dx_m: float
    dy_m: float
    uncertainty_x_m: float
    uncertainty_y_m: float
    confidence: float
    dt_s: float
    error: float = 1.0
    window_shift_x_m: float = 0.0
    window_shift_y_m: float = 0.0
    overlap_fraction: float = 0.0
    tip_change: bool = False
    reason: str = ""
    time_offset_s: float = 0.0
    covariance_xy_m2: float = 0.0
    uncertainty_m: float = math.inf

    def __post_init__(self) -> None:
        if self.uncertainty_m == math.inf and math.isfinite(self.uncertainty_x_m + \
                self.uncertainty_y_m):
            rms = math.sqrt(0.5 * (self.uncertainty_x_m**2 + self.uncertainty_y_m**2))
            object.__setattr__(self, "uncertainty_m", rms)

    @property
    def velocity_x_m_per_s(self) -> float:
        """Drift velocity implied by this pair alone, ``−dx_m/dt_s``."""
        return -self.dx_m / self.dt_s if self.dt_s else math.nan

    @property
    def velocity_y_m_per_s(self) -> float:
        """Drift velocity implied by this pair alone, ``−dy_m/dt_s``."""
        return -self.dy_m / self.dt_s if self.dt_s else math.nan


def _refused(prev_id: str, cur_id: str, dt: float, reason: str, **kw: Any) -> FrameShift:
    return FrameShift(prev_id, cur_id, math.nan, math.nan, math.inf, math.inf, 0.0, dt,
                      reason=reason, **kw)


def measure_frame_shift(
    previous: xr.Dataset,
    current: xr.Dataset,
    *,
    upsample_factor: int = 20,
    window: Literal["hann"] | None = "hann",
    workers: int | None = None,
) -> FrameShift:
    """Drift displacement of the surface between two processed frames.

    Parameters
    ----------
    previous, current : xarray.Dataset
        Levelled height frames (:func:`pipeline.model.make_height_frame`) with ``start_time``,
        ``line_time_s``, ``scan_size_*``, optional ``scan_center_*``/``scan_angle_deg``.
    upsample_factor : int
        Registration precision, 1/upsample_factor pixel (see
        :func:`~pipeline.stages.registration.register_images`).
    window : {"hann", None}
        Apodisation of the overlapping parts before registration.
    workers : int, optional
        FFT threads.

    Returns
    -------
    FrameShift
        ``dx_m, dy_m`` (feature displacement not explained by the window move, lab axes),
        uncertainties, ``confidence`` in [0, 1], ``dt_s`` (difference of the frames' mean
        acquisition times), ``tip_change`` (either frame has tip-change flags) and ``reason``
        (why the pair was refused, empty otherwise).

    Notes
    -----
    Only the nominally overlapping parts of the two frames are compared: the window move
    ``Δc = c_current − c_previous`` is converted into a pixel offset ``o`` of the current grid on
    the previous one, both frames are cropped to their common area at the nearest whole-pixel
    offset ``k``, and the registered crop shift ``s`` gives the unexplained feature displacement
    ``(s + o − k)·pixel``. Pixels that are non-finite or flagged (bad, tip change, excluded)
    carry no weight. Frames whose pixel sizes or scan angles differ, or that do not overlap, are
    refused (confidence 0, a reason) rather than resampled. Frames of different areas or of
    featureless noise are not refused but come out with a low confidence.
    """
    where = "measure_frame_shift"
    gp, gc = frame_geometry(previous, where), frame_geometry(current, where)
    pid, cid = frame_id(previous), frame_id(current)
    tp, tc = pixel_times(previous, where), pixel_times(current, where)
    dt = seconds_between(start_time(previous, where), start_time(current, where), where) + \
        float(tc.mean() - tp.mean())  # refined below to the observation times
    dcx, dcy = gc.center_x - gp.center_x, gc.center_y - gp.center_y
    common = {"window_shift_x_m": dcx, "window_shift_y_m": dcy}
    if not dt > 0:
        return _refused(pid, cid, dt, f"frame {cid} is not later than frame {pid} "
                        f"(time difference {dt:.3g} s)", **common)
    for name, a, b in (("x", gp.px_x, gc.px_x), ("y", gp.px_y, gc.px_y)):
        if abs(a / b - 1.0) > PIXEL_SIZE_TOLERANCE:
            return _refused(pid, cid, dt, f"pixel sizes differ along {name} "
                            f"({a * 1e9:.4g} nm vs {b * 1e9:.4g} nm); not registered", **common)
    if abs(math.remainder(gp.angle_rad - gc.angle_rad, 2 * math.pi)) > 1e-6:
        return _refused(pid, cid, dt, "scan angles differ "
                        f"({math.degrees(gp.angle_rad):g} vs {math.degrees(gc.angle_rad):g} "
                        "deg); not registered", **common)
    # first-pixel positions in the (shared) scan axes -> offset of current grid on previous
    ux, uy = gp.to_scan(dcx, dcy)
    ox = (ux + (gp.nx - gc.nx) * gp.px_x / 2) / gp.px_x
    oy = (uy + (gp.ny - gc.ny) * gp.px_y / 2) / gp.px_y
    kx, ky = round(ox), round(oy)
    p0x, p1x = max(0, kx), min(gp.nx, kx + gc.nx)
    p0y, p1y = max(0, ky), min(gp.ny, ky + gc.ny)
    if p1x - p0x < MIN_OVERLAP_PX or p1y - p0y < MIN_OVERLAP_PX:
        return _refused(pid, cid, dt, f"frames {pid} and {cid} do not overlap (window moved "
                        f"by {dcx * 1e9:.3g}, {dcy * 1e9:.3g} nm)", **common)
    overlap = (p1x - p0x) * (p1y - p0y) / min(gp.nx * gp.ny, gc.nx * gc.ny)
    sl_p = (slice(p0y, p1y), slice(p0x, p1x))
    sl_c = (slice(p0y - ky, p1y - ky), slice(p0x - kx, p1x - kx))
    hp = np.asarray(previous["height"].values, dtype=np.float64)[sl_p]
    hc = np.asarray(current["height"].values, dtype=np.float64)[sl_c]
    reg = register_images(hp, hc, upsample_factor=upsample_factor,
                          reference_mask=usable_pixels(previous)[sl_p],
                          moving_mask=usable_pixels(current)[sl_c], window=window, workers=workers)
    fx = (reg.shift_x_px + ox - kx) * gp.px_x
    fy = (reg.shift_y_px + oy - ky) * gp.px_y
    dx, dy = gp.to_lab(fx, fy)
    # covariance: pixels (y, x) -> metres in scan axes (x, y) -> lab axes
    cpx = reg.covariance_px2
    scale = np.diag([gp.px_x, gp.px_y])
    with np.errstate(invalid="ignore", over="ignore"):  # an unbounded covariance stays inf
        c_scan = scale @ np.array([[cpx[1, 1], cpx[0, 1]], [cpx[0, 1], cpx[0, 0]]]) @ scale
    c, s = math.cos(gp.angle_rad), math.sin(gp.angle_rad)
    rot = np.array([[c, -s], [s, c]])
    c_lab = rot @ c_scan @ rot.T if np.all(np.isfinite(c_scan)) else np.full((2, 2), np.inf)
    ux_unc, uy_unc = math.sqrt(c_lab[0, 0]), math.sqrt(c_lab[1, 1])
    # observation times of the matched surface: centre of the overlap in "previous" and the
    # place where its content was found in "current" (the frames' own pixel clocks)
    row_p, col_p = 0.5 * (p0y + p1y - 1), 0.5 * (p0x + p1x - 1)
    t_obs_p = time_at(tp, row_p, col_p)
    t_obs_c = time_at(tc, row_p - ky + reg.shift_y_px, col_p - kx + reg.shift_x_px)
    dt_obs = seconds_between(start_time(previous, where), start_time(current, where), where) + \
        t_obs_c - t_obs_p
    return FrameShift(pid, cid, float(dx), float(dy), ux_unc, uy_unc, reg.confidence, dt_obs,
                      error=reg.error, overlap_fraction=float(overlap),
                      tip_change=has_tip_change(previous) or has_tip_change(current),
                      time_offset_s=t_obs_p - float(tp.mean()),
                      covariance_xy_m2=float(c_lab[0, 1]) if math.isfinite(ux_unc) else 0.0,
                      **common)
