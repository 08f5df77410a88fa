"""The HDF5 output store (DESIGN.md §4): staging, atomic commit, write lock, read-back.

Layout of a store file (netCDF4-compatible; every group opens with
``xarray.open_dataset(store, group=..., engine="h5netcdf")``)::

    /                 Conventions, title, software, created, history
    /frames/<id>      height, height_uncertainty, flags (+ x, y) and the frame's attrs
    /run              run-level attrs and tables (curve fits, drift series)
    /failures         one record per input that could not be processed

Crash safety (DESIGN.md §7): each processed frame is first *staged* as its own small netCDF file
in ``<store>.parts/frames/`` (written under a temporary name, fsynced and ``os.replace``-d into
place), so a killed run keeps every finished frame. The store itself is always built under a
temporary name through one open ``h5netcdf.File`` handle and then atomically replaces the
previous store, so a crash at any moment leaves the previous store intact. An ``flock`` on
``<store>.lock`` refuses a second writer; the file names the holder (pid, host, start time).
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import socket
import tempfile
import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import h5netcdf
import h5py
import numpy as np
import xarray as xr
from xarray.backends import H5NetCDFStore

from pipeline._version import __version__
from pipeline.errors import StoreError, StoreLockedError
from pipeline.io.h5grid import is_grid, read_attrs, read_grid_file, write_grid, write_grid_file
from pipeline.model import sanitize_id

__all__ = [
    "Failure",
    "Store",
    "StoreLock",
    "check_writable",
    "netcdf_safe",
    "open_store",
    "read_staged",
    "staged_attrs",
    "staged_frames",
    "staged_header",
    "staging_dir",
    "write_staged",
    "write_store",
]

#: Free space to insist on before a run starts, beyond the estimated size of its output.
MIN_FREE_BYTES = 50 * 1024**2


@dataclass(frozen=True)
class Failure:
    """One input that could not be processed."""

    file: str
    stage: str
    message: str


# --------------------------------------------------------------------------------------------
# attribute hygiene
# --------------------------------------------------------------------------------------------


def _safe_attr(value: Any) -> Any:
    if value is None:
        return None
    if isinstance(value, bool | np.bool_):
        return int(value)
    if isinstance(value, str | int | float | np.integer | np.floating):
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

    ``None`` values are dropped, booleans become integers, mappings and lists become JSON text.
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
# locking and pre-flight checks
# --------------------------------------------------------------------------------------------


class StoreLock:
    """Exclusive write lock on a store: an ``flock`` on ``<store>.lock``, which names its holder.

    The operating system releases the lock when its process dies, however it dies, so a lock of
    a killed run never blocks the next one; the JSON in the file (pid, host, start time) only
    names the holder for the message of :class:`~pipeline.errors.StoreLockedError`. The file is
    left in place (empty) on release: removing it would let two later writers lock two
    different files of the same name.
    """

    def __init__(self, store: str | os.PathLike[str]):
        self.store = Path(store)
        self.path = self.store.with_name(self.store.name + ".lock")
        self._fd: int | None = None

    def _holder(self) -> dict[str, Any]:
        try:
            return json.loads(self.path.read_text() or "{}")
        except (OSError, ValueError):
            return {}

    def acquire(self) -> StoreLock:
        try:
            fd = os.open(self.path, os.O_CREAT | os.O_RDWR, 0o644)
        except OSError as exc:
            raise StoreError(f"store {self.store}: cannot create lock file {self.path} "
                             f"({exc.strerror})") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            holder = self._holder()
            raise StoreLockedError(
                f"store {self.store}: another isogap process is writing it (pid "
                f"{holder.get('pid', '?')} on {holder.get('host', '?')}, since "
                f"{holder.get('started', '?')}); wait for it to finish") from None
        info = {"pid": os.getpid(), "host": socket.gethostname(),
                "started": datetime.now(UTC).isoformat(timespec="seconds")}
        os.ftruncate(fd, 0)
        os.write(fd, json.dumps(info).encode())
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is not None:
            os.ftruncate(self._fd, 0)
            fcntl.flock(self._fd, fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> StoreLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def check_writable(store: str | os.PathLike[str], *, expected_bytes: int = 0) -> None:
    """Fail early, before any work, if the store cannot be written.

    Checks that the target folder exists and is writable (by creating and removing a probe
    file) and that the disk has room for about twice ``expected_bytes`` (staged parts plus the
    rebuilt store) plus a margin.
    """
    store = Path(store)
    folder = store.parent if str(store.parent) else Path(".")
    if not folder.is_dir():
        raise StoreError(f"store {store}: folder {folder} does not exist")
    if store.exists() and store.is_dir():
        raise StoreError(f"store {store}: is a folder, expected a file name")
    try:
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".isogap-probe-"):
            pass
    except OSError as exc:
        raise StoreError(f"store {store}: folder {folder} is not writable ({exc.strerror})"
                         ) from None
    free = shutil.disk_usage(folder).free
    need = 2 * expected_bytes + MIN_FREE_BYTES
    if free < need:
        raise StoreError(f"store {store}: only {free / 1e6:.0f} MB free on {folder}, about "
                         f"{need / 1e6:.0f} MB needed")


# --------------------------------------------------------------------------------------------
# staging
# --------------------------------------------------------------------------------------------


def staging_dir(store: str | os.PathLike[str]) -> Path:
    """Folder of a store's staged per-frame results (``<store>.parts``)."""
    store = Path(store)
    return store.with_name(store.name + ".parts")


