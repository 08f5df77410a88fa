"""The h5py fast path for grids gives what xarray's netCDF backend gives, both ways.

Reference: xarray ``to_netcdf`` / ``open_dataset(engine="h5netcdf")`` (a reference library): a grid
written by :func:`write_grid_file` must read back through xarray identical (values, dtypes,
attributes and their types) to the same grid written by xarray, and :func:`read_grid_file` must
return for either file exactly what xarray returns.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.io.h5grid import is_grid, read_grid_file, write_grid_file
from pipeline.io.netcdf import NETCDF_READER
from pipeline.io.staging import netcdf_safe


def _xr_read(path) -> xr.Dataset:
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        return ds.load()


def _grid(ny: int = 5, nx: int = 7, seed: int = 0) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    height = rng.normal(0, 1e-10, (ny, nx)).astype(np.float32)
    height[0, 0] = np.nan
    return netcdf_safe(xr.Dataset(
        {
            "height": (("y", "x"), height, {"units": "m", "long_name": "height"}),
            "flags": (("y", "x"), rng.integers(0, 255, (ny, nx)).astype(np.uint8),
                      {"flag_masks": np.array([1, 2, 4], np.uint8), "flag_meanings": "a b c"}),
            "terrace": (("y", "x"), rng.integers(-1, 3, (ny, nx)).astype(np.int16)),
            "mask": (("y", "x"), rng.random((ny, nx)) > 0.5),
            "wide": (("y", "x"), rng.normal(size=(ny, nx))),
        },
        coords={"y": ("y", np.linspace(-1e-9, 1e-9, ny), {"units": "m"}),
                "x": ("x", np.linspace(-2e-9, 2e-9, nx), {"units": "m"})},
        attrs={"mode": "constant-current", "bias_V": 0.5, "n_terraces": 3, "ok": True,
               "offsets_m": np.array([0.0, 2.35e-10]), "single": np.array([7.0]),
               "counts": [3, 4, 5], "warnings": "[]", "unicode": "Au(111) \u00e5",
               "empty": ""}))


def _assert_same(a: xr.Dataset, b: xr.Dataset) -> None:
    xr.testing.assert_identical(a, b)
    for name in a.variables:
        assert a[name].dtype == b[name].dtype, name
    for key in a.attrs:
        assert type(a.attrs[key]) is type(b.attrs[key]), key


def test_fast_write_reads_back_through_xarray_as_xarray_wrote_it(tmp_path):
    ds = _grid()
    write_grid_file(tmp_path / "fast.nc", ds)
    ds.to_netcdf(tmp_path / "xr.nc", engine="h5netcdf")
    _assert_same(_xr_read(tmp_path / "fast.nc"), _xr_read(tmp_path / "xr.nc"))


@pytest.mark.parametrize("writer", ["fast", "xarray"])
def test_fast_read_equals_xarray_read(tmp_path, writer):
    ds = _grid(seed=1)
    path = tmp_path / "g.nc"
    if writer == "fast":
        write_grid_file(path, ds)
    else:
        ds.to_netcdf(path, engine="h5netcdf")
    _assert_same(read_grid_file(path), _xr_read(path))
    # a 1-element array attribute comes back as its element, as h5netcdf gives it
    assert read_grid_file(path).attrs["single"] == 7.0


def test_reading_some_variables(tmp_path):
    write_grid_file(tmp_path / "g.nc", _grid())
    part = read_grid_file(tmp_path / "g.nc", ["height"])
    assert list(part.data_vars) == ["height"]
    assert set(part.coords) == {"x", "y"} and part.attrs["mode"] == "constant-current"
    with pytest.raises(ValueError, match="no variable"):
        read_grid_file(tmp_path / "g.nc", ["nope"])


def test_what_xarray_would_decode_is_refused(tmp_path):
    # packed (scale_factor), masked (integer _FillValue), phony dimensions, strings: the
    # caller must go through xarray for these
    packed = xr.Dataset({"z": (("y", "x"), np.ones((3, 4)))},
                        coords={"y": np.arange(3.0), "x": np.arange(4.0)})
    packed["z"].encoding.update(dtype="int16", scale_factor=0.01, _FillValue=-32768)
    packed.to_netcdf(tmp_path / "packed.nc", engine="h5netcdf")
    masked = xr.Dataset({"n": (("y", "x"), np.ones((3, 4), np.int32))},
                        coords={"y": np.arange(3.0), "x": np.arange(4.0)})
    masked["n"].encoding["_FillValue"] = -1
    masked.to_netcdf(tmp_path / "masked.nc", engine="h5netcdf")
    xr.Dataset({"z": (("y", "x"), np.ones((3, 4)))}).to_netcdf(tmp_path / "phony.nc",
                                                              engine="h5netcdf")
    with h5py.File(tmp_path / "plain.h5", "w") as f:
        f["z"] = np.ones((3, 4))
    for name, match in (("packed.nc", "CF-encoded"), ("masked.nc", "fill value"),
                        ("phony.nc", "no coordinate variable"),
                        ("plain.h5", "no netCDF-4 dimension ids")):
        with pytest.raises(ValueError, match=match):
            read_grid_file(tmp_path / name)
    # ...and the raw-file reader still decodes the packed file (through xarray)
    np.testing.assert_allclose(NETCDF_READER.read(tmp_path / "packed.nc")["z"].values, 1.0)


def test_non_grids_are_not_written(tmp_path):
    strings = xr.Dataset({"name": (("x",), np.array(["a", "b"]))}, coords={"x": [0.0, 1.0]})
    no_coord = xr.Dataset({"z": (("y", "x"), np.ones((2, 2)))})
    for ds in (strings, no_coord):
        assert not is_grid(ds)
        with pytest.raises(ValueError, match="not a grid"):
            write_grid_file(tmp_path / "g.nc", ds)


_attr_values = st.one_of(
    st.text(max_size=20) | st.just("a\x00b"),
    st.integers(-2**40, 2**40),
    st.floats(allow_nan=False, width=64),
    st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=1, max_size=4).map(
        np.array),
    st.lists(st.integers(-100, 100), min_size=1, max_size=4).map(lambda v: np.array(v,
                                                                                    np.int32)),
)


@settings(max_examples=40, deadline=None)
@given(attrs=st.dictionaries(st.from_regex(r"[a-z][a-z_]{0,10}", fullmatch=True),
                             _attr_values, max_size=6),
       dtype=st.sampled_from(["float32", "float64", "uint8", "int16", "int64"]))
def test_property_fast_path_matches_xarray(tmp_path_factory, attrs, dtype):
    tmp = tmp_path_factory.mktemp("grid")
    # as the store writes them: through netcdf_safe (which drops NUL characters, which neither
    # path can write)
    ds = netcdf_safe(xr.Dataset(
        {"v": (("y", "x"), np.arange(6).reshape(2, 3).astype(dtype), attrs)},
        coords={"y": [0.0, 1.0], "x": [0.0, 1.0, 2.0]}, attrs=attrs))
    write_grid_file(tmp / "fast.nc", ds)
    ds.to_netcdf(tmp / "xr.nc", engine="h5netcdf")
    reference = _xr_read(tmp / "xr.nc")
    _assert_same(_xr_read(tmp / "fast.nc"), reference)
    _assert_same(read_grid_file(tmp / "fast.nc"), reference)


def test_nul_characters_are_dropped_from_attributes(tmp_path):
    # HDF5 variable-length strings cannot hold NUL (neither xarray nor h5py can write one):
    # netcdf_safe removes them rather than failing the frame
    ds = netcdf_safe(_grid().assign_attrs(comment="scan\x00 7"))
    assert ds.attrs["comment"] == "scan 7"
    write_grid_file(tmp_path / "g.nc", ds)
    assert _xr_read(tmp_path / "g.nc").attrs["comment"] == "scan 7"
