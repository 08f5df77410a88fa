"""The HDF5 output store (DESIGN.md §4): building and atomic commit, write lock, read-back.

Layout of a store file (netCDF4-compatible; every group opens with
``xarray.open_dataset(store, group=..., engine="h5netcdf")``)::

    /                 Conventions, title, software, created, history
    /frames/<id>      height, height_uncertainty, flags (+ x, y) and the frame's attrs
    /run              run-level attrs and tables (curve fits, drift series)
    /maps/<id>        apparent-barrier maps
    /failures         one record per input that could not be processed

Crash safety (DESIGN.md §7): finished frames are staged first (:mod:`pipeline.io.staging`). The
store itself is always built under a temporary name (:class:`StoreBuilder`: frames are added as
they come, through plain h5py in netCDF-4 layout, :mod:`pipeline.io.h5grid`; the run, map and
failure groups through xarray at the end) and then atomically replaces the previous store, so a
crash at any moment leaves the previous store intact. An ``flock`` on ``<store>.lock`` refuses a
second writer; the file names the holder (pid, host, start time).
"""

from __future__ import annotations

import fcntl
import json
import os
import re
import shutil
import socket
import tempfile
from collections.abc import Iterable, Iterator, Sequence
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
from pipeline.io.h5grid import is_grid, write_grid
from pipeline.io.staging import fsync_replace, netcdf_safe, temporary_path
from pipeline.model import sanitize_id

__all__ = [
    "Failure",
    "Store",
    "StoreBuilder",
    "StoreLock",
    "check_writable",
    "open_store",
    "remove_stale_temporaries",
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
# building the store
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


def remove_stale_temporaries(store: str | os.PathLike[str]) -> list[Path]:
    """Remove the temporary store files a killed writer left beside ``store``.

    Call only while holding the store's :class:`StoreLock`: then no live writer owns one.
    Returns the removed paths.
    """
    store = Path(store)
    # exactly the names temporary_path gives this store (not those of "s.h5.bak" beside "s.h5")
    mine = re.compile(rf"\.{re.escape(store.name)}\.[0-9a-f]{{12}}\.tmp")
    removed = []
    for tmp in store.parent.glob(f".{store.name}.*.tmp"):
        if mine.fullmatch(tmp.name):
            tmp.unlink(missing_ok=True)
            removed.append(tmp)
    return removed


class StoreBuilder:
    """A new store built under a temporary name, then committed atomically.

    Frames are added one at a time (:meth:`add_frame`, memory stays at one frame) while the
    rest of a run is still working; :meth:`commit` adds the run, map and failure groups and
    replaces the store at ``path``; :meth:`abort` (or leaving a ``with`` block with an error)
    removes the temporary file and leaves any previous store untouched.

    Examples
    --------
    >>> with StoreBuilder(path, title="night 3") as builder:  # doctest: +SKIP
    ...     for ds in frames:
    ...         builder.add_frame(ds)
    ...     builder.commit(run=run_ds, failures=failures)
    """

    def __init__(self, path: str | os.PathLike[str], *, title: str = "isogap run",
                 history: str = "") -> None:
        self.path = Path(path)
        self.tmp = temporary_path(self.path)
        now = datetime.now(UTC).isoformat(timespec="seconds")
        self._others: list[tuple[str, xr.Dataset]] = []
        self._ids: set[str] = set()
        try:
            with h5netcdf.File(self.tmp, "w") as handle:
                handle.attrs.update({
                    "Conventions": "CF-1.10",
                    "title": title,
                    "software": f"isogap {__version__}",
                    "created": now,
                    "history": f"{now}: {history}".strip() if history else f"{now}: isogap",
                })
                handle.create_group("frames")
            self._h5: h5py.File | None = h5py.File(self.tmp, "a")
        except BaseException as exc:
            self.tmp.unlink(missing_ok=True)
            if isinstance(exc, OSError):
                raise self._error(exc) from None
            raise

    def _error(self, exc: OSError) -> StoreError:
        return StoreError(f"store {self.path}: cannot be written ({exc.strerror or exc}); the "
                          "previous store, if any, is unchanged and the staged parts are kept "
                          "for a rerun")

    def add_frame(self, ds: xr.Dataset) -> None:
        """Add one processed frame as ``frames/<frame_id>``."""
        if self._h5 is None:
            raise StoreError(f"store {self.path}: already committed or aborted")
        fid = sanitize_id(ds.attrs.get("frame_id", "frame"))
        if fid in self._ids:
            self.abort()
            raise StoreError(f"store {self.path}: two frames have the id {fid!r}")
        self._ids.add(fid)
        safe = netcdf_safe(ds)
        try:
            if is_grid(safe):
                write_grid(self._h5["frames"].create_group(fid), safe)
            else:  # anything unusual (no coordinates, say) through xarray at the end
                self._others.append((fid, safe))
        except OSError as exc:  # e.g. a full disk
            self.abort()
            raise self._error(exc) from None

    def commit(self, *, run: xr.Dataset, failures: Sequence[Failure] = (),
               extra_groups: Iterable[tuple[str, xr.Dataset]] = ()) -> Path:
        """Write the run, map (``extra_groups``: ``(group path, dataset)`` pairs, e.g.
        ``("maps/grid1", ds)``) and failure groups and replace the store atomically."""
        if self._h5 is None:
            raise StoreError(f"store {self.path}: already committed or aborted")
        try:
            self._h5.close()
            self._h5 = None
            with h5netcdf.File(self.tmp, "a") as handle:
                for fid, ds in self._others:
                    _dump_group(handle, f"frames/{fid}", ds)
                _dump_group(handle, "run", run)
                for name, ds in extra_groups:
                    parts = [sanitize_id(p) for p in name.split("/")]
                    if len(parts) > 1 and parts[0] not in handle.groups:
                        handle.create_group(parts[0])
                    _dump_group(handle, "/".join(parts), ds)
                _dump_group(handle, "failures", _failures_dataset(failures))
            fsync_replace(self.tmp, self.path)
        except OSError as exc:  # e.g. a full disk: the previous store is still in place
            self.abort()
            raise self._error(exc) from None
        except BaseException:
            self.abort()
            raise
        return self.path

    def abort(self) -> None:
        """Drop the temporary file; any previous store stays as it was."""
        if self._h5 is not None:
            try:
                self._h5.close()
            except OSError:
                pass
            self._h5 = None
        self.tmp.unlink(missing_ok=True)

    def __enter__(self) -> StoreBuilder:
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        if exc_type is not None or self._h5 is not None:  # an error, or never committed
            self.abort()


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
    """Build a whole store at once (a :class:`StoreBuilder` fed from ``frames``).

    ``frames`` may be a lazy iterable (e.g. reading staged files one at a time), so memory stays
    at one frame. Frame groups are named after their sanitised ``frame_id``. ``extra_groups``
    are further ``(group path, dataset)`` pairs, e.g. ``("maps/grid1", ds)``.
    """
    with StoreBuilder(path, title=title, history=history) as builder:
        for ds in frames:
            builder.add_frame(ds)
        return builder.commit(run=run, failures=failures, extra_groups=extra_groups)



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
