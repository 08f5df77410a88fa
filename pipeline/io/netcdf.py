"""NetCDF4 / HDF5 raw files (``.nc``, ``.h5``; DESIGN.md §3).

Read fully into memory and closed before the dataset is returned: plain grids through h5py
(:mod:`pipeline.io.h5grid`, the same result, five times faster), anything else through xarray with
the h5netcdf engine. Plain HDF5 files without netCDF dimension scales are accepted too (their
dimensions get numbered names; rows are the slow axis). The container is checked by content:
the HDF5 signature must be at offset 0 or at a user-block boundary (512, 1024, 2048, ... bytes);
a netCDF3 classic file (``CDF\\x01``/``CDF\\x02``/``CDF\\x05``) gets its own error.
"""

from __future__ import annotations

from pathlib import Path

import xarray as xr

from pipeline.errors import UnreadableFileError
from pipeline.io.h5grid import read_grid_file

__all__ = ["HDF5_SIGNATURE", "NETCDF_READER", "NetCDFReader", "check_hdf5_signature"]

HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
NETCDF3_SIGNATURES = (b"CDF\x01", b"CDF\x02", b"CDF\x05")


def check_hdf5_signature(path: Path) -> None:
    """Refuse a file that is not HDF5 (by its signature), with a clear reason.

    Raises
    ------
    UnreadableFileError
        Empty file, netCDF3 classic file, or no HDF5 signature at any allowed offset.
    """
    try:
        size = path.stat().st_size
        with path.open("rb") as fh:
            head = fh.read(8)
            if not head:
                raise UnreadableFileError(f"{path}: file is empty")
            if head.startswith(NETCDF3_SIGNATURES):
                raise UnreadableFileError(
                    f"{path}: netCDF3 classic format is not supported; convert it to netCDF4 "
                    "(e.g. xarray: open_dataset(p).to_netcdf(q, engine='h5netcdf'), or "
                    "'nccopy -k netCDF-4 in.nc out.nc')")
            offset = 0
            while offset + len(HDF5_SIGNATURE) <= size:
                fh.seek(offset)
                if fh.read(len(HDF5_SIGNATURE)) == HDF5_SIGNATURE:
                    return
                offset = 512 if offset == 0 else 2 * offset
    except OSError as exc:
        raise UnreadableFileError(f"{path}: cannot read ({exc})") from None
    raise UnreadableFileError(
        f"{path}: not a netCDF4/HDF5 file (no HDF5 signature; first bytes {head[:8]!r})")


class NetCDFReader:
    """Reader of netCDF4 and plain HDF5 files (root group)."""

    name = "netcdf4"
    suffixes = (".nc", ".h5")
    uses_sidecar = False

    def read(self, path: Path) -> xr.Dataset:
        """Read the root group into memory, as found (not validated), and close the file.

        Time decoding is off: values and attributes come back exactly as stored.
        """
        path = Path(path)
        check_hdf5_signature(path)
        try:
            try:  # plain grids (the usual case) through h5py, exactly as xarray would read them
                return read_grid_file(path)
            except (ValueError, KeyError, TypeError):  # not a plain grid
                pass
            with xr.open_dataset(path, engine="h5netcdf", phony_dims="sort", decode_times=False,
                                 decode_timedelta=False) as ds:
                return ds.load()
        except OSError as exc:
            raise UnreadableFileError(
                f"{path}: damaged or truncated netCDF4/HDF5 file ({exc})") from None


NETCDF_READER = NetCDFReader()
