"""Physics-based synthetic frames: constant-current and constant-height scans with ground truth.

Both simulators raster a tip over an analytic :class:`~pipeline.simulate.surface.Surface`, in
the contract's geometry and timing (DESIGN.md §3, :func:`pipeline.model.pixel_time_s`), with a
constant lateral drift (DESIGN.md §4 convention) and the barrier-decay law of DESIGN.md §6.
Each returns ``(raw, truth)``: the raw frame as :func:`pipeline.model.make_raw_frame` builds it,
and a truth dataset on the same grid.

Timing of the traces (seconds after the frame's ``start_time``): line ``k`` in acquisition
order starts at ``k·T`` (``T = line_time_s``); the forward trace records column ``i`` at
``k·T + (i + ½)/nx · f·T`` (``f`` = :data:`pipeline.model.FORWARD_FRACTION` = ½, exactly
:func:`pipeline.model.pixel_time_s`), and the backward trace sweeps back during the rest of the
line, recording column ``i`` at ``k·T + f·T + (nx − i − ½)/nx · (1 − f)·T``; for ``f = ½`` that is
``(2k + 1)·T − t_forward``. Adding the frame's offset from the run start gives the time ``t``
at which the pixel at nominal position ``r`` sees the surface at ``r + v·t``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from datetime import datetime
from typing import Any, Literal

import numpy as np
import xarray as xr
from scipy.signal import lfilter, lfilter_zi

from pipeline import physics
from pipeline.errors import ConfigError
from pipeline.model import FORWARD_FRACTION, frame_coords, make_raw_frame, pixel_time_s
from pipeline.simulate.surface import Surface

__all__ = [
    "frame_times_s",
    "simulate_constant_current_frame",
    "simulate_constant_height_frame",
]

#: Adsorbate heights above this fraction of the monatomic step count as "adsorbate" in the
#: truth mask (common practice: a few % of a step is well above atomic corrugation noise).
_ADSORBATE_MASK_FRACTION = 0.05


def frame_times_s(
    nx: int, ny: int, line_time_s: float, slow_direction: str = "increasing"
) -> tuple[np.ndarray, np.ndarray]:
    """Acquisition times (s after the frame start) of the forward and backward trace pixels.

    Both arrays are (ny, nx) in spatial order. The forward times are
    :func:`pipeline.model.pixel_time_s`; the backward trace is recorded in the second part of
    each line, in reverse fast-axis order (see the module docstring).
    """
    probe = xr.Dataset(coords={"y": np.arange(ny), "x": np.arange(nx)},
                       attrs={"line_time_s": float(line_time_s),
                              "slow_direction": slow_direction})
    t_fwd = pixel_time_s(probe)
    acq = _acquisition_index(ny, slow_direction)
    line_start = acq[:, None] * float(line_time_s)
    f = FORWARD_FRACTION
    col = np.arange(nx)
    back = f * line_time_s + (nx - col - 0.5) / nx * (1.0 - f) * line_time_s
    t_bwd = line_start + back[None, :]
    return t_fwd, t_bwd


def _acquisition_index(ny: int, slow_direction: str) -> np.ndarray:
    """For each spatial row, its position in acquisition order."""
    rows = np.arange(ny)
    return rows if slow_direction == "increasing" else ny - 1 - rows


def _acquisition_order(ny: int, slow_direction: str) -> np.ndarray:
    """Spatial row indices in the order they are recorded."""
    rows = np.arange(ny)
    return rows if slow_direction == "increasing" else rows[::-1]


# --------------------------------------------------------------------------------------------
# shared geometry / checks
# --------------------------------------------------------------------------------------------


def _check_common(
    *, phi_eV: float, bias_V: float, nx: int, ny: int, size_x_m: float, size_y_m: float,
    line_time_s: float, slow_direction: str, dtype: str, unrecorded_rows: int,
    tip_change_row: int | None, frame_id: str,
) -> None:
    where = f"simulated frame {frame_id!r}"
    if not (phi_eV > 0 and math.isfinite(phi_eV)):
        raise ConfigError(f"{where}: phi_eV = {phi_eV!r} must be a positive barrier height")
    if bias_V == 0 or not math.isfinite(bias_V):
        raise ConfigError(f"{where}: bias_V = {bias_V!r} must be non-zero and finite")
    if nx < 2 or ny < 2:
        raise ConfigError(f"{where}: nx = {nx}, ny = {ny}; at least 2 x 2 pixels are needed")
    if not (size_x_m > 0 and size_y_m > 0):
        raise ConfigError(f"{where}: scan sizes ({size_x_m!r}, {size_y_m!r}) m must be > 0")
    if not line_time_s > 0:
        raise ConfigError(f"{where}: line_time_s = {line_time_s!r} must be > 0")
    if slow_direction not in ("increasing", "decreasing"):
        raise ConfigError(f"{where}: slow_direction = {slow_direction!r}; expected "
                          "'increasing' or 'decreasing'")
    if dtype not in ("float32", "float64"):
        raise ConfigError(f"{where}: dtype = {dtype!r}; expected 'float32' or 'float64'")
    if not 0 <= unrecorded_rows < ny:
        raise ConfigError(f"{where}: unrecorded_rows = {unrecorded_rows}; allowed 0..{ny - 1}")
    if tip_change_row is not None and not 0 <= tip_change_row < ny:
        raise ConfigError(f"{where}: tip_change_row = {tip_change_row}; allowed 0..{ny - 1} "
                          "or None")


def _offset_s(start_time: datetime, run_t0: datetime | None) -> float:
    if run_t0 is None:
        return 0.0
    off = (start_time - run_t0).total_seconds()
    if off < 0:
        raise ConfigError(f"simulated frame: start_time {start_time.isoformat()} is before the "
                          f"run start {run_t0.isoformat()}")
    return off


def _after_tip_change(ny: int, slow_direction: str, tip_change_row: int | None) -> np.ndarray:
    """Boolean per spatial row: recorded at or after the tip-change row."""
    if tip_change_row is None:
        return np.zeros(ny, dtype=bool)
    acq = _acquisition_index(ny, slow_direction)
    return acq >= acq[tip_change_row]


def _unrecorded_mask(ny: int, slow_direction: str, unrecorded_rows: int) -> np.ndarray:
    """Boolean per spatial row: among the last ``unrecorded_rows`` lines of the scan."""
    acq = _acquisition_index(ny, slow_direction)
    return acq >= ny - unrecorded_rows


class _Scan:
    """Nominal grid, pixel times and sampled heights of one frame."""

    def __init__(self, surface: Surface, *, nx: int, ny: int, size_x_m: float,
                 size_y_m: float, center_x_m: float, center_y_m: float, line_time_s: float,
                 slow_direction: str, time_offset_s: float,
                 drift_velocity_m_per_s: Sequence[float]) -> None:
        self.x, self.y = frame_coords(nx, ny, size_x_m, size_y_m, center_x_m, center_y_m)
        X, Y = np.meshgrid(self.x, self.y)
        t_fwd, t_bwd = frame_times_s(nx, ny, line_time_s, slow_direction)
        self.t_fwd = t_fwd + time_offset_s
        self.line_start = (_acquisition_index(ny, slow_direction) * float(line_time_s)
                           + time_offset_s)
        self.t_bwd = t_bwd + time_offset_s
        vx, vy = (float(v) for v in drift_velocity_m_per_s)
        self.height_true = surface.height(X, Y)
        self.h_fwd = surface.height(X + vx * self.t_fwd, Y + vy * self.t_fwd)
        self.h_bwd = surface.height(X + vx * self.t_bwd, Y + vy * self.t_bwd)
        self.terrace = surface.terrace_level(X, Y)
        self.adsorbate = surface.adsorbate_height(X, Y) > (
            _ADSORBATE_MASK_FRACTION * surface.step_height_m)


def _feedback(h_fwd: np.ndarray, h_bwd: np.ndarray, *, slow_direction: str,
              line_time_s: float, time_constant_s: float) -> tuple[np.ndarray, np.ndarray]:
    """First-order feedback lag along the serpentine scan path (both traces, all lines).

    The path visits, line by line in acquisition order, the forward pixels left to right and
    then the backward pixels right to left, at a constant step ``dt = T/(2·nx)``. The tip height
    obeys ``τ dz/dt = h − z``, discretised for a piecewise-constant input:
    ``z[n] = z[n−1] + α (h[n] − z[n−1])`` with ``α = 1 − exp(−dt/τ)``, starting in steady state
    on the first pixel; one :func:`scipy.signal.lfilter` call filters the whole frame.
    """
    ny, nx = h_fwd.shape
    order = _acquisition_order(ny, slow_direction)
    path = np.concatenate([h_fwd[order], h_bwd[order][:, ::-1]], axis=1).ravel()
    if time_constant_s > 0:
        dt = line_time_s / (2.0 * nx)
        alpha = -math.expm1(-dt / time_constant_s)
        b, a = np.array([alpha]), np.array([1.0, alpha - 1.0])
        zpath, _ = lfilter(b, a, path, zi=lfilter_zi(b, a) * path[0])
    else:
        zpath = path.copy()
    zpath = zpath.reshape(ny, 2 * nx)
    z_fwd = np.empty_like(h_fwd)
    z_bwd = np.empty_like(h_bwd)
    z_fwd[order] = zpath[:, :nx]
    z_bwd[order] = zpath[:, nx:][:, ::-1]
    return z_fwd, z_bwd


def _scar_mask(rng: np.random.Generator, ny: int, nx: int, n: int) -> np.ndarray:
    """``n`` streaks of 3–10 pixels, each within one line."""
    mask = np.zeros((ny, nx), dtype=bool)
    if n <= 0:
        return mask
    rows = rng.integers(0, ny, n)
    lengths = rng.integers(3, 11, n)
    starts = rng.integers(0, np.maximum(nx - lengths, 0) + 1)
    cols = np.arange(nx)
    inside = (cols[None, :] >= starts[:, None]) & (cols[None, :] < (starts + lengths)[:, None])
    np.logical_or.at(mask, rows, inside)
    return mask


def _truth(scan: _Scan, *, surface: Surface, backward: bool, attrs: dict[str, Any],
           scar_mask: np.ndarray, line_offset: np.ndarray) -> xr.Dataset:
    dims = ("y", "x")
    data: dict[str, Any] = {
        "height_true": (dims, scan.height_true,
                        {"units": "m", "long_name": "surface height at the nominal pixel "
                         "positions (drift-free truth)"}),
        "height_at_pixel": (dims, scan.h_fwd,
                            {"units": "m", "long_name": "surface height actually under the tip "
                             "(forward trace, with drift)"}),
        "terrace_label": (dims, scan.terrace.astype(np.int8),
                          {"units": "1", "long_name": "terrace level at the nominal position "
                           "(height = label x step_height_m above the level-0 terrace)"}),
        "adsorbate_mask": (dims, scan.adsorbate.astype(np.uint8),
                           {"units": "1", "long_name": "1 where an adsorbate is higher than "
                            f"{_ADSORBATE_MASK_FRACTION:g} step heights"}),
        "scar_mask": (dims, scar_mask.astype(np.uint8),
                      {"units": "1", "long_name": "1 on pixels of simulated scars (forward z)"}),
        "line_offset": (("y",), line_offset,
                        {"units": "m", "long_name": "offset added to the recorded z of each line"}),
        "line_start_s": (("y",), scan.line_start,
                         {"units": "s", "long_name": "start time of each line since the "
                          "run start"}),
    }
    if backward:
        data["height_at_pixel_backward"] = (
            dims, scan.h_bwd, {"units": "m", "long_name": "surface height under the tip "
                               "(backward trace, with drift)"})
    a = {
        "kind": "truth",
        "lattice_constant_m": surface.lattice_constant_m,
        "step_height_m": surface.step_height_m,
        "surface_lattice_m": surface.surface_lattice_m,
        "corrugation_m": surface.corrugation_m,
        "corrugation_angle_deg": surface.corrugation_angle_deg,
        "slope_x": surface.slope_x,
        "slope_y": surface.slope_y,
        "n_steps": len(surface.steps),
        "n_adsorbates": len(surface.adsorbates),
        **attrs,
    }
    coords = {"x": ("x", scan.x, {"units": "m"}), "y": ("y", scan.y, {"units": "m"})}
    return xr.Dataset(data, coords=coords, attrs=a)


def _base_attrs(*, mode: str, bias_V: float, size_x_m: float, size_y_m: float,
                center_x_m: float, center_y_m: float, line_time_s: float, start_time: datetime,
                slow_direction: str, frame_id: str) -> dict[str, Any]:
    return {
        "mode": mode,
        "bias_V": float(bias_V),
        "scan_size_x_m": float(size_x_m),
        "scan_size_y_m": float(size_y_m),
        "scan_center_x_m": float(center_x_m),
        "scan_center_y_m": float(center_y_m),
        "scan_angle_deg": 0.0,
        "line_time_s": float(line_time_s),
        "start_time": start_time.isoformat(),
        "slow_direction": slow_direction,
        "frame_id": frame_id,
        "comment": "synthetic data made by the isogap simulator",
    }


# --------------------------------------------------------------------------------------------
# constant current
# --------------------------------------------------------------------------------------------


def simulate_constant_current_frame(
    surface: Surface,
    *,
    rng: np.random.Generator,
    phi_eV: float,
    setpoint_A: float,
    bias_V: float,
    nx: int = 128,
    ny: int = 128,
    size_x_m: float,
    size_y_m: float | None = None,
    center_x_m: float = 0.0,
    center_y_m: float = 0.0,
    line_time_s: float,
    start_time: datetime,
    run_t0: datetime | None = None,
    drift_velocity_m_per_s: Sequence[float] = (0.0, 0.0),
    feedback_time_constant_s: float = 0.0,
    current_noise_fraction: float = 0.0,
    z_noise_m: float = 0.0,
    line_offsets_m: float = 0.0,
    scars: int = 0,
    scar_height_m: float = 1.5e-10,
    tip_change_row: int | None = None,
    tip_change_m: float = 1.0e-10,
    unrecorded_rows: int = 0,
    backward: bool = True,
    slow_direction: Literal["increasing", "decreasing"] = "increasing",
    z_units: Literal["m", "V"] = "m",
    piezo_z_m_per_V: float | None = None,
    current_limit_A: float | None = None,
    frame_id: str = "frame",
    dtype: Literal["float32", "float64"] = "float64",
) -> tuple[xr.Dataset, xr.Dataset]:
    """Simulate a constant-current frame (feedback z + residual current) with its truth.

    Parameters
    ----------
    surface : Surface
        The sample.
    rng : numpy.random.Generator
        Source of every random draw (noise, line offsets, scars); same state → same frame.
    phi_eV : float
        Barrier height; ``κ = physics.decay_constant(phi_eV)``.
    setpoint_A : float
        Magnitude of the feedback setpoint (> 0); the stored ``setpoint_A`` and the currents
        carry the sign of ``bias_V``.
    bias_V : float
        Sample bias (non-zero).
    nx, ny : int
        Pixels along the fast (x) and slow (y) axes.
    size_x_m, size_y_m : float
        Frame extent (``size_y_m`` defaults to ``size_x_m``).
    center_x_m, center_y_m : float
        Frame centre (``scan_center_*`` attributes).
    line_time_s : float
        Time between the starts of successive lines (forward + backward trace).
    start_time, run_t0 : datetime
        Time of the first pixel and of the run start (``run_t0=None``: the frame starts the run).
    drift_velocity_m_per_s : (float, float)
        Constant drift velocity ``v`` of the tip relative to the sample.
    feedback_time_constant_s : float
        Time constant ``τ`` of the first-order feedback lag (0: ideal feedback).
    current_noise_fraction : float
        Relative standard deviation of the multiplicative current noise.
    z_noise_m : float
        Standard deviation of the Gaussian noise of the recorded z (each trace independently).
    line_offsets_m : float
        Standard deviation of a random offset added to the recorded z of each line (both traces).
    scars : int
        Number of scars: streaks of 3–10 pixels in one line of the forward z, off by
        ``scar_height_m·U(0.5, 1.5)`` with random sign.
    tip_change_row : int or None
        Spatial row from which on (in acquisition order) the tip is ``tip_change_m`` longer, a
        persistent jump of the apparent height: the feedback sees the surface raised by
        ``tip_change_m`` from the first pixel of that row.
    unrecorded_rows : int
        The last lines of the scan (acquisition order) are NaN in every channel (a scan stopped
        early).
    backward : bool
        Also return ``z_backward``/``current_backward``.
    slow_direction : {"increasing", "decreasing"}
        Row 0 first, or the last row first.
    z_units : {"m", "V"}
        Units of the recorded z; in V it is z/``piezo_z_m_per_V`` and the attribute is set.
    piezo_z_m_per_V : float, optional
        z sensitivity (required for ``z_units="V"``).
    current_limit_A : float, optional
        Preamplifier saturation: |current| is clipped there and the attribute is set.
    frame_id : str
        The ``frame_id`` attribute.
    dtype : {"float32", "float64"}
        dtype of the raw channels (truth is always float64).

    Returns
    -------
    raw : xarray.Dataset
        Built by :func:`pipeline.model.make_raw_frame`.
    truth : xarray.Dataset
        ``height_true`` (surface at the nominal pixel positions: what a perfect drift
        correction reconstructs), ``height_at_pixel`` (and ``_backward``: the surface actually
        under the tip), ``terrace_label``, ``adsorbate_mask``, ``scar_mask``, ``line_offset``,
        ``line_start_s``; attrs with φ, 2κ, drift, tilt, lattice, step height, tip change.

    Notes
    -----
    The tip follows the sampled height through the lagged feedback (see ``_feedback``), and the
    residual current is ``I = I_set·exp(2κ(h − z))`` (1-D WKB, Tersoff & Hamann 1985), so
    without noise ``h = z + ln(I/I_set)/(2κ)`` holds exactly (DESIGN.md §6, feedback-error
    correction), ``h`` including a tip change. Line offsets, scars and z noise only affect the
    recorded z, multiplicative noise only the recorded current.

    References
    ----------
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805.
    """
    size_y_m = size_x_m if size_y_m is None else size_y_m
    _check_common(phi_eV=phi_eV, bias_V=bias_V, nx=nx, ny=ny, size_x_m=size_x_m,
                  size_y_m=size_y_m, line_time_s=line_time_s, slow_direction=slow_direction,
                  dtype=dtype, unrecorded_rows=unrecorded_rows, tip_change_row=tip_change_row,
                  frame_id=frame_id)
    where = f"simulated frame {frame_id!r}"
    if not setpoint_A > 0:
        raise ConfigError(f"{where}: setpoint_A = {setpoint_A!r} must be a positive magnitude "
                          "(its sign follows bias_V)")
    if current_limit_A is not None and not current_limit_A > 0:
        raise ConfigError(f"{where}: current_limit_A = {current_limit_A!r} must be > 0")
    if z_units not in ("m", "V"):
        raise ConfigError(f"{where}: z_units = {z_units!r}; expected 'm' or 'V'")
    if z_units == "V" and not (piezo_z_m_per_V and piezo_z_m_per_V > 0):
        raise ConfigError(f"{where}: z_units = 'V' needs a positive piezo_z_m_per_V "
                          f"(got {piezo_z_m_per_V!r})")
    if feedback_time_constant_s < 0:
        raise ConfigError(f"{where}: feedback_time_constant_s = {feedback_time_constant_s!r} "
                          "must be >= 0")

    t_off = _offset_s(start_time, run_t0)
    scan = _Scan(surface, nx=nx, ny=ny, size_x_m=size_x_m, size_y_m=size_y_m,
                 center_x_m=center_x_m, center_y_m=center_y_m, line_time_s=line_time_s,
                 slow_direction=slow_direction, time_offset_s=t_off,
                 drift_velocity_m_per_s=drift_velocity_m_per_s)
    two_kappa = 2.0 * float(physics.decay_constant(phi_eV))
    sign = math.copysign(1.0, bias_V)

    jump = np.where(_after_tip_change(ny, slow_direction, tip_change_row), tip_change_m, 0.0)
    seen_fwd = scan.h_fwd + jump[:, None]
    seen_bwd = scan.h_bwd + jump[:, None]
    z_fwd, z_bwd = _feedback(seen_fwd, seen_bwd, slow_direction=slow_direction,
                             line_time_s=line_time_s, time_constant_s=feedback_time_constant_s)

    # random draws, always in this order
    line_offset = line_offsets_m * rng.standard_normal(ny)
    scar_mask = _scar_mask(rng, ny, nx, scars)
    scar_val = np.zeros((ny, nx))
    if scars > 0:
        lab_rows = np.nonzero(scar_mask.any(axis=1))[0]
        amp = scar_height_m * rng.uniform(0.5, 1.5, lab_rows.size) * rng.choice(
            [-1.0, 1.0], lab_rows.size)
        scar_val[lab_rows] = amp[:, None]
        scar_val *= scar_mask
    noise = rng.standard_normal((4, ny, nx))

    def record(z_true: np.ndarray, seen: np.ndarray, k: int, scar: bool) -> tuple:
        cur = abs(setpoint_A) * np.exp(two_kappa * (seen - z_true))
        cur = sign * cur * (1.0 + current_noise_fraction * noise[2 * k])
        if current_limit_A is not None:
            cur = np.clip(cur, -current_limit_A, current_limit_A)
        z_rec = z_true + line_offset[:, None] + z_noise_m * noise[2 * k + 1]
        if scar:
            z_rec = z_rec + scar_val
        return z_rec, cur

    zf, cf = record(z_fwd, seen_fwd, 0, True)
    zb, cb = record(z_bwd, seen_bwd, 1, False)
    lost = _unrecorded_mask(ny, slow_direction, unrecorded_rows)
    for arr in (zf, cf, zb, cb):
        arr[lost] = np.nan
    if z_units == "V":
        zf, zb = zf / piezo_z_m_per_V, zb / piezo_z_m_per_V

    attrs = _base_attrs(mode="constant-current", bias_V=bias_V, size_x_m=size_x_m,
                        size_y_m=size_y_m, center_x_m=center_x_m, center_y_m=center_y_m,
                        line_time_s=line_time_s, start_time=start_time,
                        slow_direction=slow_direction, frame_id=frame_id)
    attrs["setpoint_A"] = sign * abs(setpoint_A)
    if z_units == "V":
        attrs["piezo_z_m_per_V"] = float(piezo_z_m_per_V)  # type: ignore[arg-type]
    if current_limit_A is not None:
        attrs["current_limit_A"] = float(current_limit_A)
    dt = np.dtype(dtype)
    raw = make_raw_frame(
        z=zf.astype(dt), current=cf.astype(dt),
        z_backward=zb.astype(dt) if backward else None,
        current_backward=cb.astype(dt) if backward else None,
        z_units=z_units, attrs=attrs)

    truth_attrs = _truth_attrs(
        frame_id=frame_id, mode="constant-current", phi_eV=phi_eV, two_kappa=two_kappa,
        bias_V=bias_V, drift=drift_velocity_m_per_s, t_off=t_off, start_time=start_time,
        run_t0=run_t0, tip_change_row=tip_change_row, tip_change_m=tip_change_m,
        current_noise_fraction=current_noise_fraction, unrecorded_rows=unrecorded_rows)
    truth_attrs.update({
        "setpoint_A": sign * abs(setpoint_A),
        "feedback_time_constant_s": float(feedback_time_constant_s),
        "z_noise_m": float(z_noise_m),
        "line_offsets_m": float(line_offsets_m),
        "n_scars": int(scars),
        "scar_height_m": float(scar_height_m),
    })
    truth = _truth(scan, surface=surface, backward=backward, attrs=truth_attrs,
                   scar_mask=scar_mask, line_offset=line_offset)
    return raw, truth


def _truth_attrs(*, frame_id: str, mode: str, phi_eV: float, two_kappa: float, bias_V: float,
                 drift: Sequence[float], t_off: float, start_time: datetime,
                 run_t0: datetime | None, tip_change_row: int | None, tip_change_m: float,
                 current_noise_fraction: float, unrecorded_rows: int) -> dict[str, Any]:
    vx, vy = (float(v) for v in drift)
    return {
        "frame_id": frame_id,
        "mode": mode,
        "phi_eV": float(phi_eV),
        "two_kappa_per_m": float(two_kappa),
        "bias_V": float(bias_V),
        "drift_velocity_x_m_per_s": vx,
        "drift_velocity_y_m_per_s": vy,
        "time_offset_s": float(t_off),
        "start_time": start_time.isoformat(),
        "run_start_time": (run_t0 or start_time).isoformat(),
        "tip_change_row": -1 if tip_change_row is None else int(tip_change_row),
        "tip_change_m": float(tip_change_m) if tip_change_row is not None else 0.0,
        "current_noise_fraction": float(current_noise_fraction),
        "unrecorded_rows": int(unrecorded_rows),
    }


# --------------------------------------------------------------------------------------------
# constant height
# --------------------------------------------------------------------------------------------


def simulate_constant_height_frame(
    surface: Surface,
    *,
    rng: np.random.Generator,
    phi_eV: float,
    bias_V: float,
    tip_height_m: float = 6.0e-10,
    reference_current_A: float = 1.0e-10,
    reference_gap_m: float | None = None,
    current_noise_fraction: float = 0.0,
    noise_floor_A: float = 0.0,
    current_limit_A: float | None = None,
    nx: int = 128,
    ny: int = 128,
    size_x_m: float,
    size_y_m: float | None = None,
    center_x_m: float = 0.0,
    center_y_m: float = 0.0,
    line_time_s: float,
    start_time: datetime,
    run_t0: datetime | None = None,
    drift_velocity_m_per_s: Sequence[float] = (0.0, 0.0),
    tip_change_row: int | None = None,
    tip_change_m: float = 1.0e-10,
    unrecorded_rows: int = 0,
    backward: bool = True,
    slow_direction: Literal["increasing", "decreasing"] = "increasing",
    frame_id: str = "frame",
    dtype: Literal["float32", "float64"] = "float64",
) -> tuple[xr.Dataset, xr.Dataset]:
    """Simulate a constant-height frame (a raw tunnelling-current map) with its truth.

    Parameters
    ----------
    surface, rng, phi_eV, bias_V
        As for :func:`simulate_constant_current_frame`.
    tip_height_m : float
        Gap between the (fixed) tip and the mean of the sampled surface heights of the frame.
    reference_current_A : float
        Magnitude (> 0) of the current at gap ``reference_gap_m``:
        ``|I| = I_ref·exp(−2κ(gap − d_ref))``; the sign follows ``bias_V``.
    reference_gap_m : float, optional
        ``d_ref``; defaults to ``tip_height_m`` (then ``I_ref`` is the current over the mean
        surface).
    current_noise_fraction : float
        Relative standard deviation of multiplicative current noise.
    noise_floor_A : float
        Standard deviation of additive Gaussian current noise (preamplifier floor).
    current_limit_A : float, optional
        Saturation: the current is clipped to ±``current_limit_A``.
    tip_change_row : int or None
        From this row on (acquisition order) the tip is ``tip_change_m`` longer (gap smaller).
    others
        Geometry, timing and drift as for :func:`simulate_constant_current_frame`.

    Returns
    -------
    raw, truth : xarray.Dataset
        The raw frame (``current`` [, ``current_backward``]; attribute ``setpoint_A`` is the
        signed current over the mean surface, where the tip height was set before the feedback
        was opened) and the truth (as for constant current; attrs add ``tip_z_m``,
        ``reference_current_A`` (signed), ``reference_gap_m``, ``noise_floor_A``).

    Notes
    -----
    1-D WKB at low bias (Tersoff & Hamann 1985): the gap under the tip is
    ``tip_z − h(r + v·t)``, so without noise ``ln|I|`` is linear in the sampled height with
    slope exactly 2κ, and ``h = tip_z − d_ref + ln(I/I_ref)/(2κ)`` (DESIGN.md §6).

    References
    ----------
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805.
    """
    size_y_m = size_x_m if size_y_m is None else size_y_m
    _check_common(phi_eV=phi_eV, bias_V=bias_V, nx=nx, ny=ny, size_x_m=size_x_m,
                  size_y_m=size_y_m, line_time_s=line_time_s, slow_direction=slow_direction,
                  dtype=dtype, unrecorded_rows=unrecorded_rows, tip_change_row=tip_change_row,
                  frame_id=frame_id)
    where = f"simulated frame {frame_id!r}"
    if not reference_current_A > 0:
        raise ConfigError(f"{where}: reference_current_A = {reference_current_A!r} must be a "
                          "positive magnitude (its sign follows bias_V)")
    if not tip_height_m > 0:
        raise ConfigError(f"{where}: tip_height_m = {tip_height_m!r} must be > 0")
    if current_limit_A is not None and not current_limit_A > 0:
        raise ConfigError(f"{where}: current_limit_A = {current_limit_A!r} must be > 0")
    d_ref = tip_height_m if reference_gap_m is None else float(reference_gap_m)

    t_off = _offset_s(start_time, run_t0)
    scan = _Scan(surface, nx=nx, ny=ny, size_x_m=size_x_m, size_y_m=size_y_m,
                 center_x_m=center_x_m, center_y_m=center_y_m, line_time_s=line_time_s,
                 slow_direction=slow_direction, time_offset_s=t_off,
                 drift_velocity_m_per_s=drift_velocity_m_per_s)
    two_kappa = 2.0 * float(physics.decay_constant(phi_eV))
    sign = math.copysign(1.0, bias_V)
    tip_z = float(np.mean(scan.h_fwd)) + tip_height_m
    jump = np.where(_after_tip_change(ny, slow_direction, tip_change_row), tip_change_m, 0.0)

    noise = rng.standard_normal((4, ny, nx))

    def record(h: np.ndarray, k: int) -> np.ndarray:
        gap = tip_z - (h + jump[:, None])
        cur = reference_current_A * np.exp(-two_kappa * (gap - d_ref))
        cur = sign * cur * (1.0 + current_noise_fraction * noise[2 * k])
        cur = cur + noise_floor_A * noise[2 * k + 1]
        if current_limit_A is not None:
            cur = np.clip(cur, -current_limit_A, current_limit_A)
        return cur

    cf, cb = record(scan.h_fwd, 0), record(scan.h_bwd, 1)
    lost = _unrecorded_mask(ny, slow_direction, unrecorded_rows)
    cf[lost] = np.nan
    cb[lost] = np.nan

    attrs = _base_attrs(mode="constant-height", bias_V=bias_V, size_x_m=size_x_m,
                        size_y_m=size_y_m, center_x_m=center_x_m, center_y_m=center_y_m,
                        line_time_s=line_time_s, start_time=start_time,
                        slow_direction=slow_direction, frame_id=frame_id)
    attrs["setpoint_A"] = float(sign * reference_current_A
                                * math.exp(-two_kappa * (tip_height_m - d_ref)))
    if current_limit_A is not None:
        attrs["current_limit_A"] = float(current_limit_A)
    dt = np.dtype(dtype)
    raw = make_raw_frame(current=cf.astype(dt),
                         current_backward=cb.astype(dt) if backward else None, attrs=attrs)

    truth_attrs = _truth_attrs(
        frame_id=frame_id, mode="constant-height", phi_eV=phi_eV, two_kappa=two_kappa,
        bias_V=bias_V, drift=drift_velocity_m_per_s, t_off=t_off, start_time=start_time,
        run_t0=run_t0, tip_change_row=tip_change_row, tip_change_m=tip_change_m,
        current_noise_fraction=current_noise_fraction, unrecorded_rows=unrecorded_rows)
    truth_attrs.update({
        "tip_z_m": tip_z,
        "tip_height_m": float(tip_height_m),
        "reference_current_A": sign * float(reference_current_A),
        "reference_gap_m": d_ref,
        "noise_floor_A": float(noise_floor_A),
        "current_limit_A": float(current_limit_A) if current_limit_A is not None else 0.0,
    })
    truth = _truth(scan, surface=surface, backward=backward, attrs=truth_attrs,
                   scar_mask=np.zeros((ny, nx), dtype=bool), line_offset=np.zeros(ny))
    return raw, truth
