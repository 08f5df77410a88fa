"""Reader registry: raw files -> validated raw datasets (DESIGN.md §3).

A *reader* turns one file into an :class:`xarray.Dataset` as found in the file; :func:`read_file`
picks the reader by the file's suffix, lets the reader check the content (each built-in reader
checks its container's signature, so a file is never parsed by guessing), adds the provenance
attributes (``source_file``, ``source_sha256``, ``source_stem``, ``frame_id``) and validates the
result with :func:`pipeline.model.validate_raw_frame` or :func:`pipeline.model.validate_curves`.

Built-in readers: netCDF4/HDF5 (``.nc``, ``.h5``), NumPy archives with a TOML sidecar
(``.npz``), text grids with a TOML sidecar (``.txt``, ``.csv``).

Plug-ins
--------
Third-party readers are registered under the entry-point group ``isogap.readers``::

    [project.entry-points."isogap.readers"]
    lab_format = "lab_pkg.reader:LabReader"

The entry point loads a :class:`Reader` object, or a class that is instantiated without
arguments. Rules (checked when the registry is built, i.e. by the first :func:`find_inputs` or
:func:`read_file` of a process):

- built-in suffixes (and ``.toml``, the sidecar suffix) are reserved: a plug-in claiming one is a
  :class:`~pipeline.errors.ConfigError`, never a silent override. A lab that wants its own
  handling of, say, ``.h5`` files gives them its own suffix;
- two readers claiming the same suffix is a ``ConfigError`` naming both;
- a plug-in that fails to import, or does not look like a reader, is a ``ConfigError`` naming
  the entry point.

A broken plug-in set-up therefore stops a run before any file is processed (exit status 2),
instead of silently skipping the files it was meant to read.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import math
import os
import tomllib
from collections.abc import Iterable
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np
import xarray as xr

from pipeline.errors import (
    ConfigError,
    IsogapError,
    MissingAttributeError,
    ShapeError,
    UnreadableFileError,
)
from pipeline.io.netcdf import NETCDF_READER
from pipeline.io.npz import NPZ_READER, SIDECAR_SUFFIX, read_sidecar
from pipeline.io.textgrid import TEXTGRID_READER
from pipeline.model import sanitize_id, validate_curves, validate_raw_frame

__all__ = [
    "BUILTIN_READERS",
    "ENTRY_POINT_GROUP",
    "KINDS",
    "Reader",
    "clear_reader_registry",
    "file_sha256",
    "find_inputs",
    "get_readers",
    "read_file",
    "read_header",
    "reader_for",
    "register_reader",
]

ENTRY_POINT_GROUP = "isogap.readers"

#: Values of the ``kind`` attribute and the validator each one goes through.
KINDS = ("frame", "curve")

#: Sub-folders of a run folder that are never inputs (the simulator's ground truth).
SKIPPED_FOLDERS = ("truth",)

_FRAME_VARS = ("current", "z", "current_backward", "z_backward")
_CURVE_VARS = ("z", "current")


@runtime_checkable
class Reader(Protocol):
    """What a reader provides.

    Attributes
    ----------
    name : str
        Short name, shown in messages.
    suffixes : tuple of str
        File suffixes it reads, with the dot (``".nc"``); matched case-insensitively.
    uses_sidecar : bool, optional
        True if its files come with a ``.toml`` sidecar of the same stem (then
        :func:`find_inputs` treats that sidecar as part of the file). Defaults to False.

    Notes
    -----
    ``read(path)`` returns the dataset as found: variables with their ``units`` attributes,
    global attributes as in DESIGN.md §3, fully loaded into memory (no open file handles). It
    should check that the content is what the suffix claims and raise
    :class:`~pipeline.errors.UnreadableFileError` otherwise; any other exception it raises is
    turned into an ``UnreadableFileError`` naming the file.
    """

    name: str
    suffixes: tuple[str, ...]

    def read(self, path: Path) -> xr.Dataset:
        """Read one file into a dataset, unvalidated."""
        ...


BUILTIN_READERS: tuple[Reader, ...] = (NETCDF_READER, NPZ_READER, TEXTGRID_READER)

_registry: dict[str, Reader] | None = None
_registered: list[Reader] = []


# --------------------------------------------------------------------------------------------
# registry
# --------------------------------------------------------------------------------------------


def _checked_reader(obj: Any, what: str) -> Reader:
    """Instantiate a reader class if needed and check it looks like a reader."""
    if isinstance(obj, type):
        try:
            obj = obj()
        except Exception as exc:
            raise ConfigError(f"{what}: cannot instantiate reader class ({exc})") from None
    name = getattr(obj, "name", None)
    suffixes = getattr(obj, "suffixes", None)
    if not isinstance(name, str) or not name:
        raise ConfigError(f"{what}: reader has no 'name' string")
    if (not isinstance(suffixes, tuple | list) or not suffixes
            or not all(isinstance(s, str) and s.startswith(".") and len(s) > 1
                       for s in suffixes)):
        raise ConfigError(f"{what}: reader '{name}' needs 'suffixes', a tuple of suffixes "
                          f"with the dot like ('.dat',); got {suffixes!r}")
    if not callable(getattr(obj, "read", None)):
        raise ConfigError(f"{what}: reader '{name}' has no read(path) method")
    return obj


def _add(table: dict[str, Reader], reader: Reader, what: str) -> None:
    builtin = {s: r for r in BUILTIN_READERS for s in r.suffixes}
    for suffix in (s.lower() for s in reader.suffixes):
        if suffix == SIDECAR_SUFFIX:
            raise ConfigError(f"{what}: reader '{reader.name}' claims suffix '{suffix}', which "
                              "is reserved for sidecar files")
        if suffix in builtin and reader is not builtin[suffix]:
            raise ConfigError(
                f"{what}: reader '{reader.name}' claims suffix '{suffix}', which the built-in "
                f"'{builtin[suffix].name}' reader handles; built-in suffixes cannot be "
                "overridden (give the plug-in's files a suffix of their own)")
        if suffix in table and table[suffix] is not reader:
            raise ConfigError(
                f"{what}: reader '{reader.name}' claims suffix '{suffix}', which reader "
                f"'{table[suffix].name}' already handles; two readers cannot share a suffix")
        table[suffix] = reader


def _build_registry() -> dict[str, Reader]:
    table: dict[str, Reader] = {}
    for reader in BUILTIN_READERS:
        _add(table, reader, "built-in reader")
    for ep in sorted(importlib.metadata.entry_points(group=ENTRY_POINT_GROUP),
                     key=lambda e: e.name):
        what = f"reader plug-in '{ep.name}' ({ep.value}, entry-point group {ENTRY_POINT_GROUP})"
        try:
            obj = ep.load()
        except Exception as exc:
            raise ConfigError(f"{what}: cannot be loaded ({type(exc).__name__}: {exc})") from None
        _add(table, _checked_reader(obj, what), what)
    for reader in _registered:
        _add(table, reader, "registered reader")
    return table


def get_readers(*, refresh: bool = False) -> dict[str, Reader]:
    """The reader registry: a mapping from lower-case suffix to reader.

    Built once per process (built-ins, then entry-point plug-ins, then readers added with
    :func:`register_reader`); ``refresh=True`` rebuilds it (e.g. after installing a plug-in).

    Raises
    ------
    ConfigError
        A plug-in cannot be loaded, is not a reader, or claims a built-in or already claimed
        suffix.
    """
    global _registry
    if _registry is None or refresh:
        _registry = _build_registry()
    return dict(_registry)


def register_reader(reader: Any) -> Reader:
    """Add a reader (object or class) to this process's registry, under the plug-in rules.

    For readers that are not installed as packages (scripts, tests). Readers registered this
    way exist only in the calling process: worker processes of a batch see entry-point plug-ins
    but not these.
    """
    r = _checked_reader(reader, "registered reader")
    table = get_readers()
    _add(table, r, "registered reader")
    _registered.append(r)
    global _registry
    _registry = table
    return r


def clear_reader_registry() -> None:
    """Forget registered readers and the cached registry (it is rebuilt on next use)."""
    global _registry
    _registered.clear()
    _registry = None


def reader_for(path: str | os.PathLike[str]) -> Reader | None:
    """The reader for a file, chosen by its suffix (case-insensitive); None if there is none."""
    return get_readers().get(Path(path).suffix.lower())


# --------------------------------------------------------------------------------------------
# reading
# --------------------------------------------------------------------------------------------


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 (hex) of a file's bytes, read in chunks.

    Raises
    ------
    UnreadableFileError
        If the file cannot be read.
    """
    try:
        with open(path, "rb") as fh:
            return hashlib.file_digest(fh, "sha256").hexdigest()
    except OSError as exc:
        raise UnreadableFileError(f"{path}: cannot read ({exc})") from None


