"""Thermal drift: frame-to-frame shifts, a drift model over the run, intra-frame correction.

Convention (DESIGN.md §4, binding): the drift velocity ``v`` is that of the tip relative to the
sample. The pixel at nominal position ``r`` recorded at time ``t`` (seconds since the start of the
run's first frame) shows the surface at ``r + d(t)`` with ``d(t) = ∫v dt`` and ``d(0) = 0``, so
image features move by ``−d(t)``. Everything here uses that sign:

- :func:`measure_frame_shift` returns the *feature* displacement between two frames that the
  scan windows do not explain, ``dx_m ≈ −(d(t₂) − d(t₁))``;
- :class:`DriftModel` holds ``d(t)`` (``position_m``) and ``v(t)`` (``velocity_m_per_s``);
- :func:`correct_drift` resamples a frame so that every pixel shows the surface point of its
  nominal position at the reference time (by default the run start: absolute positions in the
  corrected frames are referenced to the run start).

Typical use by the batch (three passes over levelled frames)::

    pairs = plan_frame_pairs([{**ds.attrs, "nx": ds.sizes["x"], "ny": ds.sizes["y"]}
                              for ds in frames])            # skip other series in between
    shifts = [measure_frame_shift(frames[i], frames[j], upsample_factor=20) for i, j in pairs]
    times = [frame_times_s(ds, run_start=run_start)[1] for ds in frames]
    model = fit_drift_series(times, shifts, frame_ids=ids, model="constant")
    corrected = correct_drift(ds, model=model, frame_t0_s=frame_times_s(ds, run_start)[0])
    table = drift_table(ids, times, shifts, model)            # -> store group "run"
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Literal

import numpy as np
import xarray as xr
from scipy import ndimage as ndi
from scipy import stats

from pipeline.errors import MissingAttributeError, ProcessingError
from pipeline.model import BAD_PIXELS, Flag, add_warning, parse_time, pixel_time_s, stage
from pipeline.stages.registration import register_images

__all__ = [
    "DriftModel",
    "FrameShift",
    "UpDownDrift",
    "ZDrift",
    "correct_drift",
    "drift_from_up_down_pair",
    "drift_table",
    "fit_drift_model",
    "fit_drift_series",
    "fit_z_drift",
    "frame_times_s",
    "m_per_s_to_nm_per_min",
    "measure_frame_shift",
    "model_from_table",
    "nm_per_min_to_m_per_s",
    "plan_frame_pairs",
]

#: 1 m/s expressed in nm/min.
NM_PER_MIN_PER_M_PER_S = 1e9 * 60.0

#: Flags whose pixels are left out of the registration (besides non-finite heights).
REGISTRATION_EXCLUDED = BAD_PIXELS | Flag.TIP_CHANGE | Flag.EXCLUDED

#: Fewest overlapping pixels per axis for two frames to be registered.
MIN_OVERLAP_PX = 16

#: Relative difference of pixel sizes above which two frames are not registered.
PIXEL_SIZE_TOLERANCE = 1e-3

#: Fixed-point iterations for the nominal position of each corrected pixel (the contraction
#: factor is the drift during one line over the pixel size, far below 1e-2 in practice).
CORRECTION_ITERATIONS = 4

#: Fraction of a corrected frame brought in from outside the recorded area that earns a warning.
OUTSIDE_WARNING_FRACTION = 0.25


def m_per_s_to_nm_per_min(value: Any) -> Any:
    """Convert a rate from m/s to nm/min (1 m/s = 6·10¹⁰ nm/min)."""
    return np.asarray(value, dtype=float) * NM_PER_MIN_PER_M_PER_S if np.ndim(value) else \
        float(value) * NM_PER_MIN_PER_M_PER_S


def nm_per_min_to_m_per_s(value: Any) -> Any:
    """Convert a rate from nm/min to m/s."""
    return np.asarray(value, dtype=float) / NM_PER_MIN_PER_M_PER_S if np.ndim(value) else \
        float(value) / NM_PER_MIN_PER_M_PER_S


# --------------------------------------------------------------------------------------------
# frame geometry and times
# --------------------------------------------------------------------------------------------


def _frame_id(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def _attr_float(ds: xr.Dataset, name: str, where: str, default: float | None = None) -> float:
    if name not in ds.attrs:
        if default is not None:
            return default
        raise MissingAttributeError(f"{where}: frame {_frame_id(ds)}: attribute '{name}' is "
                                    "missing (needed for drift)")
    try:
        value = float(np.asarray(ds.attrs[name]).item())
    except (TypeError, ValueError):
        raise MissingAttributeError(
            f"{where}: frame {_frame_id(ds)}: attribute '{name}' = {ds.attrs[name]!r} is not a "
            "number") from None
    if not math.isfinite(value):
        raise MissingAttributeError(
            f"{where}: frame {_frame_id(ds)}: attribute '{name}' = {value!r} must be finite")
    return value


@dataclass(frozen=True)
class _Geometry:
    ny: int
    nx: int
    px_y: float
    px_x: float
    center_x: float
    center_y: float
    angle_rad: float

    def to_scan(self, vx: Any, vy: Any) -> tuple[Any, Any]:
        """Lab (sample) axes → the frame's scan axes."""
        c, s = math.cos(self.angle_rad), math.sin(self.angle_rad)
        return c * vx + s * vy, -s * vx + c * vy

    def to_lab(self, ux: Any, uy: Any) -> tuple[Any, Any]:
        """The frame's scan axes → lab (sample) axes."""
        c, s = math.cos(self.angle_rad), math.sin(self.angle_rad)
        return c * ux - s * uy, s * ux + c * uy


