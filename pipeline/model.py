"""Dataset conventions: names, dims, units, flag bits, constructors, validators, provenance.

Every raw frame, raw curve set and processed frame in the program is an :class:`xarray.Dataset`
built by one constructor here, so names never drift. DESIGN.md §3 (raw input) and §4 (store) are
the binding contracts this module encodes.
"""

from __future__ import annotations

import enum
import functools
import json
import math
import re
from collections.abc import Callable, Mapping
from datetime import datetime
from typing import Any, ParamSpec

import numpy as np
import xarray as xr

from pipeline._version import __version__
from pipeline.errors import (
    MissingAttributeError,
    NonFiniteDataError,
    ShapeError,
    SignError,
    UnitsError,
)

__all__ = [
    "FRAME_MODES",
    "HISTORY_ATTR",
    "Flag",
    "add_warning",
    "flag_attrs",
    "frame_coords",
    "get_history",
    "get_warnings",
    "make_curves",
    "make_height_frame",
    "make_raw_frame",
    "parse_time",
    "pixel_time_s",
    "replace_maps",
    "sanitize_id",
    "stage",
    "validate_curves",
    "validate_raw_frame",
]

FRAME_MODES = ("constant-current", "constant-height")
HISTORY_ATTR = "processing_history"
WARNINGS_ATTR = "warnings"

#: Fraction of ``line_time_s`` spent on the forward trace of one line (the other half being the
#: backward trace); common practice for a raster scan with both traces recorded.
FORWARD_FRACTION = 0.5

#: Above this fraction of non-finite pixels a channel is an error rather than a flagged frame.
MAX_NONFINITE_FRACTION = 0.5


class Flag(enum.IntFlag):
    """Per-pixel quality flags (bit masks of the ``flags`` variable, CF ``flag_masks``)."""

    NOT_RECORDED = 1  #: non-finite in the raw data (scan stopped early, glitch)
    SATURATED = 2  #: current at the preamplifier limit
    NOISE_FLOOR = 4  #: current too small to convert into a height reliably
    OUTSIDE = 8  #: drift correction brought this pixel in from outside the recorded area
    SCAR = 16  #: short streak in one line, repaired by interpolation
    TRACE_MISMATCH = 32  #: forward and backward traces disagree beyond the noise
    TIP_CHANGE = 64  #: line(s) after an abrupt persistent change of the tip
    EXCLUDED = 128  #: left out of background fits (adsorbate, outlier)


FLAG_MEANINGS = {
    Flag.NOT_RECORDED: "not_recorded",
    Flag.SATURATED: "saturated",
    Flag.NOISE_FLOOR: "below_noise_floor",
    Flag.OUTSIDE: "outside_recorded_area",
    Flag.SCAR: "scar_repaired",
    Flag.TRACE_MISMATCH: "trace_mismatch",
    Flag.TIP_CHANGE: "tip_change",
    Flag.EXCLUDED: "excluded_from_fit",
}

#: Flags that make a pixel's height unusable for fits (the others only annotate it).
BAD_PIXELS = Flag.NOT_RECORDED | Flag.SATURATED | Flag.NOISE_FLOOR | Flag.OUTSIDE


def flag_attrs() -> dict[str, Any]:
    """CF attributes of the ``flags`` variable."""
    return {
        "long_name": "pixel quality flags",
        "flag_masks": np.array([int(f) for f in FLAG_MEANINGS], dtype=np.uint8),
        "flag_meanings": " ".join(FLAG_MEANINGS.values()),
    }


# --------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------


def sanitize_id(text: str) -> str:
    """Make a frame id safe as an HDF5 group name and a file name.

    Keeps letters, digits, ``-``, ``_`` and single dots; everything else (slashes, runs of dots,
    a leading dot) becomes ``_``, so an id can never name a hidden file or a parent folder.
    """
    out = re.sub(r"[^A-Za-z0-9_.-]", "_", str(text)).strip()
    out = re.sub(r"\.{2,}", "_", out)
    out = re.sub(r"^\.", "_", out)
    return out or "_"


def parse_time(value: str, *, source: str = "", name: str = "start_time") -> datetime:
    """Parse an ISO 8601 time stamp; time stamps without a zone are local instrument time."""
    try:
        return datetime.fromisoformat(str(value))
    except ValueError:
        raise MissingAttributeError(
            f"{source}: attribute '{name}' = {value!r} is not an ISO 8601 time "
            "(expected e.g. '2026-03-14T22:05:11')"
        ) from None