def _plain(value: Any, where: str, src: str) -> Any:
    """A netCDF-compatible, plain-Python attribute value (numpy scalars and bytes converted)."""
    if isinstance(value, bytes | np.bytes_):
        return bytes(value).decode("utf-8", errors="replace")
    if isinstance(value, bool | np.bool_):
        return int(value)
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, str | int | float):
        return value
    if isinstance(value, np.ndarray | list | tuple):
        arr = np.asarray(value)
        if arr.dtype.kind in "SUO":
            return [_plain(v, where, src) for v in np.ravel(arr)]
        if arr.dtype.kind in "biuf" and arr.ndim <= 1:
            return arr.astype(int) if arr.dtype.kind == "b" else arr
    raise UnreadableFileError(f"{src}: attribute {where} has a value of unsupported type "
                              f"{type(value).__name__} ({value!r:.80})")


def _normalise(ds: xr.Dataset, src: str) -> xr.Dataset:
    out = ds.copy(deep=False)
    out.attrs = {str(k): _plain(v, repr(str(k)), src) for k, v in ds.attrs.items()}
    for name, var in out.variables.items():
        var.attrs = {str(k): _plain(v, f"'{k}' of variable '{name}'", src)
                     for k, v in var.attrs.items()}
    return out


def _check_variables(ds: xr.Dataset, kind: str, src: str) -> None:
    """Checks the validators in pipeline.model do not make: value type and dimension order."""
    names = _FRAME_VARS if kind == "frame" else _CURVE_VARS
    for name in names:
        if name not in ds.data_vars:
            continue
        var = ds[name]
        if var.dtype.kind not in "iuf":
            raise UnreadableFileError(f"{src}: variable '{name}' holds {var.dtype} values; "
                                      "expected real numbers (integer or floating point)")
        dims = tuple(map(str, var.dims))
        if kind == "frame" and set(dims) == {"x", "y"} and dims != ("y", "x"):
            raise ShapeError(f"{src}: variable '{name}' has dims ({', '.join(dims)}); a frame "
                             "channel must be (y, x): row = slow axis, column = fast axis")
        if kind == "curve" and set(dims) == {"curve", "sample"} and dims != ("curve", "sample"):
            raise ShapeError(f"{src}: variable '{name}' has dims ({', '.join(dims)}); curve "
                             "variables must be (curve, sample)")