def _geometry(ds: xr.Dataset, where: str) -> _Geometry:
    if "height" not in ds.data_vars or ds["height"].dims != ("y", "x"):
        raise ProcessingError(f"{where}: frame {_frame_id(ds)} has no 'height' (y, x) variable "
                              "(drift needs processed height frames)")
    ny, nx = int(ds.sizes["y"]), int(ds.sizes["x"])
    sx = _attr_float(ds, "scan_size_x_m", where)
    sy = _attr_float(ds, "scan_size_y_m", where)
    if sx <= 0 or sy <= 0:
        raise MissingAttributeError(f"{where}: frame {_frame_id(ds)}: scan size {sx} x {sy} m "
                                    "must be positive")
    return _Geometry(ny, nx, sy / ny, sx / nx,
                     _attr_float(ds, "scan_center_x_m", where, 0.0),
                     _attr_float(ds, "scan_center_y_m", where, 0.0),
                     math.radians(_attr_float(ds, "scan_angle_deg", where, 0.0)))


def _start(ds: xr.Dataset, where: str) -> datetime:
    if "start_time" not in ds.attrs:
        raise MissingAttributeError(
            f"{where}: frame {_frame_id(ds)}: attribute 'start_time' is missing")
    return parse_time(ds.attrs["start_time"], source=f"{where}: frame {_frame_id(ds)}")


def _seconds_between(t0: datetime, t1: datetime, where: str) -> float:
    try:
        return (t1 - t0).total_seconds()
    except TypeError:
        raise ProcessingError(f"{where}: cannot compare time stamps {t0.isoformat()} and "
                              f"{t1.isoformat()} (one has a time zone, the other not)") from None


def _pixel_times(ds: xr.Dataset, where: str) -> np.ndarray:
    _attr_float(ds, "line_time_s", where)
    return pixel_time_s(ds)


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
    offset = _seconds_between(t_run, _start(ds, where), where)
    return offset, offset + float(_pixel_times(ds, where).mean())


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


# --------------------------------------------------------------------------------------------
# frame-to-frame shift
# --------------------------------------------------------------------------------------------


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


