"""NumPy ``.npz`` archives with a TOML sidecar (DESIGN.md §3).

Layout: ``f012.npz`` holds the arrays under the contract's variable names; ``f012.toml`` (same
stem, same folder) holds the global attributes at its top level and each variable's own
attributes in a table named after the variable::

    kind = "frame"
    mode = "constant-height"
    bias_V = 0.5
    ...
    [current]
    units = "A"

The archive is always loaded with ``allow_pickle=False``: an array of Python objects is refused,
never unpickled. The sidecar helpers here are shared with the text-grid format
(:mod:`pipeline.io.textgrid`).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
import tomllib
import zipfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline.config import toml_value
from pipeline.errors import UnreadableFileError

__all__ = [
    "NPZ_READER",
    "SIDECAR_SUFFIX",
    "NpzReader",
    "format_sidecar",
    "frame_or_curve_dims",
    "read_sidecar",
    "sidecar_path",
]

SIDECAR_SUFFIX = ".toml"

#: First bytes of a zip archive (local file header) and of an empty archive (end record).
ZIP_SIGNATURES = (b"PK\x03\x04", b"PK\x05\x06")
#: First bytes of a single ``.npy`` array (not an archive).
NPY_SIGNATURE = b"\x93NUMPY"

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


# --------------------------------------------------------------------------------------------
# sidecar TOML
# --------------------------------------------------------------------------------------------


def sidecar_path(data_path: Path) -> Path:
    """The sidecar of a data file: same folder, same stem, suffix ``.toml``."""
    return data_path.with_suffix(SIDECAR_SUFFIX)


def _attr_from_toml(value: Any, where: str, data_path: Path) -> Any:
    """Convert one TOML value into a netCDF-compatible attribute value.

    TOML dates and times become ISO 8601 strings; booleans become the integers 0/1 (netCDF has no
    boolean attribute type); arrays become 1-D numpy arrays (numbers) or lists (strings).
    """
    if isinstance(value, bool):
        return int(value)
    if isinstance(value, int | float | str):
        return value
    if isinstance(value, _dt.datetime | _dt.date | _dt.time):
        return value.isoformat()
    if isinstance(value, list):
        items = [_attr_from_toml(v, where, data_path) for v in value]
        if all(isinstance(v, str) for v in items) and items:
            return items
        if all(isinstance(v, int | float) for v in items):
            return np.asarray(items)
    raise UnreadableFileError(
        f"{data_path}: sidecar value {where} = {value!r} is not an attribute value "
        "(expected a number, a string, a date/time or a flat array of numbers or strings)")


def read_sidecar(data_path: Path) -> tuple[dict[str, Any], dict[str, dict[str, Any]]]:
    """Read the TOML sidecar of ``data_path``.

    Returns
    -------
    attrs : dict
        Top-level keys: the file's global attributes.
    tables : dict of dict
        One table per variable: that variable's own attributes.

    Raises
    ------
    UnreadableFileError
        If the sidecar is missing, not UTF-8, not valid TOML, or nests tables deeper than one
        level. The message starts with ``data_path`` and names the sidecar.
    """
    side = sidecar_path(data_path)
    try:
        raw = side.read_bytes()
    except FileNotFoundError:
        raise UnreadableFileError(
            f"{data_path}: sidecar {side.name} not found (a {data_path.suffix} file needs its "
            f"attributes in a TOML file of the same stem: {side})") from None
    except OSError as exc:
        raise UnreadableFileError(f"{data_path}: cannot read sidecar {side} ({exc})") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise UnreadableFileError(f"{data_path}: sidecar {side} is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise UnreadableFileError(
            f"{data_path}: sidecar {side} is not valid TOML ({exc})") from None
    attrs: dict[str, Any] = {}
    tables: dict[str, dict[str, Any]] = {}
    for key, value in doc.items():
        if isinstance(value, dict):
            table: dict[str, Any] = {}
            for k, v in value.items():
                if isinstance(v, dict):
                    raise UnreadableFileError(
                        f"{data_path}: sidecar {side.name}: table [{key}.{k}] is nested too deep "
                        "(only one table per variable, holding that variable's attributes)")
                table[k] = _attr_from_toml(v, f"[{key}] {k}", data_path)
            tables[key] = table
        else:
            attrs[key] = _attr_from_toml(value, key, data_path)
    return attrs, tables


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(text: str) -> str:
    # JSON string escapes (\" \\ \n \t \uXXXX ...) are all valid TOML basic-string escapes;
    # DEL is a control character in TOML but not in JSON.
    if any(ord(c) < 0x20 or ord(c) == 0x7F for c in text):
        return json.dumps(text, ensure_ascii=False).replace("\x7f", "\\u007f")
    return toml_value(text)


def _toml_attr(value: Any, where: str) -> str:
    """Format one attribute value as TOML (numpy scalars and arrays converted)."""
    if isinstance(value, np.ndarray):
        if value.ndim > 1:
            raise TypeError(f"attribute {where}: cannot write a {value.ndim}-D array to TOML")
        value = value.tolist()
    elif isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, bytes):
        value = value.decode("utf-8")
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_toml_attr(v, where) for v in value) + "]"
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, str):
        return _toml_string(value)
    try:
        return toml_value(value)
    except TypeError:
        raise TypeError(f"attribute {where}: cannot write {type(value).__name__} "
                        f"{value!r} to TOML") from None


def format_sidecar(attrs: Mapping[str, Any],
                   tables: Mapping[str, Mapping[str, Any]] | None = None) -> str:
    """TOML text of a sidecar: ``attrs`` at the top level, one table per entry of ``tables``.

    Floats are written with ``repr`` precision, so they read back exactly; non-finite floats are
    written as TOML ``nan``/``inf``. Empty tables are left out.
    """
    lines = [f"{_toml_key(str(k))} = {_toml_attr(v, str(k))}" for k, v in attrs.items()]
    for name, table in (tables or {}).items():
        if not table:
            continue
        lines += ["", f"[{_toml_key(str(name))}]"]
        lines += [f"{_toml_key(str(k))} = {_toml_attr(v, f'[{name}] {k}')}"
                  for k, v in table.items()]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# shared dimension naming
# --------------------------------------------------------------------------------------------


def frame_or_curve_dims(arrays: Mapping[str, np.ndarray], kind: Any) -> dict[str, tuple[str, ...]]:
    """Dimension names for unnamed arrays (npz, text grid), following DESIGN.md §3.

    Frames: 2-D arrays get ``(y, x)``. Curves: ``(sample,)`` or ``(curve, sample)``. Any other
    rank gets names of its own, and an array whose sizes clash with an earlier array's gets
    variable-specific names, so that an inconsistent file still becomes a dataset and the
    validator can report exactly which shape is wrong.
    """
    canonical = ({1: ("sample",), 2: ("curve", "sample")} if kind == "curve"
                 else {2: ("y", "x")})
    sizes: dict[str, int] = {}
    out: dict[str, tuple[str, ...]] = {}
    for name, arr in arrays.items():
        dims = canonical.get(arr.ndim, tuple(f"{name}_dim{i}" for i in range(arr.ndim)))
        if any(sizes.get(d, n) != n for d, n in zip(dims, arr.shape, strict=True)):
            dims = tuple(f"{d}_{name}" for d in dims)
        sizes.update(zip(dims, arr.shape, strict=True))
        out[name] = dims
    return out


# --------------------------------------------------------------------------------------------
# reader
# --------------------------------------------------------------------------------------------


def check_zip_signature(path: Path) -> None:
    """Refuse a file that is not a zip archive (by its first bytes)."""
    try:
        with path.open("rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise UnreadableFileError(f"{path}: cannot read ({exc})") from None
    if not head:
        raise UnreadableFileError(f"{path}: file is empty")
    if head.startswith(NPY_SIGNATURE):
        raise UnreadableFileError(
            f"{path}: is a single .npy array, not an .npz archive (save with numpy.savez)")
    if not head.startswith(ZIP_SIGNATURES):
        raise UnreadableFileError(
            f"{path}: not an .npz archive (no zip signature; first bytes {head[:4]!r})")


class NpzReader:
    """Reader of ``.npz`` archives with a TOML sidecar."""

    name = "npz"
    suffixes = (".npz",)
    uses_sidecar = True

    def read(self, path: Path) -> xr.Dataset:
        """Read the archive and its sidecar into a dataset, as found (not validated).

        Arrays named ``x`` or ``y`` are not read: frame coordinates are always derived from the
        scan attributes.
        """
        path = Path(path)
        check_zip_signature(path)
        attrs, tables = read_sidecar(path)
        arrays: dict[str, np.ndarray] = {}
        try:
            # numpy leaks its own file handle when the zip is damaged: pass ours.
            with path.open("rb") as fh, np.load(fh, allow_pickle=False) as archive:
                for key in archive.files:
                    if key in ("x", "y"):
                        continue
                    try:
                        arrays[key] = np.asarray(archive[key])
                    except ValueError as exc:
                        if "allow_pickle" in str(exc):
                            raise UnreadableFileError(
                                f"{path}: array '{key}' holds Python objects; pickled data is "
                                "refused (store plain numeric arrays)") from None
                        raise
        except (zipfile.BadZipFile, EOFError) as exc:
            raise UnreadableFileError(
                f"{path}: damaged or truncated .npz archive ({exc})") from None
        unknown = sorted(set(tables) - set(arrays))
        if unknown:
            raise UnreadableFileError(
                f"{path}: sidecar {sidecar_path(path).name} has table(s) "
                f"{', '.join(f'[{t}]' for t in unknown)} but the archive has no such array "
                f"(arrays: {', '.join(arrays) or 'none'})")
        dims = frame_or_curve_dims(arrays, attrs.get("kind"))
        data_vars = {k: (dims[k], a, tables.get(k, {})) for k, a in arrays.items()}
        return xr.Dataset(data_vars, attrs=attrs)


NPZ_READER = NpzReader()