def _prefixed(exc: IsogapError, src: str) -> IsogapError | None:
    """A copy of ``exc`` whose message starts with the file path; None if it already does."""
    if str(exc).startswith(src):
        return None
    return type(exc)(f"{src}: {exc}")


def _read_raw(path: Path, src: str) -> xr.Dataset:
    if not path.exists():
        raise UnreadableFileError(f"{src}: file not found")
    if not path.is_file():
        raise UnreadableFileError(f"{src}: not a regular file")
    suffix = path.suffix.lower()
    if suffix == SIDECAR_SUFFIX:
        owners = sorted(s for s, r in get_readers().items() if getattr(r, "uses_sidecar", False))
        raise UnreadableFileError(
            f"{src}: sidecar without its array file (expected {path.stem} with suffix "
            f"{' or '.join(owners)} beside it)")
    reader = reader_for(path)
    if reader is None:
        raise UnreadableFileError(
            f"{src}: no reader for suffix '{path.suffix}' (readable: "
            f"{', '.join(sorted(get_readers()))})")
    try:
        ds = reader.read(Path(src))
    except IsogapError as exc:
        new = _prefixed(exc, src)
        if new is None:
            raise
        raise new from exc
    except Exception as exc:
        raise UnreadableFileError(
            f"{src}: cannot be read by the {reader.name} reader ({type(exc).__name__}: {exc})"
        ) from exc
    if not isinstance(ds, xr.Dataset):
        raise UnreadableFileError(f"{src}: the {reader.name} reader returned "
                                  f"{type(ds).__name__}, not an xarray.Dataset")
    return ds


