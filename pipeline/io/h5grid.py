"""Fast netCDF4-compatible writing and reading of gridded datasets through plain h5py.

A processed frame is written three times and read four times on its way through a batch (staged
after the frame pass, read by the drift pairs and the finishing pass, staged again, read by the
commit and written into the store). Through xarray's netCDF backend each write of a 512² frame
costs about 28 ms and each read about 24 ms, mostly in per-variable encoding and dimension
bookkeeping; the same bytes through h5py take about 9 ms and 5 ms (``benchmarks/bench_pipeline.py``
notes). This module does that for the one shape of data it accepts -- a *grid*: every dimension
has a 1-D coordinate variable of the same name, every variable is numeric, no other coordinates
-- and writes the layout h5netcdf writes (netCDF dimension scales with ``_Netcdf4Dimid``,
``DIMENSION_LIST`` references, ``_Netcdf4Coordinates``, ``_FillValue`` NaN on floating-point
variables, non-string scalar attributes as 1-element arrays), so xarray's ``open_dataset(...,
engine="h5netcdf")`` reads the result exactly as if xarray had written it. :func:`read_grid`
returns what xarray would return for such a group (tested both ways, ``assert_identical``).

Attribute values must already be netCDF-safe (:func:`pipeline.io.staging.netcdf_safe`). The reader
refuses (``ValueError``) anything xarray would decode -- packed or masked variables, dimensions
without coordinates, strings -- so a caller can fall back to xarray for those.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from typing import Any

import h5py
import numpy as np
import xarray as xr

__all__ = ["dimension_sizes", "is_grid", "read_attrs", "read_grid", "read_grid_file", "write_grid",
           "write_grid_file"]

#: attributes netCDF-4 keeps for its own bookkeeping; never user attributes
_HIDDEN = frozenset({"REFERENCE_LIST", "CLASS", "DIMENSION_LIST", "NAME", "_Netcdf4Dimid",
                     "_Netcdf4Coordinates", "_nc3_strict", "_NCProperties"})
#: attributes that make xarray decode values (packing, masking): such files go through xarray
_CF_ENCODING = frozenset({"scale_factor", "add_offset", "missing_value", "_Unsigned"})


def is_grid(ds: xr.Dataset) -> bool:
    """True if ``ds`` has the shape :func:`write_grid` accepts (see the module docstring)."""
    if set(ds.coords) != set(ds.dims):
        return False
    for name, var in ds.variables.items():
        if var.dtype.kind not in "biuf":
            return False
        if name in ds.dims and var.dims != (name,):
            return False
    return True


def _attr_value(value: Any) -> Any:
    """An attribute as h5netcdf writes it: non-string scalars become 1-element arrays."""
    if isinstance(value, str):
        return value
    arr = np.asarray(value)
    return arr.reshape(1) if arr.ndim == 0 else arr


def _set_attrs(attrs: h5py.AttributeManager, values: dict[str, Any]) -> None:
    for key, value in values.items():
        attrs[key] = _attr_value(value)


def write_grid(group: h5py.Group, ds: xr.Dataset) -> None:
    """Write the grid ``ds`` into the empty h5py ``group`` in netCDF-4 layout.

    Parameters
    ----------
    group : h5py.Group
        Target group (the file's root group for a file of its own).
    ds : xarray.Dataset
        A grid (:func:`is_grid`) with netCDF-safe attributes.

    Raises
    ------
    ValueError
        ``ds`` is not a grid.
    """
    if not is_grid(ds):
        raise ValueError("not a grid: every dimension needs a 1-D coordinate of its own name "
                         "and every variable must be numeric")
    dim_ids = {dim: k for k, dim in enumerate(ds.dims)}
    scales: dict[str, h5py.Dataset] = {}
    for dim, k in dim_ids.items():
        var = ds.variables[dim]
        h5 = _create(group, dim, var)
        h5.make_scale(dim)
        h5.attrs["_Netcdf4Dimid"] = np.int32(k)
        h5.attrs["_Netcdf4Coordinates"] = np.array([k], dtype=np.int32)
        _set_attrs(h5.attrs, var.attrs)
        scales[dim] = h5
    for name, var in ds.data_vars.items():
        h5 = _create(group, str(name), var)
        for axis, dim in enumerate(var.dims):
            h5.dims[axis].attach_scale(scales[dim])
        h5.attrs["_Netcdf4Coordinates"] = np.array([dim_ids[d] for d in var.dims],
                                                   dtype=np.int32)
        _set_attrs(h5.attrs, var.attrs)
    _set_attrs(group.attrs, ds.attrs)


def _create(group: h5py.Group, name: str, var: xr.Variable) -> h5py.Dataset:
    data = np.asarray(var.values)
    if data.dtype == bool:
        data = data.astype(np.uint8)
    if data.dtype.kind == "f":  # as xarray encodes floating-point variables by default
        h5 = group.create_dataset(name, data=data, fillvalue=data.dtype.type(np.nan))
        h5.attrs["_FillValue"] = np.array([np.nan], dtype=data.dtype)
        return h5
    return group.create_dataset(name, data=data)


def read_attrs(attrs: h5py.AttributeManager) -> dict[str, Any]:
    """Attributes as h5netcdf returns them (1-element arrays as their element, string arrays
    as lists, fixed-length strings decoded)."""
    out: dict[str, Any] = {}
    for key in attrs:
        if key in _HIDDEN:
            continue
        value = attrs[key]
        if isinstance(value, bytes | np.bytes_):
            value = value.decode("utf-8", "surrogateescape")
        elif isinstance(value, np.ndarray):
            if value.dtype.kind in "SO":
                value = [v.decode("utf-8", "surrogateescape") if isinstance(v, bytes) else v
                         for v in value.flat]
            if len(value) == 1:
                value = value[0]
        out[key] = value
    return out


def read_grid(group: h5py.Group, variables: Iterable[str] | None = None) -> xr.Dataset:
    """Read a grid written by :func:`write_grid` (or by xarray) from an h5py group.

    Parameters
    ----------
    group : h5py.Group
        Source group.
    variables : iterable of str, optional
        Data variables to read (all if None); the coordinates are always read.

    Raises
    ------
    ValueError
        The group is not a grid in netCDF-4 layout (a dimension without its coordinate
        variable, a variable without dimension ids, a non-numeric variable).
    """
    scales: dict[int, str] = {}
    names = list(group)
    for name in names:
        h5 = group[name]
        if _is_scale(h5):
            if "_Netcdf4Dimid" not in h5.attrs or h5.ndim != 1:
                raise ValueError(f"dimension {name!r} has no netCDF-4 dimension id")
            scales[int(h5.attrs["_Netcdf4Dimid"])] = name
    coords = {}
    for dim_name in scales.values():
        h5 = group[dim_name]
        if h5.attrs.get("NAME", b"").startswith(b"This is a netCDF dimension"):
            raise ValueError(f"dimension {dim_name!r} has no coordinate variable")
        coords[dim_name] = xr.Variable((dim_name,), _values(h5), _var_attrs(h5))
    wanted = None if variables is None else set(variables)
    data_vars = {}
    for name in names:
        if name in coords or (wanted is not None and name not in wanted):
            continue
        h5 = group[name]
        ids = h5.attrs.get("_Netcdf4Coordinates")
        if ids is None or any(int(i) not in scales for i in ids):
            raise ValueError(f"variable {name!r} has no netCDF-4 dimension ids")
        data_vars[name] = xr.Variable(tuple(scales[int(i)] for i in ids), _values(h5),
                                      _var_attrs(h5))
    if wanted is not None and wanted - set(data_vars):
        raise ValueError(f"no variable(s) {sorted(wanted - set(data_vars))}")
    return xr.Dataset(data_vars, coords=coords, attrs=read_attrs(group.attrs))


def _is_scale(obj: h5py.HLObject) -> bool:
    return bool(obj.attrs.get("CLASS") == b"DIMENSION_SCALE")


def dimension_sizes(group: h5py.Group) -> dict[str, int]:
    """The netCDF dimensions of ``group`` and their sizes, without reading any array."""
    return {name: int(obj.shape[0]) for name, obj in group.items() if _is_scale(obj)}


def _values(h5: h5py.Dataset) -> np.ndarray:
    if h5.dtype.kind not in "biuf":
        raise ValueError(f"variable {h5.name!r} is not numeric ({h5.dtype})")
    return h5[()]


def _var_attrs(h5: h5py.Dataset) -> dict[str, Any]:
    attrs = read_attrs(h5.attrs)
    encoded = _CF_ENCODING & set(attrs)
    if encoded:
        raise ValueError(f"variable {h5.name!r} is CF-encoded ({', '.join(sorted(encoded))})")
    fill = attrs.pop("_FillValue", None)  # xarray moves it into .encoding
    if fill is not None and not (h5.dtype.kind == "f" and np.isnan(fill)):
        raise ValueError(f"variable {h5.name!r} has a fill value to mask ({fill!r})")
    return attrs


def write_grid_file(path: str | os.PathLike[str], ds: xr.Dataset) -> None:
    """Write the grid ``ds`` as a netCDF-4 file of its own (see :func:`write_grid`)."""
    with h5py.File(path, "w", track_order=False) as handle:
        write_grid(handle, ds)


def read_grid_file(path: str | os.PathLike[str],
                   variables: Iterable[str] | None = None) -> xr.Dataset:
    """Read a grid file (see :func:`read_grid`); the file is closed on return."""
    with h5py.File(path, "r") as handle:
        return read_grid(handle, variables)