def frame_coords(
    nx: int, ny: int, size_x_m: float, size_y_m: float, center_x_m: float = 0.0,
    center_y_m: float = 0.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates (m) of a frame, in the scan's own (unrotated) axes."""
    x = center_x_m + (np.arange(nx) + 0.5 - nx / 2) * (size_x_m / nx)
    y = center_y_m + (np.arange(ny) + 0.5 - ny / 2) * (size_y_m / ny)
    return x, y


def pixel_time_s(ds: xr.Dataset) -> np.ndarray:
    """Acquisition time of each pixel of a frame's forward trace, seconds after ``start_time``.

    Lines are recorded in slow-axis order (row 0 first for ``slow_direction = "increasing"``,
    the last row first otherwise); each line starts ``line_time_s`` after the previous one and its
    forward trace sweeps the fast axis in :data:`FORWARD_FRACTION` of the line time.
    """
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    line_time = float(ds.attrs["line_time_s"])
    rows = np.arange(ny, dtype=float)
    if ds.attrs.get("slow_direction", "increasing") == "decreasing":
        rows = rows[::-1]
    fast = (np.arange(nx) + 0.5) / nx * FORWARD_FRACTION * line_time
    return rows[:, None] * line_time + fast[None, :]


def get_history(ds: xr.Dataset) -> list[dict[str, Any]]:
    """The dataset's processing history (a list of stage records)."""
    raw = ds.attrs.get(HISTORY_ATTR, "[]")
    return json.loads(raw) if isinstance(raw, str) else list(raw)


def get_warnings(ds: xr.Dataset) -> list[str]:
    """Human-readable warnings collected on a dataset."""
    raw = ds.attrs.get(WARNINGS_ATTR, "[]")
    if isinstance(raw, str):
        return list(json.loads(raw)) if raw.startswith("[") else ([raw] if raw else [])
    return [str(w) for w in np.atleast_1d(raw)]


def get_tip_change_rows(ds: xr.Dataset) -> list[int] | None:
    """Rows of the tip changes found by :func:`pipeline.stages.quality.flag_tip_changes` (the
    first line recorded with the changed tip, JSON in ``tip_change_rows``); None if not looked
    for yet."""
    raw = ds.attrs.get("tip_change_rows")
    if raw is None:
        return None
    return [int(r) for r in json.loads(str(raw))]


def add_warning(ds: xr.Dataset, message: str) -> None:
    """Append a warning to ``ds`` in place (only on datasets a stage has just created)."""
    ws = get_warnings(ds)
    if message not in ws:
        ws.append(message)
    ds.attrs[WARNINGS_ATTR] = json.dumps(ws)


def _summarise(value: Any) -> Any:
    """Make a parameter JSON-friendly; arrays are summarised, not dumped."""
    if isinstance(value, xr.Dataset | xr.DataArray):
        return f"<{type(value).__name__} {dict(value.sizes)}>"
    if isinstance(value, np.ndarray):
        if value.size <= 8:
            return value.tolist()
        return f"<array shape={value.shape} dtype={value.dtype}>"
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if isinstance(value, Mapping):
        return {str(k): _summarise(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_summarise(v) for v in value][:16]
    if isinstance(value, str | int | float | bool) or value is None:
        return value
    if hasattr(value, "model_dump"):
        return _summarise(value.model_dump())
    return repr(value)


P = ParamSpec("P")


def stage(version: str = "1") -> Callable[[Callable[..., xr.Dataset]], Callable[..., xr.Dataset]]:
    """Decorator for a pure processing stage ``fn(ds, *args, **params) -> Dataset``.

    Appends one record (stage name, stage version, software version, parameters with arrays
    summarised) to the returned dataset's ``processing_history`` attribute, serialised as JSON so
    it survives netCDF. The input dataset is never modified: the wrapper works on whatever new
    dataset the stage returns and refuses to return the input object itself.
    """

    def decorate(fn: Callable[..., xr.Dataset]) -> Callable[..., xr.Dataset]:
        @functools.wraps(fn)
        def wrapper(ds: xr.Dataset, *args: Any, **params: Any) -> xr.Dataset:
            before = get_history(ds)
            out = fn(ds, *args, **params)
            if out is ds:
                raise RuntimeError(f"stage {fn.__name__} returned its input; stages must copy")
            entry = {
                "stage": fn.__name__,
                "stage_version": version,
                "software": f"isogap {__version__}",
                "params": _summarise({**dict(enumerate(args)), **params}),
            }
            out.attrs[HISTORY_ATTR] = json.dumps([*before, entry])
            return out

        wrapper.stage_version = version  # type: ignore[attr-defined]
        return wrapper

    return decorate


# --------------------------------------------------------------------------------------------
# raw frames
# --------------------------------------------------------------------------------------------

_FRAME_VARS = ("current", "z", "current_backward", "z_backward")
_Z_UNITS = {"m": 1.0, "nm": 1e-9, "pm": 1e-12, "V": None}
_I_UNITS = {"A": 1.0, "nA": 1e-9, "pA": 1e-12}


def make_raw_frame(
    *,
    current: np.ndarray | None = None,
    z: np.ndarray | None = None,
    current_backward: np.ndarray | None = None,
    z_backward: np.ndarray | None = None,
    z_units: str = "m",
    attrs: Mapping[str, Any],
) -> xr.Dataset:
    """Build a raw frame dataset (dims ``y``, ``x``) from arrays in spatial order.

    ``attrs`` are the global attributes of DESIGN.md §3 (``kind`` is set to ``"frame"``).
    Coordinates are pixel centres in metres from the scan size and centre.
    """
    arrays = {"current": current, "z": z, "current_backward": current_backward,
              "z_backward": z_backward}
    present = {k: np.asarray(v) for k, v in arrays.items() if v is not None}
    if not present:
        raise ShapeError("a frame needs at least one of 'current' or 'z'")
    shape = next(iter(present.values())).shape
    a = dict(attrs)
    a["kind"] = "frame"
    ny, nx = shape[:2] if len(shape) == 2 else (0, 0)
    data_vars = {}
    for name, arr in present.items():
        units = z_units if name.startswith("z") else "A"
        long = ("tip height from the feedback" if name.startswith("z")
                else "tunnelling current")
        if name.endswith("backward"):
            long += " (backward trace)"
        data_vars[name] = (("y", "x"), arr, {"units": units, "long_name": long})
    ds = xr.Dataset(data_vars, attrs=a)
    if len(shape) == 2 and "scan_size_x_m" in a and "scan_size_y_m" in a:
        x, y = frame_coords(nx, ny, float(a["scan_size_x_m"]), float(a["scan_size_y_m"]),
                            float(a.get("scan_center_x_m", 0.0)),
                            float(a.get("scan_center_y_m", 0.0)))
        ds = ds.assign_coords(x=("x", x, {"units": "m", "long_name": "fast-axis position"}),
                              y=("y", y, {"units": "m", "long_name": "slow-axis position"}))
    return ds


def _require(ds: xr.Dataset, name: str, source: str, why: str = "") -> Any:
    if name not in ds.attrs:
        extra = f" ({why})" if why else ""
        raise MissingAttributeError(f"{source}: attribute '{name}' is missing{extra}")
    return ds.attrs[name]


def _require_float(ds: xr.Dataset, name: str, source: str, *, positive: bool = False,
                   why: str = "") -> float:
    raw = _require(ds, name, source, why)
    try:
        val = float(np.asarray(raw).item()) if not isinstance(raw, str) else float(raw)
    except (TypeError, ValueError):
        raise MissingAttributeError(
            f"{source}: attribute '{name}' = {raw!r} is not a number") from None
    if not math.isfinite(val) or (positive and val <= 0):
        need = "a positive finite number" if positive else "a finite number"
        raise MissingAttributeError(f"{source}: attribute '{name}' = {raw!r} must be {need}")
    return val


def _check_channel(arr: np.ndarray, name: str, source: str) -> np.ndarray:
    """Return the non-finite mask of a channel, raising if it is mostly non-finite or all zero."""
    bad = ~np.isfinite(arr)
    frac = float(bad.mean()) if arr.size else 1.0
    if frac > MAX_NONFINITE_FRACTION:
        raise NonFiniteDataError(
            f"{source}: variable '{name}' is {100 * frac:.0f}% NaN/Inf "
            f"(at most {100 * MAX_NONFINITE_FRACTION:.0f}% can be flagged and processed)")
    finite = arr[~bad]
    if finite.size and not np.any(finite):
        raise NonFiniteDataError(f"{source}: variable '{name}' is zero everywhere")
    return bad


def _check_current_sign(current: np.ndarray, bias: float, name: str, source: str) -> None:
    """A current whose sign contradicts the bias throughout is an error; noise near 0 is data."""
    finite = current[np.isfinite(current)]
    if bias == 0 or finite.size == 0:
        return
    signed = finite * math.copysign(1.0, bias)
    if np.median(signed) < 0 and np.mean(signed > 0) < 0.05:
        sign = "negative" if bias > 0 else "positive"
        raise SignError(
            f"{source}: variable '{name}' is {sign} throughout (median "
            f"{np.median(finite):.3g} A) while bias_V = {bias:g} V: the current's sign must "
            "follow the sample bias")


def validate_raw_frame(ds: xr.Dataset, *, source: str = "") -> xr.Dataset:
    """Check a raw frame against DESIGN.md §3 and return a normalised copy.

    The copy has ``z`` in metres (V scaled by ``piezo_z_m_per_V``, nm/pm converted), currents in
    A, defaults set for the optional attributes, ``frame_id`` sanitised, and a ``warnings``
    attribute saying how much of each channel is not recorded. Non-finite pixels stay NaN: the
    stages flag them (:attr:`Flag.NOT_RECORDED`).

    Raises
    ------
    MissingAttributeError, ShapeError, UnitsError, NonFiniteDataError, SignError
        With a message naming ``source`` and the offending name/value.
    """
    src = source or str(ds.attrs.get("source_file", "<frame>"))
    present = [v for v in _FRAME_VARS if v in ds.data_vars]
    if "current" not in present and "z" not in present:
        raise MissingAttributeError(
            f"{src}: a frame needs variable 'current' or 'z' (found: "
            f"{', '.join(map(str, ds.data_vars)) or 'none'})")
    mode = _require(ds, "mode", src)
    if mode not in FRAME_MODES:
        raise MissingAttributeError(
            f"{src}: attribute 'mode' = {mode!r}; expected one of {', '.join(FRAME_MODES)}")
    if mode == "constant-current" and "z" not in present:
        raise MissingAttributeError(
            f"{src}: variable 'z' is missing (needed for constant-current frames)")
    if mode == "constant-height" and "current" not in present:
        raise MissingAttributeError(
            f"{src}: variable 'current' is missing (needed for constant-height frames)")
    shape = None
    for v in present:
        if ds[v].dtype.kind not in "iuf":
            raise ShapeError(f"{src}: variable '{v}' has data type {ds[v].dtype}; expected "
                             "real numbers")
        if set(ds[v].dims) == {"x", "y"} and ds[v].dims != ("y", "x"):
            raise ShapeError(f"{src}: variable '{v}' has dimensions {ds[v].dims}; expected "
                             "('y', 'x') (rows = slow axis)")
        if ds[v].ndim != 2:
            raise ShapeError(f"{src}: variable '{v}' has {ds[v].ndim} dimension(s); a frame "
                             "channel must be 2-D (y, x)")
        if shape is None:
            shape = ds[v].shape
        elif ds[v].shape != shape:
            raise ShapeError(f"{src}: variable '{v}' has shape {ds[v].shape}, expected {shape} "
                             "like the other channels")
    assert shape is not None
    if min(shape) < 2:
        raise ShapeError(f"{src}: frame shape {shape} is too small (at least 2 x 2 pixels)")

    bias = _require_float(ds, "bias_V", src)
    if bias == 0 and mode == "constant-current":
        raise MissingAttributeError(f"{src}: attribute 'bias_V' = 0; a constant-current frame "
                                    "needs a non-zero bias")
    for opt in ("scan_center_x_m", "scan_center_y_m", "scan_angle_deg"):
        if opt in ds.attrs:
            _require_float(ds, opt, src)
    for opt in ("current_limit_A", "piezo_z_m_per_V"):
        if opt in ds.attrs:
            _require_float(ds, opt, src, positive=True)
    _require_float(ds, "scan_size_x_m", src, positive=True)
    _require_float(ds, "scan_size_y_m", src, positive=True)
    _require_float(ds, "line_time_s", src, positive=True)
    parse_time(_require(ds, "start_time", src), source=src)
    if mode == "constant-current":
        sp = _require_float(ds, "setpoint_A", src, why="needed for constant-current frames")
        if sp == 0 or sp * bias < 0:
            raise MissingAttributeError(
                f"{src}: attribute 'setpoint_A' = {sp:g} with bias_V = {bias:g}; the setpoint "
                "must be non-zero with the sign of the bias")
    slow = ds.attrs.get("slow_direction", "increasing")
    if slow not in ("increasing", "decreasing"):
        raise MissingAttributeError(
            f"{src}: attribute 'slow_direction' = {slow!r}; expected 'increasing' or "
            "'decreasing'")

    attrs = dict(ds.attrs)
    attrs.setdefault("scan_center_x_m", 0.0)
    attrs.setdefault("scan_center_y_m", 0.0)
    attrs.setdefault("scan_angle_deg", 0.0)
    attrs.setdefault("slow_direction", "increasing")
    attrs["frame_id"] = sanitize_id(attrs.get("frame_id") or attrs.get("source_stem") or "frame")
    warnings: list[str] = get_warnings(ds)

    arrays: dict[str, np.ndarray] = {}
    z_units_out = "m"
    for v in present:
        units = str(ds[v].attrs.get("units", ""))
        arr = np.asarray(ds[v].values, dtype=np.float64)
        if v.startswith("z"):
            if units not in _Z_UNITS:
                raise UnitsError(f"{src}: variable '{v}' has units {units!r}; expected one of "
                                 f"{', '.join(_Z_UNITS)}")
            if units == "V":
                if "piezo_z_m_per_V" not in attrs:
                    raise MissingAttributeError(
                        f"{src}: variable '{v}' is in V but attribute 'piezo_z_m_per_V' is "
                        "missing (set it in the file or in the config's [height] table)")
                s = _require_float(ds, "piezo_z_m_per_V", src, positive=True)
                arr = arr * s
            else:
                arr = arr * _Z_UNITS[units]
        else:
            if units not in _I_UNITS:
                raise UnitsError(f"{src}: variable '{v}' has units {units!r}; expected one of "
                                 f"{', '.join(_I_UNITS)}")
            arr = arr * _I_UNITS[units]
        bad = _check_channel(arr, v, src)
        if bad.any():
            rows_missing = int(np.all(bad, axis=1).sum())
            msg = (f"{v}: {100 * bad.mean():.1f}% of pixels not recorded (NaN/Inf)"
                   + (f", {rows_missing} whole line(s)" if rows_missing else "")
                   + "; flagged")
            if msg not in warnings:
                warnings.append(msg)
        if v.startswith("current"):
            _check_current_sign(arr, bias, v, src)
        arrays[v] = arr
    attrs[WARNINGS_ATTR] = json.dumps(warnings)
    attrs.pop("units", None)
    return make_raw_frame(**arrays, z_units=z_units_out, attrs=attrs)


# --------------------------------------------------------------------------------------------
# curves
# --------------------------------------------------------------------------------------------


def make_curves(z: np.ndarray, current: np.ndarray, *, attrs: Mapping[str, Any]) -> xr.Dataset:
    """Build an approach-curve dataset with dims ``(curve, sample)`` (1-D input gets one curve)."""
    z2 = np.atleast_2d(np.asarray(z, dtype=np.float64))
    i2 = np.atleast_2d(np.asarray(current, dtype=np.float64))
    a = dict(attrs)
    a["kind"] = "curve"
    return xr.Dataset(
        {
            "z": (("curve", "sample"), z2,
                  {"units": "m", "long_name": "tip displacement (+ = retract)"}),
            "current": (("curve", "sample"), i2,
                        {"units": "A", "long_name": "tunnelling current"}),
        },
        attrs=a,
    )


def validate_curves(ds: xr.Dataset, *, source: str = "") -> xr.Dataset:
    """Check a curve dataset against DESIGN.md §3 and return it with dims ``(curve, sample)``.

    Individual non-finite samples are kept (the fit excludes them); a curve that is entirely
    non-finite or too short is an error here, because no fit can say anything about it.
    """
    src = source or str(ds.attrs.get("source_file", "<curves>"))
    for v in ("z", "current"):
        if v not in ds.data_vars:
            raise MissingAttributeError(f"{src}: variable '{v}' is missing (needed for curves)")
    for v in ("z", "current"):
        if ds[v].dtype.kind not in "iuf":
            raise ShapeError(f"{src}: variable '{v}' has data type {ds[v].dtype}; expected "
                             "real numbers")
    z, cur = np.asarray(ds["z"].values, float), np.asarray(ds["current"].values, float)
    if z.ndim not in (1, 2) or z.shape != cur.shape:
        raise ShapeError(f"{src}: curve variables 'z' {z.shape} and 'current' {cur.shape} must "
                         "have the same 1-D (sample) or 2-D (curve, sample) shape")
    zu = str(ds["z"].attrs.get("units", ""))
    iu = str(ds["current"].attrs.get("units", ""))
    if zu not in ("m", "nm", "pm"):
        raise UnitsError(f"{src}: variable 'z' has units {zu!r}; expected m, nm or pm")
    if iu not in _I_UNITS:
        raise UnitsError(f"{src}: variable 'current' has units {iu!r}; expected A, nA or pA")
    z = z * _Z_UNITS[zu]
    cur = cur * _I_UNITS[iu]
    bias = _require_float(ds, "bias_V", src)
    parse_time(_require(ds, "start_time", src), source=src)
    z2, i2 = np.atleast_2d(z), np.atleast_2d(cur)
    if z2.shape[1] < 5:
        raise ShapeError(f"{src}: curves have {z2.shape[1]} samples; at least 5 are needed")
    if bias == 0:
        raise MissingAttributeError(f"{src}: attribute 'bias_V' = 0; approach curves need a "
                                    "non-zero bias")
    if "current_limit_A" in ds.attrs:
        _require_float(ds, "current_limit_A", src, positive=True)
    for k in range(z2.shape[0]):
        ok = np.isfinite(z2[k]) & np.isfinite(i2[k])
        if not ok.any():
            raise NonFiniteDataError(f"{src}: curve {k} is entirely NaN/Inf")
        if not np.any(i2[k][ok]):
            raise NonFiniteDataError(f"{src}: curve {k} has zero current everywhere")
        _check_current_sign(i2[k], bias, f"current[{k}]", src)
    attrs = dict(ds.attrs)
    attrs.setdefault("curve_set_id", sanitize_id(attrs.get("source_stem") or "curves"))
    n_bad = int((~(np.isfinite(z2) & np.isfinite(i2))).sum())
    warnings = get_warnings(ds)
    if n_bad:
        msg = f"{n_bad} curve sample(s) not recorded (NaN/Inf); left out of the fits"
        if msg not in warnings:
            warnings.append(msg)
    attrs[WARNINGS_ATTR] = json.dumps(warnings)
    return make_curves(z2, i2, attrs=attrs)


# --------------------------------------------------------------------------------------------
# processed frames
# --------------------------------------------------------------------------------------------


def make_height_frame(
    raw: xr.Dataset,
    height: np.ndarray,
    *,
    uncertainty: np.ndarray | None = None,
    flags: np.ndarray | None = None,
    extra_vars: Mapping[str, tuple[np.ndarray, Mapping[str, Any]]] | None = None,
    attrs: Mapping[str, Any] | None = None,
) -> xr.Dataset:
    """Build a processed frame: ``height`` (m), ``height_uncertainty`` (m), ``flags`` (uint8).

    Coordinates and attributes are copied from ``raw`` (the raw channels are not), then
    ``attrs`` override them. Maps are stored as float32 (DESIGN.md §4: float32 for stored maps).
    """
    h = np.asarray(height)
    if flags is None:
        flags = np.where(np.isfinite(h), 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    data_vars: dict[str, Any] = {
        "height": (("y", "x"), h.astype(np.float32),
                   {"units": "m", "long_name": "calibrated height"}),
        "flags": (("y", "x"), np.asarray(flags, dtype=np.uint8), flag_attrs()),
    }
    if uncertainty is not None:
        data_vars["height_uncertainty"] = (
            ("y", "x"), np.asarray(uncertainty).astype(np.float32),
            {"units": "m", "long_name": "standard uncertainty of height"})
    for name, (arr, a) in (extra_vars or {}).items():
        data_vars[name] = (("y", "x"), np.asarray(arr), dict(a))
    out_attrs = {k: v for k, v in raw.attrs.items()}
    out_attrs.setdefault(WARNINGS_ATTR, "[]")
    out_attrs.update(attrs or {})
    coords = {k: raw.coords[k] for k in ("x", "y") if k in raw.coords}
    return xr.Dataset(data_vars, coords=coords, attrs=out_attrs)


def replace_maps(ds: xr.Dataset, **maps: np.ndarray) -> xr.Dataset:
    """Return a copy of a processed frame with some of its maps replaced (attrs kept)."""
    out = ds.copy()
    for name, arr in maps.items():
        arr = np.asarray(arr)
        if name in out:
            dtype = out[name].dtype
            out[name] = (out[name].dims, arr.astype(dtype), dict(out[name].attrs))
        else:
            raise KeyError(name)
    return out