def read_file(path: str | os.PathLike[str], *,
              piezo_z_m_per_V: float | None = None) -> xr.Dataset:
    """Read one raw file into a validated raw frame or curve set.

    Parameters
    ----------
    path : path-like
        A data file with a registered suffix (for sidecar formats the array file, not the
        ``.toml``).
    piezo_z_m_per_V : float, optional
        z piezo sensitivity in m/V from the config; when given it replaces the file's own
        ``piezo_z_m_per_V`` attribute (the file's value, if different, is kept in
        ``piezo_z_m_per_V_file``). Frames only.

    Returns
    -------
    xarray.Dataset
        ``kind = "frame"``: the output of :func:`pipeline.model.validate_raw_frame` (z in m,
        currents in A, ``warnings`` listing unrecorded pixels). ``kind = "curve"``: the output
        of :func:`pipeline.model.validate_curves` (dims ``curve, sample``). Both carry
        ``source_file`` (absolute path), ``source_sha256`` (of the data file itself),
        ``source_sidecar_sha256`` (sidecar formats) and ``source_stem``; frames also
        ``frame_id`` (the file's own, else the file stem; sanitised).

    Raises
    ------
    UnreadableFileError
        Missing, truncated or mislabelled file, netCDF3 classic, missing sidecar or sidecar
        without its array file, pickled arrays, non-numeric values.
    MissingAttributeError, ShapeError, UnitsError, NonFiniteDataError, SignError
        The content breaks the input contract. Every message starts with the file path.
    ConfigError
        The reader registry is broken (see module notes), or ``piezo_z_m_per_V`` is not a
        positive number.

    Notes
    -----
    Attribute values are made netCDF-compatible and plain: numpy scalars become Python
    numbers, byte strings become text, booleans become 0/1.
    """
    p = Path(path)
    src = os.path.abspath(p)
    if piezo_z_m_per_V is not None and not (
            isinstance(piezo_z_m_per_V, int | float) and math.isfinite(piezo_z_m_per_V)
            and piezo_z_m_per_V > 0):
        raise ConfigError(f"piezo_z_m_per_V = {piezo_z_m_per_V!r} must be a positive number "
                          "(m/V)")
    raw = _read_raw(p, src)
    try:
        ds = _normalise(raw, src)
        kind = ds.attrs.get("kind")
        if kind is None:
            raise MissingAttributeError(
                f"{src}: attribute 'kind' is missing (expected {' or '.join(map(repr, KINDS))})")
        if kind not in KINDS:
            raise MissingAttributeError(
                f"{src}: attribute 'kind' = {kind!r}; expected {' or '.join(map(repr, KINDS))}")
        _check_variables(ds, kind, src)
        ds.attrs["source_file"] = src
        ds.attrs.update(_source_hashes(p))
        ds.attrs["source_stem"] = p.stem
        if kind == "frame":
            ds.attrs["frame_id"] = sanitize_id(ds.attrs.get("frame_id") or p.stem)
            if piezo_z_m_per_V is not None:
                old = ds.attrs.get("piezo_z_m_per_V")
                if old is not None and old != piezo_z_m_per_V:
                    ds.attrs["piezo_z_m_per_V_file"] = old
                ds.attrs["piezo_z_m_per_V"] = float(piezo_z_m_per_V)
            return validate_raw_frame(ds, source=src)
        return validate_curves(ds, source=src)
    except IsogapError as exc:
        new = _prefixed(exc, src)
        if new is None:
            raise
        raise new from exc
    except (TypeError, ValueError) as exc:
        raise UnreadableFileError(
            f"{src}: contents cannot be interpreted ({type(exc).__name__}: {exc})") from exc


def _source_hashes(path: Path) -> dict[str, str]:
    """``source_sha256`` of the data file itself and, for sidecar formats, the sidecar's hash
    (an edited sidecar changes the data as much as an edited array does)."""
    out = {"source_sha256": file_sha256(path)}
    side = path.with_suffix(SIDECAR_SUFFIX)
    if getattr(reader_for(path), "uses_sidecar", False) and side.is_file():
        out["source_sidecar_sha256"] = file_sha256(side)
    return out


