"""Readers: round trips per format and every kind of bad input (DESIGN.md §3).

Reference for the round trips: the arrays written are the check values themselves (a reader
must give back exactly what the file holds); unit factors are SI prefixes (BIPM SI Brochure,
9th ed.: n = 1e-9, p = 1e-12). File signatures: HDF5 File Format Specification (superblock
signature), NetCDF classic format specification ("CDF\\x01"), PKWARE APPNOTE (zip "PK\\x03\\x04"),
NEP 1 (.npy magic "\\x93NUMPY").
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr

from pipeline.errors import (
    ConfigError,
    MissingAttributeError,
    NonFiniteDataError,
    ShapeError,
    SignError,
    UnitsError,
    UnreadableFileError,
)
from pipeline.io import (
    file_sha256,
    find_inputs,
    read_file,
    write_raw_netcdf,
    write_raw_npz,
    write_raw_textgrid,
)
from pipeline.model import get_warnings, make_curves, make_raw_frame, validate_raw_frame

START = "2026-03-14T22:05:11"
NY, NX = 6, 5


def frame_attrs(mode: str = "constant-current", **over: object) -> dict[str, object]:
    a: dict[str, object] = dict(
        mode=mode, bias_V=0.5, scan_size_x_m=2e-8, scan_size_y_m=1.5e-8, line_time_s=0.05,
        start_time=START)
    if mode == "constant-current":
        a["setpoint_A"] = 1e-10
    a.update(over)
    return {k: v for k, v in a.items() if v is not None}


def cc_frame(*, z_units: str = "m", backward: bool = False, seed: int = 0,
             **attrs: object) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    scale = {"m": 1e-10, "nm": 0.1, "pm": 100.0, "V": 0.05}[z_units]
    z = rng.normal(size=(NY, NX)) * scale
    cur = 1e-10 + rng.normal(size=(NY, NX)) * 1e-12
    extra = {}
    if backward:
        extra = dict(z_backward=z + rng.normal(size=z.shape) * scale * 0.01,
                     current_backward=cur + rng.normal(size=z.shape) * 1e-12)
    return make_raw_frame(z=z, current=cur, z_units=z_units, **extra,
                          attrs=frame_attrs("constant-current", **attrs))


def ch_frame(current: np.ndarray | None = None, *, seed: int = 0, **attrs: object) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    if current is None:
        current = 1e-10 * np.exp(rng.normal(size=(NY, NX)) * 0.3)
    return make_raw_frame(current=current, attrs=frame_attrs("constant-height", **attrs))


def curves(n_curves: int | None = None, n: int = 40, **attrs: object) -> xr.Dataset:
    z = np.linspace(0.0, 5e-10, n)
    cur = 1e-9 * np.exp(-2.2e10 * z)
    if n_curves is not None:
        z = np.tile(z, (n_curves, 1))
        cur = cur * np.arange(1, n_curves + 1)[:, None]
    a: dict[str, object] = dict(bias_V=0.1, start_time=START, position_x_m=1e-9)
    a.update(attrs)
    ds = make_curves(z, cur, attrs=a)
    if n_curves is None:  # 1-D variables (dim sample) as a file may hold them
        ds = xr.Dataset({k: (("sample",), ds[k].values[0], ds[k].attrs) for k in ds.data_vars},
                        attrs=ds.attrs)
    return ds


def write(ds: xr.Dataset, folder: Path, fmt: str, stem: str = "f012",
          channel: str | None = None) -> Path:
    path = folder / f"{stem}.{fmt}"
    if fmt in ("nc", "h5"):
        return write_raw_netcdf(ds, path)
    if fmt == "npz":
        return write_raw_npz(ds, path)[0]
    assert channel is not None
    return write_raw_textgrid(ds, path, channel=channel)[0]


def expected(ds: xr.Dataset, path: Path) -> xr.Dataset:
    """What read_file must return: the original through the validator, with provenance."""
    src = str(path.absolute())
    a = dict(ds.attrs, source_file=src, source_sha256=hashlib.sha256(path.read_bytes()).hexdigest(),
             source_stem=path.stem, frame_id=path.stem)
    side = path.with_suffix(".toml")
    if side.is_file():  # sidecar formats: the sidecar's own hash (an edit changes the data)
        a["source_sidecar_sha256"] = hashlib.sha256(side.read_bytes()).hexdigest()
    return validate_raw_frame(ds.assign_attrs(a), source=src)


def m(path: Path, problem: str) -> str:
    """A match pattern: the message starts with the file path and names the problem."""
    return "^" + re.escape(str(path.absolute())) + ".*" + problem


# --------------------------------------------------------------------------------------------
# round trips
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["nc", "h5", "npz"])
@pytest.mark.parametrize("backward", [False, True])
def test_constant_current_round_trip(tmp_path: Path, fmt: str, backward: bool) -> None:
    ds = cc_frame(backward=backward, slow_direction="decreasing", current_limit_A=1e-8)
    path = write(ds, tmp_path, fmt)
    out = read_file(path)
    # exact: the written arrays are the reference
    xr.testing.assert_identical(out, expected(ds, path))
    np.testing.assert_array_equal(out["z"].values, ds["z"].values)
    assert out.attrs["source_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert out.attrs["source_file"] == str(path.absolute())
    assert out.attrs["frame_id"] == "f012"
    assert out.attrs["slow_direction"] == "decreasing"
    assert get_warnings(out) == []
    assert ("z_backward" in out) is backward


@pytest.mark.parametrize("fmt", ["nc", "npz"])
def test_constant_height_round_trip(tmp_path: Path, fmt: str) -> None:
    ds = ch_frame()
    path = write(ds, tmp_path, fmt)
    out = read_file(path)
    xr.testing.assert_identical(out, expected(ds, path))
    assert "z" not in out and out.attrs["mode"] == "constant-height"


@pytest.mark.parametrize("fmt", ["nc", "npz", "csv"])
def test_z_in_volts_scaled_by_file_piezo(tmp_path: Path, fmt: str) -> None:
    ds = cc_frame(z_units="V", piezo_z_m_per_V=2.5e-9)
    path = write(ds, tmp_path, fmt, channel="z")
    out = read_file(path)
    # z[m] = z[V] * piezo_z_m_per_V (definition of the sensitivity)
    np.testing.assert_allclose(out["z"].values, ds["z"].values * 2.5e-9, rtol=1e-15)
    assert out["z"].attrs["units"] == "m"


def test_config_piezo_overrides_file(tmp_path: Path) -> None:
    ds = cc_frame(z_units="V", piezo_z_m_per_V=2.5e-9)
    path = write(ds, tmp_path, "npz")
    out = read_file(path, piezo_z_m_per_V=3e-9)
    np.testing.assert_allclose(out["z"].values, ds["z"].values * 3e-9, rtol=1e-15)
    assert out.attrs["piezo_z_m_per_V"] == 3e-9
    assert out.attrs["piezo_z_m_per_V_file"] == 2.5e-9


def test_config_piezo_supplies_missing_attr(tmp_path: Path) -> None:
    path = write(cc_frame(z_units="V"), tmp_path, "nc")
    with pytest.raises(MissingAttributeError, match=m(path, "'piezo_z_m_per_V' is missing")):
        read_file(path)
    out = read_file(path, piezo_z_m_per_V=2e-9)
    assert np.isfinite(out["z"].values).all()


@pytest.mark.parametrize("bad", [0.0, -1e-9, float("nan")])
def test_bad_piezo_override(tmp_path: Path, bad: float) -> None:
    path = write(cc_frame(), tmp_path, "npz")
    with pytest.raises(ConfigError, match=r"piezo_z_m_per_V.*positive"):
        read_file(path, piezo_z_m_per_V=bad)


@pytest.mark.parametrize(("units", "factor"), [("nm", 1e-9), ("pm", 1e-12)])
def test_z_units_converted(tmp_path: Path, units: str, factor: float) -> None:
    ds = cc_frame(z_units=units)
    out = read_file(write(ds, tmp_path, "nc"))
    np.testing.assert_allclose(out["z"].values, ds["z"].values * factor, rtol=1e-15)  # SI prefix


@pytest.mark.parametrize(("fmt", "mode", "channel"),
                         [("csv", "constant-height", "current"), ("txt", "constant-height",
                                                                  "current"),
                          ("txt", "constant-current", "z"), ("csv", "constant-current", "z")])
def test_textgrid_round_trip(tmp_path: Path, fmt: str, mode: str, channel: str) -> None:
    full = ch_frame() if mode == "constant-height" else cc_frame()
    ds = full[[channel]]
    path = write(ds, tmp_path, fmt, channel=channel)
    out = read_file(path)
    # 17 significant digits round-trip float64 exactly (IEEE 754-2019, 5.12.2)
    np.testing.assert_array_equal(out[channel].values, ds[channel].values)
    xr.testing.assert_identical(out, expected(ds, path))


@pytest.mark.parametrize("fmt", ["nc", "npz"])
@pytest.mark.parametrize("n_curves", [None, 3])
def test_curves_round_trip(tmp_path: Path, fmt: str, n_curves: int | None) -> None:
    ds = curves(n_curves)
    path = write(ds, tmp_path, fmt)
    out = read_file(path)
    assert out["z"].dims == ("curve", "sample")
    assert out.sizes["curve"] == (n_curves or 1)
    np.testing.assert_array_equal(np.atleast_2d(ds["current"].values), out["current"].values)
    np.testing.assert_array_equal(np.atleast_2d(ds["z"].values), out["z"].values)
    assert out.attrs["kind"] == "curve"
    assert out.attrs["curve_set_id"] == "f012"
    assert out.attrs["position_x_m"] == 1e-9
    assert out.attrs["source_sha256"] == file_sha256(path)


def test_curves_in_nm_and_pA(tmp_path: Path) -> None:
    ds = curves(2)
    ds["z"] = ds["z"] * 1e9
    ds["z"].attrs["units"] = "nm"
    ds["current"] = ds["current"] * 1e12
    ds["current"].attrs["units"] = "pA"
    src = curves(2)
    out = read_file(write(ds, tmp_path, "npz"))
    np.testing.assert_allclose(out["z"].values, src["z"].values, rtol=1e-14)  # SI prefixes
    np.testing.assert_allclose(out["current"].values, src["current"].values, rtol=1e-14)


def test_frame_id_from_file_is_sanitised(tmp_path: Path) -> None:
    out = read_file(write(cc_frame(frame_id="../evil id"), tmp_path, "nc"))
    assert out.attrs["frame_id"] == "__evil_id"  # no dots in front, no slash
    out = read_file(write(cc_frame(), tmp_path, "npz", stem="scan 7"))
    assert out.attrs["frame_id"] == "scan_7"


def test_plain_hdf5_file_is_readable(tmp_path: Path) -> None:
    """An .h5 written with plain h5py (no netCDF dimension scales) reads as rows = y."""
    path = tmp_path / "plain.h5"
    cur = np.full((4, 7), 2e-10)
    with h5py.File(path, "w") as f:
        f["current"] = cur
        f["current"].attrs["units"] = b"A"
        for k, v in frame_attrs("constant-height", kind="frame").items():
            f.attrs[k] = v
    out = read_file(path)
    assert out["current"].dims == ("y", "x") and out.sizes == {"y": 4, "x": 7}
    assert out.attrs["mode"] == "constant-height"


def test_attributes_are_plain_python(tmp_path: Path) -> None:
    out = read_file(write(cc_frame(), tmp_path, "nc"))
    assert type(out.attrs["bias_V"]) is float
    assert type(out.attrs["mode"]) is str


# --------------------------------------------------------------------------------------------
# non-finite pixels, zero channels, sign
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["nc", "npz", "csv"])
def test_last_rows_not_recorded_accepted_with_warning(tmp_path: Path, fmt: str) -> None:
    ds = ch_frame()
    ds["current"][-2:, :] = np.nan  # scan stopped early: 2 of 6 lines missing
    out = read_file(write(ds, tmp_path, fmt, channel="current"))
    # 10 of 30 pixels = 33.3 %
    assert get_warnings(out) == [
        "current: 33.3% of pixels not recorded (NaN/Inf), 2 whole line(s); flagged"]
    assert np.isnan(out["current"].values[-2:]).all()


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_few_bad_pixels_accepted_with_warning(tmp_path: Path, bad: float) -> None:
    ds = cc_frame()
    ds["z"][1, 2] = bad
    ds["z"][3, 0] = bad
    out = read_file(write(ds, tmp_path, "npz"))
    assert get_warnings(out) == ["z: 6.7% of pixels not recorded (NaN/Inf); flagged"]  # 2/30


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_mostly_nonfinite_channel_is_error(tmp_path: Path, bad: float) -> None:
    ds = ch_frame()
    ds["current"][:4, :] = bad  # 20 of 30 pixels
    path = write(ds, tmp_path, "nc")
    with pytest.raises(NonFiniteDataError, match=m(path, "'current' is 67% NaN/Inf")):
        read_file(path)


@pytest.mark.parametrize(("fmt", "channel"), [("npz", "current"), ("nc", "z"), ("csv", "z")])
def test_all_zero_channel_is_error(tmp_path: Path, fmt: str, channel: str) -> None:
    ds = ch_frame(np.zeros((NY, NX))) if channel == "current" else cc_frame()
    if channel == "z":
        ds["z"][:] = 0.0
        ds = ds[["z"]] if fmt == "csv" else ds
    path = write(ds, tmp_path, fmt, channel=channel)
    with pytest.raises(NonFiniteDataError, match=m(path, f"'{channel}' is zero everywhere")):
        read_file(path)


@pytest.mark.parametrize("bias", [0.5, -0.5])
def test_current_sign_contradicting_bias_is_error(tmp_path: Path, bias: float) -> None:
    rng = np.random.default_rng(3)
    wrong = -np.sign(bias) * 1e-10 * np.exp(rng.normal(size=(NY, NX)) * 0.2)
    path = write(ch_frame(wrong, bias_V=bias), tmp_path, "npz")
    with pytest.raises(SignError, match=m(path, f"throughout.*bias_V = {bias:g} V")):
        read_file(path)


def test_curve_sign_contradicting_bias_is_error(tmp_path: Path) -> None:
    ds = curves(2, bias_V=-0.2)  # positive current with a negative bias
    path = write(ds, tmp_path, "nc")
    with pytest.raises(SignError, match=m(path, r"current\[0\].*bias_V = -0.2")):
        read_file(path)


@pytest.mark.parametrize("bias", [0.5, -0.5])
def test_noise_near_zero_of_either_sign_is_data(tmp_path: Path, bias: float) -> None:
    rng = np.random.default_rng(4)
    signal = np.sign(bias) * 1e-10 * np.exp(rng.normal(size=(NY, NX)) * 0.2)
    signal[:3] = rng.normal(size=(3, NX)) * 1e-13  # half the frame at the noise floor
    out = read_file(write(ch_frame(signal, bias_V=bias), tmp_path, "nc"))
    assert (out["current"].values < 0).any() and (out["current"].values > 0).any()
    pure = rng.normal(size=(NY, NX)) * 1e-13  # pure noise: median ~ 0, half of each sign
    out = read_file(write(ch_frame(pure, bias_V=bias), tmp_path, "npz"))
    np.testing.assert_array_equal(out["current"].values, pure)


# --------------------------------------------------------------------------------------------
# missing / wrong attributes, units, shapes
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["npz", "nc"])
@pytest.mark.parametrize("name", ["bias_V", "setpoint_A", "mode", "scan_size_x_m",
                                  "scan_size_y_m", "line_time_s", "start_time"])
def test_missing_required_attr(tmp_path: Path, fmt: str, name: str) -> None:
    ds = cc_frame()
    del ds.attrs[name]
    path = write(ds, tmp_path, fmt)
    with pytest.raises(MissingAttributeError, match=m(path, f"attribute '{name}' is missing")):
        read_file(path)


def test_setpoint_not_needed_for_constant_height(tmp_path: Path) -> None:
    ds = ch_frame()
    assert "setpoint_A" not in ds.attrs
    read_file(write(ds, tmp_path, "npz"))


@pytest.mark.parametrize(("name", "value", "problem"), [
    ("mode", "constant_current", "'mode' = 'constant_current'; expected one of"),
    ("mode", "topography", "'mode' = 'topography'; expected one of"),
    ("start_time", "last night", "'start_time' = 'last night' is not an ISO 8601 time"),
    ("scan_size_x_m", -1e-8, "'scan_size_x_m' = -1e-08 must be a positive"),
    ("line_time_s", 0.0, "'line_time_s' = 0.0 must be a positive"),
    ("bias_V", "half a volt", "'bias_V' = 'half a volt' is not a number"),
    ("slow_direction", "up", "'slow_direction' = 'up'; expected"),
    ("setpoint_A", 0.0, "must be non-zero with the sign of the bias"),
    ("setpoint_A", -1e-10, "'setpoint_A' = -1e-10 with bias_V"),
])
def test_bad_attr_value(tmp_path: Path, name: str, value: object, problem: str) -> None:
    ds = cc_frame().assign_attrs({name: value})
    path = write(ds, tmp_path, "npz")
    with pytest.raises(MissingAttributeError, match=m(path, re.escape(problem))):
        read_file(path)


@pytest.mark.parametrize("fmt", ["npz", "nc", "txt"])
def test_missing_kind(tmp_path: Path, fmt: str) -> None:
    ds = ch_frame()
    del ds.attrs["kind"]
    path = write(ds, tmp_path, fmt, channel="current")
    with pytest.raises(MissingAttributeError,
                       match=m(path, "attribute 'kind' is missing.*'frame' or 'curve'")):
        read_file(path)


def test_unknown_kind(tmp_path: Path) -> None:
    path = write(ch_frame().assign_attrs(kind="spectrum"), tmp_path, "nc")
    with pytest.raises(MissingAttributeError, match=m(path, "'kind' = 'spectrum'; expected")):
        read_file(path)


@pytest.mark.parametrize(("var", "units", "err_units"), [
    ("z", "mm", "'mm'"), ("z", "angstrom", "'angstrom'"), ("current", "mA", "'mA'"),
    ("current", "", "''")])
def test_wrong_units(tmp_path: Path, var: str, units: str, err_units: str) -> None:
    ds = cc_frame()
    ds[var].attrs["units"] = units
    path = write(ds, tmp_path, "nc")
    with pytest.raises(UnitsError, match=m(path, f"'{var}' has units {err_units}; expected")):
        read_file(path)


def test_npz_variable_without_units_table(tmp_path: Path) -> None:
    ds = ch_frame()
    ds["current"].attrs = {}
    path = write(ds, tmp_path, "npz")
    with pytest.raises(UnitsError, match=m(path, "'current' has units ''")):
        read_file(path)


def test_textgrid_without_units(tmp_path: Path) -> None:
    ds = ch_frame()
    ds["current"].attrs = {}
    path = write(ds, tmp_path, "csv", channel="current")
    with pytest.raises(UnitsError, match=m(path, "'current' has units ''")):
        read_file(path)


@pytest.mark.parametrize(("var", "units"), [("z", "V"), ("current", "nm")])
def test_curve_wrong_units(tmp_path: Path, var: str, units: str) -> None:
    ds = curves(2)
    ds[var].attrs["units"] = units
    path = write(ds, tmp_path, "npz")
    with pytest.raises(UnitsError, match=m(path, f"'{var}' has units '{units}'")):
        read_file(path)


@pytest.mark.parametrize("name", ["bias_V", "start_time"])
def test_curve_missing_attr(tmp_path: Path, name: str) -> None:
    ds = curves(2)
    del ds.attrs[name]
    path = write(ds, tmp_path, "nc")
    with pytest.raises(MissingAttributeError, match=m(path, f"'{name}' is missing")):
        read_file(path)


def test_one_dimensional_frame(tmp_path: Path) -> None:
    ds = xr.Dataset({"current": (("x",), np.full(30, 1e-10), {"units": "A"})},
                    attrs=dict(frame_attrs("constant-height"), kind="frame"))
    for fmt in ("npz", "nc"):
        path = write(ds, tmp_path, fmt)
        with pytest.raises(ShapeError, match=m(path, "'current' has 1 dimension.*2-D")):
            read_file(path)


def test_mismatched_channels(tmp_path: Path) -> None:
    ds = cc_frame()
    ds2 = xr.Dataset({"z": (("a", "b"), ds["z"].values[:, :4], ds["z"].attrs),
                      "current": (("y", "x"), ds["current"].values, ds["current"].attrs)},
                     attrs=ds.attrs)
    for fmt in ("npz", "nc"):
        path = write(ds2, tmp_path, fmt)
        with pytest.raises(ShapeError, match=m(path, r"has shape \(6, 4\), expected \(6, 5\)")):
            read_file(path)


def test_frame_too_small(tmp_path: Path) -> None:
    ds = ch_frame(np.full((1, 8), 1e-10))
    path = write(ds, tmp_path, "txt", channel="current")
    with pytest.raises(ShapeError, match=m(path, r"shape \(1, 8\) is too small")):
        read_file(path)


def test_transposed_netcdf_dims(tmp_path: Path) -> None:
    ds = ch_frame()
    ds = ds.drop_vars(["x", "y"]).transpose("x", "y")
    path = write(ds, tmp_path, "nc")
    with pytest.raises(ShapeError, match=m(path, r"'current' has dims \(x, y\).*\(y, x\)")):
        read_file(path)


@pytest.mark.parametrize("fmt", ["npz", "nc"])
def test_curves_mismatched_lengths(tmp_path: Path, fmt: str) -> None:
    ds = xr.Dataset({"z": (("sample",), np.linspace(0, 5e-10, 20), {"units": "m"}),
                     "current": (("n",), np.full(19, 1e-10), {"units": "A"})},
                    attrs=dict(kind="curve", bias_V=0.1, start_time=START))
    path = write(ds, tmp_path, fmt)
    with pytest.raises(ShapeError, match=m(path, r"'z' \(20,\) and 'current' \(19,\)")):
        read_file(path)


def test_curves_too_short(tmp_path: Path) -> None:
    path = write(curves(None, n=3), tmp_path, "npz")
    with pytest.raises(ShapeError, match=m(path, "3 samples; at least 5")):
        read_file(path)


def test_curve_entirely_nan(tmp_path: Path) -> None:
    ds = curves(2)
    ds["current"][1, :] = np.nan
    path = write(ds, tmp_path, "nc")
    with pytest.raises(NonFiniteDataError, match=m(path, "curve 1 is entirely NaN")):
        read_file(path)


# --------------------------------------------------------------------------------------------
# unreadable files
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["nc", "h5", "npz"])
@pytest.mark.parametrize("fraction", [0.5, 0.1])
def test_truncated_binary_file(tmp_path: Path, fmt: str, fraction: float) -> None:
    path = write(cc_frame(), tmp_path, fmt)
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * fraction)])
    with pytest.raises(UnreadableFileError, match=m(path, "damaged or truncated")):
        read_file(path)


def test_truncated_textgrid(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "csv", channel="current")
    text = path.read_text()
    path.write_text(text[: len(text) // 2 + 7])  # cut inside a row
    with pytest.raises(UnreadableFileError, match=m(path, "not a grid of numbers")):
        read_file(path)


@pytest.mark.parametrize("fmt", ["nc", "h5"])
def test_non_hdf5_file_named_nc(tmp_path: Path, fmt: str) -> None:
    path = tmp_path / f"scan.{fmt}"
    path.write_text("this is a note, not a scan\n")
    with pytest.raises(UnreadableFileError, match=m(path, "not a netCDF4/HDF5 file")):
        read_file(path)


def test_hdf5_signature_after_user_block(tmp_path: Path) -> None:
    """HDF5 allows a user block of 512·2^k bytes before the superblock (HDF5 spec)."""
    path = tmp_path / "ub.h5"
    with h5py.File(path, "w", userblock_size=1024) as f:
        f["current"] = np.full((3, 3), 1e-10)
        f["current"].attrs["units"] = "A"
        for k, v in frame_attrs("constant-height", kind="frame").items():
            f.attrs[k] = v
    assert path.read_bytes()[:8] != b"\x89HDF\r\n\x1a\n"
    assert read_file(path).sizes == {"y": 3, "x": 3}


def test_netcdf3_classic(tmp_path: Path) -> None:
    path = tmp_path / "old.nc"
    ds = ch_frame()
    del ds.attrs["mode"]  # scipy's netCDF3 writer keeps attributes on itself; 'mode' clashes
    ds.to_netcdf(path, engine="scipy")  # netCDF3 classic writer
    assert path.read_bytes()[:4] in (b"CDF\x01", b"CDF\x02")
    with pytest.raises(UnreadableFileError,
                       match=m(path, "netCDF3 classic format is not supported; convert it to "
                                     "netCDF4")):
        read_file(path)


@pytest.mark.parametrize("fmt", ["nc", "npz", "txt"])
def test_empty_file(tmp_path: Path, fmt: str) -> None:
    path = write(ch_frame(), tmp_path, fmt, channel="current")
    path.write_bytes(b"")
    with pytest.raises(UnreadableFileError, match=m(path, "empty|no numbers")):
        read_file(path)


@pytest.mark.parametrize("fmt", ["npz", "csv"])
def test_data_file_without_sidecar(tmp_path: Path, fmt: str) -> None:
    path = write(ch_frame(), tmp_path, fmt, channel="current")
    path.with_suffix(".toml").unlink()
    with pytest.raises(UnreadableFileError, match=m(path, "sidecar f012.toml not found")):
        read_file(path)


def test_sidecar_without_array_file(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    path.unlink()
    side = path.with_suffix(".toml")
    assert find_inputs(tmp_path) == [side]
    with pytest.raises(UnreadableFileError, match=m(side, "sidecar without its array file.*"
                                                          r"\.npz")):
        read_file(side)


def test_npz_object_array_refused(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    np.savez(path, current=np.array([[1e-10, "x"], [None, 2]], dtype=object))
    with pytest.raises(UnreadableFileError,
                       match=m(path, "array 'current' holds Python objects; pickled data is "
                                     "refused")):
        read_file(path)


def test_npz_string_array_refused(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    np.savez(path, current=np.array([["a", "b"], ["c", "d"]]))
    with pytest.raises(UnreadableFileError, match=m(path, "'current' holds <U1 values; expected "
                                                          "real numbers")):
        read_file(path)


def test_single_npy_named_npz(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    with open(path, "wb") as fh:
        np.save(fh, np.ones((3, 3)))
    with pytest.raises(UnreadableFileError, match=m(path, r"single \.npy array")):
        read_file(path)


def test_invalid_sidecar_toml(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    path.with_suffix(".toml").write_text('mode = "constant-height\nbias_V = \n')
    with pytest.raises(UnreadableFileError, match=m(path, "sidecar .*f012.toml is not valid TOML")):
        read_file(path)


def test_sidecar_table_for_missing_array(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    side = path.with_suffix(".toml")
    side.write_text(side.read_text() + '\n[curent]\nunits = "A"\n')
    with pytest.raises(UnreadableFileError, match=m(path, r"table\(s\) \[curent\] but the archive "
                                                          "has no such array")):
        read_file(path)


def test_sidecar_nested_table(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    side = path.with_suffix(".toml")
    side.write_text(side.read_text() + '\n[current.extra]\nunits = "A"\n')
    with pytest.raises(UnreadableFileError, match=m(path, r"\[current.extra\] is nested")):
        read_file(path)


def test_sidecar_toml_datetime_becomes_iso_string(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "npz")
    side = path.with_suffix(".toml")
    side.write_text(side.read_text().replace(f'"{START}"', START))  # unquoted TOML datetime
    assert read_file(path).attrs["start_time"] == START


@pytest.mark.parametrize(("line", "problem"), [
    ("", "key 'channel' is missing"), ('channel = "height"', "channel = 'height'; expected")])
def test_textgrid_bad_channel(tmp_path: Path, line: str, problem: str) -> None:
    path = write(ch_frame(), tmp_path, "txt", channel="current")
    side = path.with_suffix(".toml")
    text = re.sub(r'(?m)^channel = "current"$', line, side.read_text())
    side.write_text(text)
    with pytest.raises(MissingAttributeError, match=m(path, re.escape(problem))):
        read_file(path)


def test_textgrid_with_header(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "txt", channel="current")
    path.write_text("# current map\n" + path.read_text())
    with pytest.raises(UnreadableFileError, match=m(path, "not a grid of numbers")):
        read_file(path)


def test_textgrid_binary(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "txt", channel="current")
    path.write_bytes(b"\x00\x01\x02binary")
    with pytest.raises(UnreadableFileError, match=m(path, "binary content")):
        read_file(path)
    path.write_bytes(b"\xff\xfe1 2\n")
    with pytest.raises(UnreadableFileError, match=m(path, "not UTF-8")):
        read_file(path)


def test_textgrid_sidecar_with_tables(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "csv", channel="current")
    side = path.with_suffix(".toml")
    side.write_text(side.read_text() + '\n[current]\nunits = "A"\n')
    with pytest.raises(UnreadableFileError, match=m(path, "top-level keys only")):
        read_file(path)


def test_textgrid_mixed_comma_and_space(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "csv", channel="current")
    path.write_text("1e-10, 2e-10,3e-10\n nan ,4e-10,5e-10\n")
    out = read_file(path)
    np.testing.assert_array_equal(out["current"].values,
                                  [[1e-10, 2e-10, 3e-10], [np.nan, 4e-10, 5e-10]])


def test_missing_file_and_unknown_suffix(tmp_path: Path) -> None:
    with pytest.raises(UnreadableFileError, match=m(tmp_path / "nope.nc", "file not found")):
        read_file(tmp_path / "nope.nc")
    odd = tmp_path / "scan.dat"
    odd.write_bytes(b"123")
    with pytest.raises(UnreadableFileError, match=m(odd, r"no reader for suffix '\.dat'")):
        read_file(odd)
    with pytest.raises(UnreadableFileError, match=m(tmp_path, "not a regular file")):
        read_file(tmp_path)


def test_uppercase_suffix(tmp_path: Path) -> None:
    path = write(ch_frame(), tmp_path, "nc")
    upper = path.rename(tmp_path / "F013.NC")
    assert read_file(upper).attrs["frame_id"] == "F013"


# --------------------------------------------------------------------------------------------
# find_inputs and file_sha256
# --------------------------------------------------------------------------------------------


def test_find_inputs(tmp_path: Path) -> None:
    ds = ch_frame()
    write(ds, tmp_path, "nc", stem="a")
    write(ds, tmp_path, "npz", stem="b")
    write(ds, tmp_path, "csv", stem="c", channel="current")
    write(ds, tmp_path, "nc", stem="c")  # a .toml with two same-stem data files
    orphan = write(ds, tmp_path, "npz", stem="d")
    orphan.unlink()  # leaves d.toml, with kind = "frame"
    (tmp_path / "settings.toml").write_text("[drift]\nenabled = false\n")  # a config: no input
    (tmp_path / "notes.md").write_text("night 3")
    (tmp_path / ".hidden.nc").write_bytes(b"x")
    write(ds, tmp_path / ".staging", "nc", stem="s")
    write(ds, tmp_path / "truth", "nc", stem="t")
    write(ds, tmp_path / "sub", "nc", stem="e")
    write(ds, tmp_path / "sub" / "truth", "nc", stem="u")
    (tmp_path / "store.h5").write_bytes(b"x")

    names = [p.relative_to(tmp_path).as_posix() for p in find_inputs(tmp_path)]
    assert names == ["a.nc", "b.npz", "c.csv", "c.nc", "d.toml", "store.h5"]
    found = find_inputs(tmp_path, recursive=True, exclude=[tmp_path / "store.h5"])
    names = [p.relative_to(tmp_path).as_posix() for p in found]
    assert names == ["a.nc", "b.npz", "c.csv", "c.nc", "d.toml", "sub/e.nc"]
    assert all(p.is_absolute() == tmp_path.is_absolute() for p in found)


def test_find_inputs_not_a_folder(tmp_path: Path) -> None:
    with pytest.raises(UnreadableFileError, match=re.escape(str(tmp_path / "none")) +
                       ": run folder not found"):
        find_inputs(tmp_path / "none")


def test_find_inputs_invalid_unpaired_toml_is_reported(tmp_path: Path) -> None:
    (tmp_path / "broken.toml").write_text("kind = \n")
    assert find_inputs(tmp_path) == [tmp_path / "broken.toml"]


def test_file_sha256(tmp_path: Path) -> None:
    p = tmp_path / "abc.bin"
    p.write_bytes(b"abc")
    # FIPS 180-2, Appendix B.1: SHA-256("abc")
    assert file_sha256(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = np.random.default_rng(0).bytes(3 * 2**20 + 17)  # several chunks
    p.write_bytes(big)
    assert file_sha256(p) == hashlib.sha256(big).hexdigest()  # reference: hashlib
    with pytest.raises(UnreadableFileError, match=r"nothing\.bin: cannot read"):
        file_sha256(tmp_path / "nothing.bin")


def test_read_file_does_not_leave_file_open(tmp_path: Path) -> None:
    """The netCDF file is closed after reading: it can be replaced and re-read at once."""
    path = write(cc_frame(seed=1), tmp_path, "nc")
    first = read_file(path)
    write(cc_frame(seed=2), tmp_path, "nc")
    second = read_file(path)
    assert first.attrs["source_sha256"] != second.attrs["source_sha256"]
    assert not np.array_equal(first["z"].values, second["z"].values)
    assert json.loads(second.attrs["warnings"]) == []