def _usable(ds: xr.Dataset) -> np.ndarray:
    h = np.asarray(ds["height"].values, dtype=np.float64)
    ok = np.isfinite(h)
    if "flags" in ds.data_vars:
        ok &= (np.asarray(ds["flags"].values).astype(np.int64) & int(REGISTRATION_EXCLUDED)) == 0
    return ok


def _has_tip_change(ds: xr.Dataset) -> bool:
    if "flags" not in ds.data_vars:
        return False
    return bool(np.any(np.asarray(ds["flags"].values).astype(np.int64) & int(Flag.TIP_CHANGE)))


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
    gp, gc = _geometry(previous, where), _geometry(current, where)
    pid, cid = _frame_id(previous), _frame_id(current)
    tp, tc = _pixel_times(previous, where), _pixel_times(current, where)
    dt = _seconds_between(_start(previous, where), _start(current, where), where) + \
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
                          reference_mask=_usable(previous)[sl_p],
                          moving_mask=_usable(current)[sl_c], window=window, workers=workers)
    fx = (reg.shift_x_px + ox - kx) * gp.px_x
    fy = (reg.shift_y_px + oy - ky) * gp.px_y
    dx, dy = gp.to_lab(fx, fy)
    # covariance: pixels (y, x) -> metres in scan axes (x, y) -> lab axes
    cpx = reg.covariance_px2
    scale = np.diag([gp.px_x, gp.px_y])
    c_scan = scale @ np.array([[cpx[1, 1], cpx[0, 1]], [cpx[0, 1], cpx[0, 0]]]) @ scale
    c, s = math.cos(gp.angle_rad), math.sin(gp.angle_rad)
    rot = np.array([[c, -s], [s, c]])
    c_lab = rot @ c_scan @ rot.T if np.all(np.isfinite(c_scan)) else np.full((2, 2), np.inf)
    ux_unc, uy_unc = math.sqrt(c_lab[0, 0]), math.sqrt(c_lab[1, 1])
    # observation times of the matched surface: centre of the overlap in "previous" and the
    # place where its content was found in "current" (the frames' own pixel clocks)
    row_p, col_p = 0.5 * (p0y + p1y - 1), 0.5 * (p0x + p1x - 1)
    t_obs_p = _time_at(tp, row_p, col_p)
    t_obs_c = _time_at(tc, row_p - ky + reg.shift_y_px, col_p - kx + reg.shift_x_px)
    dt_obs = _seconds_between(_start(previous, where), _start(current, where), where) + \
        t_obs_c - t_obs_p
    return FrameShift(pid, cid, float(dx), float(dy), ux_unc, uy_unc, reg.confidence, dt_obs,
                      error=reg.error, overlap_fraction=float(overlap),
                      tip_change=_has_tip_change(previous) or _has_tip_change(current),
                      time_offset_s=t_obs_p - float(tp.mean()),
                      covariance_xy_m2=float(c_lab[0, 1]) if math.isfinite(ux_unc) else 0.0,
                      **common)


def _time_at(tau: np.ndarray, row: float, col: float) -> float:
    """Pixel clock at a fractional pixel position (affine raster, extended beyond the edge)."""
    affine = _affine_times(tau)
    if affine is None:
        return float(ndi.map_coordinates(tau, [[row], [col]], order=1, mode="nearest")[0])
    t0, a, b = affine
    return t0 + a * row + b * col