def _fsync_replace(tmp: Path, path: Path) -> None:
    """Make ``tmp`` durable, rename it to ``path``, and make the rename durable too."""
    with open(tmp, "rb+") as fh:
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


def _temporary(path: Path) -> Path:
    """A hidden temporary name beside ``path``, unique across processes and hosts."""
    return path.with_name(f".{path.name}.{uuid.uuid4().hex[:12]}.tmp")


def _atomic_netcdf(ds: xr.Dataset, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _temporary(path)
    try:
        safe = netcdf_safe(ds)
        if is_grid(safe):  # frames: the fast h5py path, same layout as xarray's
            write_grid_file(tmp, safe)
        else:
            safe.to_netcdf(tmp, engine="h5netcdf")
        _fsync_replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def write_staged(store: str | os.PathLike[str], kind: str, name: str, ds: xr.Dataset) -> Path:
    """Stage one result (``kind`` = ``"frames"``, ``"curves"``, ...) atomically; return its path."""
    return _atomic_netcdf(ds, staging_dir(store) / kind / f"{sanitize_id(name)}.nc")


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
            sizes = {name: int(obj.shape[0]) for name, obj in handle.items()
                     if obj.attrs.get("CLASS") == b"DIMENSION_SCALE"}
    except (OSError, ValueError) as exc:
        raise StoreError(f"staged result {path} is unreadable ({exc})") from None
    return attrs, sizes


def staged_frames(store: str | os.PathLike[str], kind: str = "frames") -> dict[str, Path]:
    """Staged results of one kind, by name."""
    folder = staging_dir(store) / kind
    if not folder.is_dir():
        return {}
    return {p.stem: p for p in sorted(folder.glob("*.nc")) if not p.name.startswith(".")}


# --------------------------------------------------------------------------------------------
# the store
# --------------------------------------------------------------------------------------------


def _dump_group(handle: h5netcdf.File, name: str, ds: xr.Dataset) -> None:
    group = handle.create_group(name) if name not in handle.groups else handle.groups[name]
    netcdf_safe(ds).dump_to_store(H5NetCDFStore(group, mode="a"))


def _failures_dataset(failures: Sequence[Failure]) -> xr.Dataset:
    return xr.Dataset(
        {
            "file": (("failure",), np.array([f.file for f in failures], dtype=str)),
            "stage": (("failure",), np.array([f.stage for f in failures], dtype=str)),
            "message": (("failure",), np.array([f.message for f in failures], dtype=str)),
        },
        attrs={"count": len(failures)},
    )


def write_store(
    path: str | os.PathLike[str],
    *,
    frames: Iterable[xr.Dataset],
    run: xr.Dataset,
    failures: Sequence[Failure] = (),
    title: str = "isogap run",
    history: str = "",
    extra_groups: Iterable[tuple[str, xr.Dataset]] = (),
) -> Path:
    """Build the store under a temporary name through one open handle, then replace atomically.

    ``frames`` may be a lazy iterable (e.g. reading staged files one at a time), so memory stays
    at one frame. Frame groups are named after their sanitised ``frame_id``. ``extra_groups``
    are further ``(group path, dataset)`` pairs, e.g. ``("maps/grid1", ds)``.
    """
    path = Path(path)
    tmp = _temporary(path)
    now = datetime.now(UTC).isoformat(timespec="seconds")
    try:
        with h5netcdf.File(tmp, "w") as handle:
            handle.attrs.update({
                "Conventions": "CF-1.10",
                "title": title,
                "software": f"isogap {__version__}",
                "created": now,
                "history": f"{now}: {history}".strip() if history else f"{now}: isogap",
            })
            handle.create_group("frames")
            _dump_group(handle, "run", run)
            for name, ds in extra_groups:
                parts = [sanitize_id(p) for p in name.split("/")]
                if len(parts) > 1 and parts[0] not in handle.groups:
                    handle.create_group(parts[0])
                _dump_group(handle, "/".join(parts), ds)
            _dump_group(handle, "failures", _failures_dataset(failures))
        # the frames, the bulk of the store, through plain h5py in the same layout (h5grid.py);
        # anything unusual (no coordinates, say) through xarray afterwards
        others: list[tuple[str, xr.Dataset]] = []
        with h5py.File(tmp, "a") as handle:
            group = handle["frames"]
            for ds in frames:
                fid = sanitize_id(ds.attrs.get("frame_id", "frame"))
                if fid in group or any(fid == o for o, _ in others):
                    raise StoreError(f"store {path}: two frames have the id {fid!r}")
                safe = netcdf_safe(ds)
                if is_grid(safe):
                    write_grid(group.create_group(fid), safe)
                else:
                    others.append((fid, safe))
        if others:
            with h5netcdf.File(tmp, "a") as handle:
                for fid, ds in others:
                    _dump_group(handle, f"frames/{fid}", ds)
        _fsync_replace(tmp, path)
    except OSError as exc:  # e.g. a full disk: the previous store is still in place
        tmp.unlink(missing_ok=True)
        raise StoreError(f"store {path}: cannot be written ({exc.strerror or exc}); the "
                         "previous store, if any, is unchanged and the staged parts are kept "
                         "for a rerun") from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


class Store:
    """Read access to a finished store. Frames come back as :class:`xarray.Dataset` objects.

    Use :func:`open_store`; every read opens the file briefly and closes it again, so a store can
    be replaced by a new run while a notebook holds a :class:`Store`.
    """

    def __init__(self, path: str | os.PathLike[str]):
        self.path = Path(path)
        if not self.path.is_file():
            raise StoreError(f"store {self.path}: file not found")
        try:
            with h5netcdf.File(self.path, "r") as handle:
                self.attrs: dict[str, Any] = dict(handle.attrs)
                frames = handle.groups.get("frames")
                self.frame_ids: list[str] = sorted(frames.groups) if frames is not None else []
                self.groups = list(handle.groups)
                maps = handle.groups.get("maps")
                self.map_ids: list[str] = sorted(maps.groups) if maps is not None else []
        except OSError as exc:
            raise StoreError(f"store {self.path}: not a readable HDF5 store ({exc})") from None
        if "frames" not in self.groups or "run" not in self.groups:
            raise StoreError(f"store {self.path}: not an isogap store (no 'frames'/'run' groups)")

    def _group(self, group: str) -> xr.Dataset:
        with xr.open_dataset(self.path, group=group, engine="h5netcdf") as ds:
            return ds.load()

    def frame(self, frame_id: str) -> xr.Dataset:
        """One processed frame."""
        if frame_id not in self.frame_ids:
            raise StoreError(f"store {self.path}: no frame {frame_id!r} (has: "
                             f"{', '.join(self.frame_ids[:10]) or 'none'})")
        return self._group(f"frames/{frame_id}")

    def frames(self) -> Iterator[xr.Dataset]:
        """All frames, one at a time."""
        for fid in self.frame_ids:
            yield self.frame(fid)

    def barrier_map(self, map_id: str) -> xr.Dataset:
        """An apparent-barrier map (from approach curves recorded on a grid)."""
        if map_id not in self.map_ids:
            raise StoreError(f"store {self.path}: no map {map_id!r}")
        return self._group(f"maps/{map_id}")

    def run(self) -> xr.Dataset:
        """The run group: work function, drift, config and their tables."""
        return self._group("run")

    def failures(self) -> list[Failure]:
        """Inputs that could not be processed."""
        ds = self._group("failures")
        if ds.sizes.get("failure", 0) == 0:
            return []
        return [Failure(str(f), str(s), str(m)) for f, s, m in
                zip(ds["file"].values, ds["stage"].values, ds["message"].values, strict=True)]

    def __repr__(self) -> str:
        return f"<isogap Store {self.path} frames={len(self.frame_ids)}>"


def open_store(path: str | os.PathLike[str]) -> Store:
    """Open a finished store for reading."""
    return Store(path)