def read_header(path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The global attributes of a built-in-format file, read without its arrays.

    Cheap (an HDF5 header or a TOML sidecar), so a scheduler can sort files into frames and
    curves without loading them. Adds ``source_file``, ``source_sha256``, ``source_stem`` and,
    for frames, ``frame_id`` exactly as :func:`read_file` would. Returns ``None`` when a header
    alone cannot tell (plug-in formats, unreadable or inconsistent files): call
    :func:`read_file`, which also reports what is wrong. Nothing here is validated.
    """
    p = Path(path)
    src = os.path.abspath(p)
    suffix = p.suffix.lower()
    try:
        if suffix in (".nc", ".h5"):
            import h5py

            with h5py.File(p, "r") as fh:
                attrs = {k: _plain(v, k, src) for k, v in fh.attrs.items()
                         if not k.startswith("_")}
        elif suffix in (".npz", ".txt", ".csv"):
            attrs, _ = read_sidecar(p)
            attrs = dict(attrs)
        else:
            return None
    except Exception:  # whatever is wrong, read_file will say it properly
        return None
    if attrs.get("kind") not in KINDS:
        return None
    attrs["source_file"] = src
    attrs.update(_source_hashes(p))
    attrs["source_stem"] = p.stem
    if attrs["kind"] == "frame":
        attrs["frame_id"] = sanitize_id(attrs.get("frame_id") or p.stem)
    return attrs


# --------------------------------------------------------------------------------------------
# finding inputs
# --------------------------------------------------------------------------------------------


def _is_hidden(name: str) -> bool:
    return name.startswith(".")


def _claims_to_be_sidecar(path: Path) -> bool:
    """An unpaired .toml is reported as an input when it looks like a sidecar: it has a
    top-level ``kind`` key, or it is not even valid TOML. Other TOML files (a config kept in the
    run folder) are not inputs."""
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError):
        return True
    return "kind" in doc


def find_inputs(run_dir: str | os.PathLike[str], *, recursive: bool = False,
                exclude: Iterable[str | os.PathLike[str]] = ()) -> list[Path]:
    """The raw input files of a run folder, sorted.

    Parameters
    ----------
    run_dir : path-like
        The run folder.
    recursive : bool
        Also look in sub-folders.
    exclude : iterable of path-like
        Files or folders to leave out (e.g. the output store, if it lives in the run folder).

    Returns
    -------
    list of Path
        Files whose suffix has a reader, sorted by their path relative to ``run_dir``. Hidden
        files and folders (names starting with ``.``, which includes the writers' temporary
        files) and ``truth/`` sub-folders are skipped. A ``.toml`` sidecar is not an input of its
        own; but a ``.toml`` with no data file of the same stem beside it, which has a top-level
        ``kind`` key (or is not valid TOML), is returned as an input: :func:`read_file` then
        raises :class:`~pipeline.errors.UnreadableFileError` for it, so the batch records the
        orphan as a failure instead of losing it silently.

    Raises
    ------
    UnreadableFileError
        ``run_dir`` is not a folder.
    ConfigError
        The reader registry is broken.
    """
    root = Path(run_dir)
    if not root.is_dir():
        raise UnreadableFileError(f"{os.path.abspath(root)}: run folder not found "
                                  "(or not a folder)")
    readers = get_readers()
    skip = {os.path.abspath(e) for e in exclude}
    data: list[Path] = []
    tomls: list[Path] = []
    stems: set[tuple[str, str]] = set()
    for folder, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(
            d for d in dirnames
            if not _is_hidden(d) and d not in SKIPPED_FOLDERS
            and os.path.abspath(os.path.join(folder, d)) not in skip) if recursive else []
        for fname in filenames:
            if _is_hidden(fname):
                continue
            p = Path(folder, fname)
            if os.path.abspath(p) in skip or not p.is_file():
                continue
            suffix = p.suffix.lower()
            if suffix == SIDECAR_SUFFIX:
                tomls.append(p)
            elif suffix in readers:
                data.append(p)
                stems.add((str(p.parent), p.stem))
    orphans = [t for t in tomls
               if (str(t.parent), t.stem) not in stems and _claims_to_be_sidecar(t)]
    return sorted(data + orphans, key=lambda q: q.relative_to(root).as_posix())