# --------------------------------------------------------------------------------------------
# drift model over the run
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class DriftModel:
    """Tip-relative-to-sample drift ``d(t) = Σⱼ cⱼ·(t/T)ʲ`` (j = 1 … degree), ``d(0) = 0``.

    ``t`` is in seconds since the run start. ``kind`` is ``"constant"`` (degree 1: a constant
    velocity), ``"smooth"`` (a low-order polynomial of position against time) or ``"none"``
    (nothing could be measured: zero drift, correction should be skipped).

    Attributes
    ----------
    coef_x, coef_y : ndarray
        Polynomial coefficients (m) of the x and y drift.
    cov_x, cov_y : ndarray
        Their covariance matrices (m²), already scaled by the Birge ratio where the scatter
        exceeds the stated uncertainties.
    time_scale_s : float
        ``T``, for conditioning.
    t_first_s, t_last_s : float
        Span of the frame times that the model was fitted to.
    used, reasons : tuple
        Per frame pair: whether it entered the fit, and why not.
    warnings : tuple of str
        Human-readable notes (excluded pairs, reduced degree, nothing usable).
    """

    kind: str
    coef_x: np.ndarray
    coef_y: np.ndarray
    cov_x: np.ndarray
    cov_y: np.ndarray
    time_scale_s: float = 3600.0
    t_first_s: float = 0.0
    t_last_s: float = 0.0
    used: tuple[bool, ...] = ()
    reasons: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    reduced_chi2: tuple[float, float] = (math.nan, math.nan)
    labels: tuple[str, ...] = field(default=())

    def __repr__(self) -> str:  # compact: it goes into processing histories
        if not self.is_usable:
            return "DriftModel(kind='none')"
        vx, vy = self.velocity_nm_per_min
        return (f"DriftModel(kind={self.kind!r}, degree={self.degree}, "
                f"v=({vx:+.4g}, {vy:+.4g}) nm/min, pairs_used={self.n_used})")

    @classmethod
    def constant(cls, vx_m_per_s: float, vy_m_per_s: float, *,
                 uncertainty_x_m_per_s: float = 0.0,
                 uncertainty_y_m_per_s: float = 0.0) -> DriftModel:
        """A constant-velocity model with given values (for simulation and tests)."""
        t = 3600.0
        return cls("constant", np.array([vx_m_per_s * t]), np.array([vy_m_per_s * t]),
                   np.array([[(uncertainty_x_m_per_s * t) ** 2]]),
                   np.array([[(uncertainty_y_m_per_s * t) ** 2]]), time_scale_s=t)

    @property
    def degree(self) -> int:
        return len(self.coef_x)

    @property
    def is_usable(self) -> bool:
        """False when no frame pair could be used (``kind == "none"``)."""
        return self.kind != "none"

    @property
    def n_used(self) -> int:
        return int(sum(self.used))

    # basis and its derivative, t in s
    def _basis(self, t: np.ndarray) -> np.ndarray:
        tau = np.asarray(t, dtype=float)[..., None] / self.time_scale_s
        return tau ** np.arange(1, self.degree + 1)

    def _dbasis(self, t: np.ndarray) -> np.ndarray:
        tau = np.asarray(t, dtype=float)[..., None] / self.time_scale_s
        j = np.arange(1, self.degree + 1)
        return j * tau ** (j - 1) / self.time_scale_s

    def position_m(self, t: Any) -> tuple[np.ndarray, np.ndarray]:
        """Drift displacement ``d(t) = (x, y)`` in m of the tip relative to the sample."""
        b = self._basis(t)
        return b @ self.coef_x, b @ self.coef_y

    def velocity_m_per_s(self, t: Any) -> tuple[np.ndarray, np.ndarray]:
        """Drift velocity ``v(t) = d'(t)`` (m/s)."""
        b = self._dbasis(t)
        return b @ self.coef_x, b @ self.coef_y

    def position_uncertainty_m(self, t: Any, t_ref: Any = 0.0) -> tuple[np.ndarray, np.ndarray]:
        """Standard uncertainty of ``d(t) − d(t_ref)`` (m), from the coefficient covariance."""
        b = self._basis(t) - self._basis(t_ref)
        return (np.sqrt(np.einsum("...i,ij,...j->...", b, self.cov_x, b)),
                np.sqrt(np.einsum("...i,ij,...j->...", b, self.cov_y, b)))

    def _mean_velocity_functional(self) -> np.ndarray:
        if self.kind == "constant" or self.t_last_s <= self.t_first_s:
            return self._dbasis(0.5 * (self.t_first_s + self.t_last_s))
        return (self._basis(self.t_last_s) - self._basis(self.t_first_s)) / (
            self.t_last_s - self.t_first_s)

    @property
    def velocity_x_m_per_s(self) -> float:
        """Run-mean drift velocity (x): the constant velocity, or the mean over the fitted span."""
        return float(self._mean_velocity_functional() @ self.coef_x)

    @property
    def velocity_y_m_per_s(self) -> float:
        """Run-mean drift velocity (y)."""
        return float(self._mean_velocity_functional() @ self.coef_y)

    @property
    def velocity_uncertainty_x_m_per_s(self) -> float:
        g = self._mean_velocity_functional()
        return float(math.sqrt(max(g @ self.cov_x @ g, 0.0)))

    @property
    def velocity_uncertainty_y_m_per_s(self) -> float:
        g = self._mean_velocity_functional()
        return float(math.sqrt(max(g @ self.cov_y @ g, 0.0)))

    @property
    def velocity_nm_per_min(self) -> tuple[float, float]:
        """Run-mean drift velocity ``(vx, vy)`` in nm/min."""
        return (m_per_s_to_nm_per_min(self.velocity_x_m_per_s),
                m_per_s_to_nm_per_min(self.velocity_y_m_per_s))


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
        for k in range(n):
            warnings.append(f"{names[k]}: excluded from the drift model: {why[k]}")
        return _none_model(n, why, warnings, names)

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
    for k in range(n):
        if why[k]:
            warnings.append(f"{names[k]}: excluded from the drift model: {why[k]}")
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
    res = stats.theilslopes(h[ok], t[ok], alpha=0.6827)
    return ZDrift(float(res.slope), float(0.5 * (res.high_slope - res.low_slope)),
                  float(res.intercept), int(ok.sum()))


