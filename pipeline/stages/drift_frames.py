"""Frame geometry, pixel clocks and pairing for the drift code (private).

Public API in :mod:`pipeline.stages.drift`: :func:`frame_times_s` and :func:`plan_frame_pairs`
live here together with the helpers that every drift step shares (attribute checks, scan
geometry, per-pixel acquisition times, usable pixels).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
import xarray as xr
from scipy import ndimage as ndi

from pipeline.errors import MissingAttributeError, ProcessingError
from pipeline.model import BAD_PIXELS, Flag, parse_time, pixel_time_s

__all__ = ["frame_times_s", "plan_frame_pairs"]

#: Flags whose pixels are left out of the registration (besides non-finite heights).
REGISTRATION_EXCLUDED = BAD_PIXELS | Flag.TIP_CHANGE | Flag.EXCLUDED

#: Fewest overlapping pixels per axis for two frames to be registered.
MIN_OVERLAP_PX = 16

#: Relative difference of pixel sizes above which two frames are not registered.
PIXEL_SIZE_TOLERANCE = 1e-3


def frame_id(ds: xr.Dataset) -> str:
    """The frame's name for messages: ``frame_id``, else ``source_file``."""
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def attr_float(ds: xr.Dataset, name: str, where: str, default: float | None = None) -> float:
    """A finite numeric attribute (``default`` if absent and given), else a clear error."""
    if name not in ds.attrs:
        if default is not None:
            return default
        raise MissingAttributeError(f"{where}: frame {frame_id(ds)}: attribute '{name}' is "
                                    "missing (needed for drift)")
    try:
        value = float(np.asarray(ds.attrs[name]).item())
    except (TypeError, ValueError):
        raise MissingAttributeError(
            f"{where}: frame {frame_id(ds)}: attribute '{name}' = {ds.attrs[name]!r} is not a "
            "number") from None
    if not math.isfinite(value):
        raise MissingAttributeError(
            f"{where}: frame {frame_id(ds)}: attribute '{name}' = {value!r} must be finite")
    return value


@dataclass(frozen=True)
class Geometry:
    """Grid size, pixel sizes (m), scan centre (m) and scan angle (rad) of a frame."""

    ny: int
    nx: int
    px_y: float
    px_x: float
    center_x: float
    center_y: float
    angle_rad: float

    def to_scan(self, vx: Any, vy: Any) -> tuple[Any, Any]:
        """Lab (sample) axes → the frame's scan axes."""
        if self.angle_rad == 0:  # the same numbers, without four whole-array products
            return vx, vy
        c, s = math.cos(self.angle_rad), math.sin(self.angle_rad)
        return c * vx + s * vy, -s * vx + c * vy

    def to_lab(self, ux: Any, uy: Any) -> tuple[Any, Any]:
        """The frame's scan axes → lab (sample) axes."""
        if self.angle_rad == 0:
            return ux, uy
        c, s = math.cos(self.angle_rad), math.sin(self.angle_rad)
        return c * ux - s * uy, s * ux + c * uy


def frame_geometry(ds: xr.Dataset, where: str) -> Geometry:
    """The :class:`Geometry` of a processed height frame (errors name the frame)."""
    if "height" not in ds.data_vars or ds["height"].dims != ("y", "x"):
        raise ProcessingError(f"{where}: frame {frame_id(ds)} has no 'height' (y, x) variable "
                              "(drift needs processed height frames)")
    ny, nx = int(ds.sizes["y"]), int(ds.sizes["x"])
    sx = attr_float(ds, "scan_size_x_m", where)
    sy = attr_float(ds, "scan_size_y_m", where)
    if sx <= 0 or sy <= 0:
        raise MissingAttributeError(f"{where}: frame {frame_id(ds)}: scan size {sx} x {sy} m "
                                    "must be positive")
    return Geometry(ny, nx, sy / ny, sx / nx,
                     attr_float(ds, "scan_center_x_m", where, 0.0),
                     attr_float(ds, "scan_center_y_m", where, 0.0),
                     math.radians(attr_float(ds, "scan_angle_deg", where, 0.0)))


def start_time(ds: xr.Dataset, where: str) -> datetime:
    """The frame's ``start_time`` attribute, parsed."""
    if "start_time" not in ds.attrs:
        raise MissingAttributeError(
            f"{where}: frame {frame_id(ds)}: attribute 'start_time' is missing")
    return parse_time(ds.attrs["start_time"], source=f"{where}: frame {frame_id(ds)}")


def seconds_between(t0: datetime, t1: datetime, where: str) -> float:
    """``t1 − t0`` in seconds (an error if one has a time zone and the other not)."""
    try:
        return (t1 - t0).total_seconds()
    except TypeError:
        raise ProcessingError(f"{where}: cannot compare time stamps {t0.isoformat()} and "
                              f"{t1.isoformat()} (one has a time zone, the other not)") from None


def pixel_times(ds: xr.Dataset, where: str) -> np.ndarray:
    """Per-pixel acquisition times since the frame start (:func:`pipeline.model.pixel_time_s`)."""
    attr_float(ds, "line_time_s", where)
    return pixel_time_s(ds)


