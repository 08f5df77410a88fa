"""Writers of raw files in the open formats of DESIGN.md §3 (for the simulator and tests).

Every writer writes to a hidden temporary name in the target folder, flushes it to disk and then
renames it into place with :func:`os.replace`, so a folder watcher (or :func:`find_inputs`, which
skips hidden names) never sees a half-written file. For the sidecar formats the sidecar is put in
place first and the array file last: once the array file exists, its pair is complete.

The raw writers do not validate: they write what they are given, so that broken files for tests
of the readers can be made with them too. Everything written reads back through
:func:`pipeline.io.readers.read_file` to the same values (netCDF and npz bit for bit; text grids
with 17 significant digits, which round-trips float64 exactly).
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline.io.npz import format_sidecar, sidecar_path
from pipeline.io.textgrid import TEXTGRID_CHANNELS

__all__ = ["write_netcdf", "write_raw_netcdf", "write_raw_npz", "write_raw_textgrid"]


@contextlib.contextmanager
def _atomic(path: Path) -> Iterator[Path]:
    """Yield a hidden temporary path beside ``path``; on success fsync it and rename it to
    ``path``, on failure remove it."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()


def _write_text(path: Path, text: str) -> Path:
    with _atomic(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path


def _netcdf_attrs(attrs: dict[str, Any]) -> dict[str, Any]:
    """netCDF has no boolean attributes: write them as 0/1."""
    return {k: (int(v) if isinstance(v, bool | np.bool_) else v) for k, v in attrs.items()}


def _to_netcdf(ds: xr.Dataset, path: Path, encoding: dict[str, Any] | None = None) -> Path:
    out = ds.copy(deep=False)
    out.attrs = _netcdf_attrs(dict(ds.attrs))
    for var in out.variables.values():
        var.attrs = _netcdf_attrs(dict(var.attrs))
    with _atomic(path) as tmp:
        out.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return path


def write_raw_netcdf(ds: xr.Dataset, path: str | os.PathLike[str]) -> Path:
    """Write a raw frame or curve set as a netCDF4 file (``.nc`` or ``.h5``).

    Parameters
    ----------
    ds : xarray.Dataset
        Variables (with their ``units`` attributes) and global attributes as in DESIGN.md §3.
    path : path-like
        Target file; replaced atomically if it exists.

    Returns
    -------
    Path
        The file written.
    """
    return _to_netcdf(ds, Path(path))


def write_netcdf(ds: xr.Dataset, path: str | os.PathLike[str], *,
                 compress: bool = False) -> Path:
    """Write any dataset (e.g. the simulator's ground truth) as a netCDF4 file, atomically.

    ``compress=True`` stores the numeric variables zlib-compressed (level 4, lossless).
    """
    encoding = None
    if compress:
        encoding = {name: {"zlib": True, "complevel": 4} for name, var in ds.variables.items()
                    if var.dtype.kind in "biuf" and var.ndim > 0}
    return _to_netcdf(ds, Path(path), encoding)


def write_raw_npz(ds: xr.Dataset, path: str | os.PathLike[str]) -> tuple[Path, Path]:
    """Write a raw frame or curve set as ``.npz`` + TOML sidecar of the same stem.

    The data variables go into the archive under their names (coordinates are not written:
    frame coordinates come from the scan attributes); the global attributes go to the sidecar's
    top level and each variable's attributes into a table named after it.

    Returns
    -------
    (Path, Path)
        The archive and the sidecar written.
    """
    target = Path(path)
    arrays = {str(name): np.asarray(ds[name].values) for name in ds.data_vars}
    tables = {str(name): dict(ds[name].attrs) for name in ds.data_vars}
    side = _write_text(sidecar_path(target), format_sidecar(dict(ds.attrs), tables))
    with _atomic(target) as tmp, open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
    return target, side


def write_raw_textgrid(ds: xr.Dataset, path: str | os.PathLike[str], *,
                       channel: str) -> tuple[Path, Path]:
    """Write one channel of a raw frame as a text grid + TOML sidecar of the same stem.

    Parameters
    ----------
    ds : xarray.Dataset
        The frame; ``ds[channel]`` is written, one line per row (y), values with 17 significant
        digits (exact for float64), separated by commas for ``.csv`` and spaces otherwise.
    path : path-like
        Target ``.txt`` or ``.csv`` file.
    channel : {"current", "z"}
        The variable to write. Its ``units`` attribute goes to the sidecar with the global
        attributes and ``channel``.

    Returns
    -------
    (Path, Path)
        The grid and the sidecar written.
    """
    if channel not in TEXTGRID_CHANNELS:
        raise ValueError(f"channel = {channel!r}; a text grid holds one of "
                         f"{', '.join(TEXTGRID_CHANNELS)}")
    target = Path(path)
    values = np.asarray(ds[channel].values)
    if values.ndim > 2:
        raise ValueError(f"variable '{channel}' is {values.ndim}-D; a text grid holds 1-D or "
                         "2-D data")
    attrs = dict(ds.attrs)
    attrs["channel"] = channel
    if "units" in ds[channel].attrs:
        attrs["units"] = ds[channel].attrs["units"]
    side = _write_text(sidecar_path(target), format_sidecar(attrs))
    delimiter = "," if target.suffix.lower() == ".csv" else " "
    with _atomic(target) as tmp:
        np.savetxt(tmp, np.atleast_2d(values), fmt="%.17g", delimiter=delimiter)
    return target, side