# --------------------------------------------------------------------------------------------
# table for the store's run group
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# intra-frame correction
# --------------------------------------------------------------------------------------------


def _affine_times(tau: np.ndarray) -> tuple[float, float, float] | None:
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
    g = _geometry(ds, where)
    tau = _pixel_times(ds, where)
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
    affine = _affine_times(tau)

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


# --------------------------------------------------------------------------------------------
# up/down pairs
# --------------------------------------------------------------------------------------------


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
                 g: _Geometry, min_confidence: float) -> tuple[np.ndarray, ...]:
    """Feature displacement up → down of horizontal bands (scan axes, m) and its uncertainty."""
    hu = np.asarray(up["height"].values, dtype=np.float64)
    hd = np.asarray(down["height"].values, dtype=np.float64)
    mu, md = _usable(up), _usable(down)
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
    gu, gd = _geometry(frame_up, where), _geometry(frame_down, where)
    if (gu.ny, gu.nx) != (gd.ny, gd.nx) or abs(gu.px_x / gd.px_x - 1) > PIXEL_SIZE_TOLERANCE \
            or abs(gu.px_y / gd.px_y - 1) > PIXEL_SIZE_TOLERANCE or gu.angle_rad != gd.angle_rad:
        raise ProcessingError(f"{where}: frames {_frame_id(frame_up)} and {_frame_id(frame_down)}"
                              " must have the same shape, pixel size and scan angle")
    su = frame_up.attrs.get("slow_direction", "increasing")
    sd = frame_down.attrs.get("slow_direction", "increasing")
    if su == sd:
        raise ProcessingError(f"{where}: frames {_frame_id(frame_up)} and "
                              f"{_frame_id(frame_down)} have the same slow_direction {su!r}; "
                              "an up/down pair needs opposite ones")
    if n_bands < 3:
        raise ProcessingError(f"{where}: n_bands = {n_bands}; at least 3 are needed")
    t_up0 = 0.0
    t_dn0 = _seconds_between(_start(frame_up, where), _start(frame_down, where), where)
    tau_u, tau_d = _pixel_times(frame_up, where), _pixel_times(frame_down, where)
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
