"""Staged per-frame results of a store (DESIGN.md §7) and the atomic-file helpers.

Each processed frame is staged as its own small netCDF-4 file in ``<store>.parts/<kind>/``,
written under a temporary name, fsynced and ``os.replace``-d into place, so a killed run keeps
every finished frame and never leaves half a file under a real name. Frames go through the
h5py fast path of :mod:`pipeline.io.h5grid`; anything else through xarray.
"""

from __future__ import annotations

import json
import os
import uuid
from collections.abc import Iterable, Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import xarray as xr

from pipeline.errors import StoreError
from pipeline.io.h5grid import (
    dimension_sizes,
    is_grid,
    read_attrs,
    read_grid_file,
    write_grid_file,
)
from pipeline.model import sanitize_id

__all__ = [
    "fsync_replace",
    "netcdf_safe",
    "read_staged",
    "read_staged_record",
    "staged_attrs",
    "staged_frames",
    "staged_header",
    "staged_path",
    "staging_dir",
    "temporary_path",
    "write_staged",
    "write_staged_record",
]


# --------------------------------------------------------------------------------------------
# attribute hygiene
# --------------------------------------------------------------------------------------------


def _safe_attr(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, bool | np.bool_):
        return int(value)
    if isinstance(value, str):
        return value.replace("\x00", "")  # HDF5 strings cannot hold NUL characters
    if isinstance(value, int | float | np.integer | np.floating):
        return value
    if isinstance(value, np.ndarray):
        if value.dtype == bool:
            return value.astype(np.uint8)
        if value.dtype.kind in "OU":
            return json.dumps([str(v) for v in value.tolist()])
        return value
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, Mapping | list | tuple):
        try:
            arr = np.asarray(value)
            if arr.dtype.kind in "iuf" and arr.ndim == 1 and arr.size:
                return arr
        except (ValueError, TypeError):
            pass
        return json.dumps(value, default=str)
    return str(value)


def netcdf_safe(ds: xr.Dataset) -> xr.Dataset:
    """Copy of ``ds`` whose attributes netCDF can hold (strings, numbers, numeric arrays).

    ``None`` values are dropped, booleans become integers, mappings and lists become JSON text,
    NUL characters are removed from strings (HDF5 variable-length strings cannot hold them).
    """
    out = ds.copy()
    out.attrs = {k: v for k, v in ((k, _safe_attr(v)) for k, v in ds.attrs.items())
                 if v is not None}
    for name in out.variables:
        var = out[name]
        var.attrs = {k: v for k, v in ((k, _safe_attr(v)) for k, v in var.attrs.items())
                     if v is not None}
        if var.dtype == bool:
            out[name] = var.astype(np.uint8)
    return out



# --------------------------------------------------------------------------------------------
# staging
# --------------------------------------------------------------------------------------------


def staging_dir(store: str | os.PathLike[str]) -> Path:
    """Folder of a store's staged per-frame results (``<store>.parts``)."""
    store = Path(store)
    return store.with_name(store.name + ".parts")


def fsync_replace(tmp: Path, path: Path) -> None:
    """Make ``tmp`` durable, rename it to ``path``, and make the rename durable too."""
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def temporary_path(path: Path) -> Path:
    """A hidden temporary name beside ``path``, unique across processes and hosts."""
    return path.with_name(f".{path.name}.{uuid.uuid4().hex[:12]}.tmp")


def _atomic_netcdf(ds: xr.Dataset, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = temporary_path(path)
    try:
        safe = netcdf_safe(ds)
        if is_grid(safe):  # frames: the fast h5py path, same layout as xarray's
            write_grid_file(tmp, safe)
        else:
            safe.to_netcdf(tmp, engine="h5netcdf")
        fsync_replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def staged_path(store: str | os.PathLike[str], kind: str, name: str, suffix: str = ".nc"
                ) -> Path:
    """Where a staged result of ``kind`` named ``name`` lives (the name sanitised)."""
    return staging_dir(store) / kind / f"{sanitize_id(name)}{suffix}"


def write_staged(store: str | os.PathLike[str], kind: str, name: str, ds: xr.Dataset) -> Path:
    """Stage one result (``kind`` = ``"frames"``, ``"curves"``, ...) atomically; return its path."""
    return _atomic_netcdf(ds, staged_path(store, kind, name))


def read_staged(path: str | os.PathLike[str], variables: Iterable[str] | None = None
                ) -> xr.Dataset:
    """Load a staged result fully into memory (the file is closed on return).

    ``variables`` limits the data variables read from a staged frame (coordinates and
    attributes always come along).
    """
    try:
        try:
            return read_grid_file(path, variables)
        except ValueError:  # not a grid: through xarray
            with xr.open_dataset(path, engine="h5netcdf") as ds:
                ds = ds.load()
            return ds if variables is None else ds[list(variables)]
    except (OSError, ValueError, KeyError) as exc:
        raise StoreError(f"staged result {path} is unreadable ({exc})") from None


def staged_attrs(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The global attributes of a staged result, without reading its arrays."""
    return staged_header(path)[0]


def staged_header(path: str | os.PathLike[str]) -> tuple[dict[str, Any], dict[str, int]]:
    """Global attributes and dimension sizes of a staged result, without reading its arrays."""
    try:
        with h5py.File(path, "r") as handle:
            attrs = read_attrs(handle.attrs)
            sizes = dimension_sizes(handle)
    except (OSError, ValueError) as exc:
        raise StoreError(f"staged result {path} is unreadable ({exc})") from None
    return attrs, sizes


def staged_frames(store: str | os.PathLike[str], kind: str = "frames") -> dict[str, Path]:
    """Staged results of one kind, by name."""
    folder = staging_dir(store) / kind
    if not folder.is_dir():
        return {}
    return {p.stem: p for p in sorted(folder.glob("*.nc")) if not p.name.startswith(".")}


def write_staged_record(store: str | os.PathLike[str], kind: str, name: str,
                        record: Mapping[str, Any]) -> Path:
    """Stage a small JSON record (e.g. a drift-pair result) atomically; return its path."""
    path = staged_path(store, kind, name, ".json")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = temporary_path(path)
    try:
        tmp.write_text(json.dumps(record))
        fsync_replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def read_staged_record(store: str | os.PathLike[str], kind: str, name: str
                       ) -> dict[str, Any] | None:
    """A record staged by :func:`write_staged_record`, or None if there is none (or it cannot
    be read: a record is a cache, recomputed when in doubt)."""
    path = staged_path(store, kind, name, ".json")
    try:
        record = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return record if isinstance(record, dict) else None