def affine_times(tau: np.ndarray) -> tuple[float, float, float] | None:
    """``τ ≈ t0 + a·row + b·col`` exactly (the raster), else None."""
    ny, nx = tau.shape
    t0 = float(tau[0, 0])
    a = float(tau[1, 0] - tau[0, 0]) if ny > 1 else 0.0
    b = float(tau[0, 1] - tau[0, 0]) if nx > 1 else 0.0
    rows, cols = np.mgrid[0:ny, 0:nx]
    scale = max(float(np.ptp(tau)), 1e-12)
    if np.max(np.abs(t0 + a * rows + b * cols - tau)) > 1e-9 * scale:
        return None
    return t0, a, b


def time_at(tau: np.ndarray, row: float, col: float) -> float:
    """Pixel clock at a fractional pixel position (affine raster, extended beyond the edge)."""
    affine = affine_times(tau)
    if affine is None:
        return float(ndi.map_coordinates(tau, [[row], [col]], order=1, mode="nearest")[0])
    t0, a, b = affine
    return t0 + a * row + b * col


def usable_pixels(ds: xr.Dataset) -> np.ndarray:
    """Pixels the registration may use: finite height, no flag of :data:`REGISTRATION_EXCLUDED`."""
    h = np.asarray(ds["height"].values, dtype=np.float64)
    ok = np.isfinite(h)
    if "flags" in ds.data_vars:
        ok &= (np.asarray(ds["flags"].values).astype(np.int64) & int(REGISTRATION_EXCLUDED)) == 0
    return ok


def has_tip_change(ds: xr.Dataset) -> bool:
    """Whether any pixel of the frame is flagged as a tip change."""
    if "flags" not in ds.data_vars:
        return False
    return bool(np.any(np.asarray(ds["flags"].values).astype(np.int64) & int(Flag.TIP_CHANGE)))


def frame_times_s(ds: xr.Dataset, *, run_start: str | datetime) -> tuple[float, float]:
    """Start offset and effective mean acquisition time of a frame, seconds after ``run_start``.

    The mean acquisition time is the start offset plus the mean of the per-pixel times of
    :func:`pipeline.model.pixel_time_s` (forward trace); it is the time stamp the drift model
    uses for a frame, because a registration of two frames measures the drift between their
    mean times.

    Raises
    ------
    MissingAttributeError, ProcessingError
        If ``start_time`` or ``line_time_s`` is missing or the time stamps cannot be compared.
    """
    where = "frame_times_s"
    t_run = run_start if isinstance(run_start, datetime) else parse_time(
        run_start, source=where, name="run_start")
    offset = seconds_between(t_run, start_time(ds, where), where)
    return offset, offset + float(pixel_times(ds, where).mean())


def plan_frame_pairs(frames: Sequence[Mapping[str, Any]]) -> list[tuple[int, int]]:
    """Which frames to register with which: each with the latest earlier compatible frame.

    Parameters
    ----------
    frames : sequence of mappings, in time order
        Per frame: ``nx``, ``ny`` (pixels) and the attributes ``scan_size_x_m``,
        ``scan_size_y_m``, optional ``scan_center_x_m``, ``scan_center_y_m``,
        ``scan_angle_deg`` (a frame's ``attrs`` plus its sizes).

    Returns
    -------
    list of (int, int)
        Index pairs ``(earlier, later)``. Compatible: the same pixel size (to
        :data:`PIXEL_SIZE_TOLERANCE`) and scan angle, and windows that overlap by at least
        :data:`MIN_OVERLAP_PX` pixels each way. Frames of another series in between (a small
        atomically resolved frame, a constant-height map) are thus skipped instead of breaking
        the chain; pass the result as ``pairs`` to the registration and to
        :func:`fit_drift_model`.
    """
    def key(f: Mapping[str, Any]) -> tuple[float, ...]:
        nx, ny = int(f["nx"]), int(f["ny"])
        return (float(f["scan_size_x_m"]) / nx, float(f["scan_size_y_m"]) / ny,
                float(f.get("scan_angle_deg", 0.0)), float(f.get("scan_center_x_m", 0.0)),
                float(f.get("scan_center_y_m", 0.0)), float(f["scan_size_x_m"]),
                float(f["scan_size_y_m"]))

    keys = [key(f) for f in frames]
    pairs = []
    for j, (pxj, pyj, aj, cxj, cyj, sxj, syj) in enumerate(keys):
        for i in range(j - 1, -1, -1):
            pxi, pyi, ai, cxi, cyi, sxi, syi = keys[i]
            same = (abs(pxi / pxj - 1) <= PIXEL_SIZE_TOLERANCE
                    and abs(pyi / pyj - 1) <= PIXEL_SIZE_TOLERANCE and abs(ai - aj) < 1e-6)
            ox = 0.5 * (sxi + sxj) - abs(cxi - cxj)
            oy = 0.5 * (syi + syj) - abs(cyi - cyj)
            if same and ox >= MIN_OVERLAP_PX * pxj and oy >= MIN_OVERLAP_PX * pyj:
                pairs.append((i, j))
                break
    return pairs
