"""Export processed height maps from a store into files other tools read.

Formats (one file per frame, named after the frame id, in one output folder):

``npy``
    ``<id>.npy`` — the height map as float32 (m), rows = y, columns = x, exactly as stored;
    ``<id>.json`` beside it — pixel size (m), origin, units, frame id, source and acquisition
    attributes.
``csv``
    ``<id>.csv`` — comma-separated heights in m with nine significant digits (enough to give
    back the stored float32 values exactly); ``#`` comment lines first, giving the pixel size,
    units and layout.
``png``
    ``<id>.png`` — the quick-look image (:func:`pipeline.report.quicklook.render_quicklook`).
``tiff``
    ``<id>.tif`` — 32-bit float TIFF (m), resolution tags in pixels per centimetre and an
    ImageDescription holding the same JSON as the ``npy`` sidecar (needs the optional
    dependency ``tifffile``: ``pip install 'isogap[export]'``).

In every array format row 0 is the first slow-axis position (smallest ``y`` index), as in the
store; non-finite values mark pixels that were not recorded.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Sequence
from fractions import Fraction
from pathlib import Path
from typing import Any, Literal

import numpy as np
import xarray as xr

from pipeline._version import __version__
from pipeline.errors import IsogapError
from pipeline.io.store import open_store
from pipeline.model import sanitize_id

__all__ = [
    "EXPORT_FORMATS",
    "ExportError",
    "OutputExistsError",
    "export_frames",
    "frame_metadata",
    "pixel_size_m",
]

ExportFormat = Literal["npy", "csv", "png", "tiff"]
EXPORT_FORMATS: tuple[str, ...] = ("npy", "csv", "png", "tiff")

#: Frame attributes copied into the export metadata when present.
_COPIED_ATTRS = ("source_file", "source_sha256", "start_time", "mode", "bias_V", "setpoint_A",
                 "status", "work_function_eV", "step_height_m", "step_height_uncertainty_m",
                 "scan_angle_deg", "line_time_s")


class ExportError(IsogapError):
    """Frames cannot be exported as asked (unknown format, missing optional dependency, ...)."""


class OutputExistsError(ExportError):
    """An output file or folder exists and overwriting was not allowed."""


def pixel_size_m(ds: xr.Dataset) -> tuple[float, float]:
    """Pixel size (x, y) of a frame in m, from its coordinates (or its scan size).

    The coordinates are authoritative: a lateral calibration rescales them, not the acquisition
    attributes. A one-pixel axis falls back to ``scan_size_*_m / n``.
    """
    out = []
    for axis in ("x", "y"):
        n = ds.sizes[axis]
        c = np.asarray(ds[axis].values, float) if axis in ds.coords else None
        if c is not None and n >= 2:
            out.append(abs(float(c[-1] - c[0])) / (n - 1))
            continue
        size = ds.attrs.get(f"scan_size_{axis}_m")
        if size is None:
            raise ExportError(f"frame {ds.attrs.get('frame_id', '?')}: no '{axis}' coordinate "
                              f"and no attribute 'scan_size_{axis}_m', so the pixel size is "
                              "unknown")
        out.append(float(size) / n)
    return out[0], out[1]


def _plain(value: Any) -> Any:
    """A JSON-ready attribute value (numpy scalars/arrays to Python, NaN to null)."""
    if isinstance(value, np.generic | np.ndarray):
        value = value.tolist()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, list):
        return [_plain(v) for v in value]
    return value


def frame_metadata(ds: xr.Dataset, *, store: str | os.PathLike[str] | None = None
                   ) -> dict[str, Any]:
    """The metadata written beside (npy) or into (tiff) an exported height map."""
    px, py = pixel_size_m(ds)
    ny, nx = ds["height"].shape
    meta: dict[str, Any] = {
        "frame_id": str(ds.attrs.get("frame_id", "")),
        "quantity": "height",
        "units": "m",
        "dtype": "float32",
        "shape": [int(ny), int(nx)],
        "pixel_size_x_m": px,
        "pixel_size_y_m": py,
        "x0_m": float(ds["x"].values[0]) if "x" in ds.coords else None,
        "y0_m": float(ds["y"].values[0]) if "y" in ds.coords else None,
        "layout": "rows = y (slow axis), columns = x (fast axis); row 0 is y0; "
                  "x0_m/y0_m are pixel centres; NaN = not recorded",
    }
    for key in _COPIED_ATTRS:
        if key in ds.attrs:
            meta[key] = _plain(ds.attrs[key])
    if store is not None:
        meta["store"] = str(store)
    meta["software"] = f"isogap {__version__}"
    return meta


def _suffixes(fmt: str) -> tuple[str, ...]:
    return {"npy": (".npy", ".json"), "csv": (".csv",), "png": (".png",),
            "tiff": (".tif",)}[fmt]


def _import_tifffile() -> Any:
    try:
        import tifffile
    except ImportError:
        raise ExportError("TIFF export needs the optional package 'tifffile'; install it with "
                          "pip install 'isogap[export]' (or choose npy, csv or png)") from None
    return tifffile


def _with(base: Path, suffix: str) -> Path:
    """``base`` plus a suffix (frame ids may contain dots, so never ``with_suffix``)."""
    return base.with_name(base.name + suffix)


def _write_npy(ds: xr.Dataset, base: Path, meta: dict[str, Any]) -> list[Path]:
    npy, side = _with(base, ".npy"), _with(base, ".json")
    np.save(npy, np.ascontiguousarray(ds["height"].values, dtype=np.float32),
            allow_pickle=False)
    side.write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return [npy, side]


def _write_csv(ds: xr.Dataset, base: Path, meta: dict[str, Any]) -> list[Path]:
    path = _with(base, ".csv")
    header = "\n".join([
        f"isogap height export, frame {meta['frame_id']}, units m",
        f"pixel_size_x_m = {meta['pixel_size_x_m']!r}",
        f"pixel_size_y_m = {meta['pixel_size_y_m']!r}",
        "layout: rows are y (slow axis, row 0 first), columns are x (fast axis); "
        "nan marks pixels not recorded",
    ])
    np.savetxt(path, np.asarray(ds["height"].values, dtype=np.float32), fmt="%.9g",
               delimiter=",", header=header, comments="# ", encoding="utf-8")
    return [path]


def _resolution(pixel_m: float) -> tuple[int, int]:
    """Pixels per centimetre as a TIFF rational (numerator, denominator), both < 2**32."""
    per_cm = Fraction(0.01 / pixel_m)
    frac = per_cm.limit_denominator(1000)
    if frac.numerator >= 2**32:
        raise ExportError(f"pixel size {pixel_m:g} m is too small for the TIFF resolution tags "
                          "(more than 2**32 pixels per cm)")
    return frac.numerator, max(frac.denominator, 1)


def _write_tiff(ds: xr.Dataset, base: Path, meta: dict[str, Any]) -> list[Path]:
    tifffile = _import_tifffile()
    path = _with(base, ".tif")
    tifffile.imwrite(
        path, np.ascontiguousarray(ds["height"].values, dtype=np.float32),
        photometric="minisblack",
        resolution=(_resolution(meta["pixel_size_x_m"]), _resolution(meta["pixel_size_y_m"])),
        resolutionunit="CENTIMETER", description=json.dumps(meta),
        software=f"isogap {__version__}", metadata=None)
    return [path]


def _write_png(ds: xr.Dataset, base: Path, meta: dict[str, Any]) -> list[Path]:
    from pipeline.report.quicklook import render_quicklook

    return [render_quicklook(ds, _with(base, ".png"))]


_WRITERS = {"npy": _write_npy, "csv": _write_csv, "png": _write_png, "tiff": _write_tiff}


def export_frames(
    store_path: str | os.PathLike[str],
    out_dir: str | os.PathLike[str],
    *,
    frame_ids: Sequence[str] | None = None,
    fmt: ExportFormat = "npy",
    overwrite: bool = False,
) -> list[Path]:
    """Write the height maps of a store's frames as files for other tools.

    Parameters
    ----------
    store_path : path-like
        An isogap store.
    out_dir : path-like
        Output folder (created if missing). Files are named after the frame ids.
    frame_ids : sequence of str, optional
        Frames to export (default: all, in store order). Unknown ids are an error before
        anything is written.
    fmt : {"npy", "csv", "png", "tiff"}
        File format; see the module docstring for what each one holds.
    overwrite : bool, optional
        Replace existing files. Without it an existing target file is an error (checked for
        every frame before the first file is written).

    Returns
    -------
    list of pathlib.Path
        Every file written (for ``npy`` the array and its JSON sidecar).

    Raises
    ------
    ExportError
        Unknown format, unknown frame id, or ``tifffile`` missing for TIFF.
    OutputExistsError
        A target file exists and ``overwrite`` is false.
    pipeline.errors.StoreError
        The store cannot be read.

    Notes
    -----
    Heights are written exactly as stored (float32 metres; ``csv`` with 9 significant digits,
    which reproduces every float32 value). The pixel size comes from the frame's coordinates,
    so a lateral calibration is carried along. TIFF resolution tags are rationals in pixels
    per centimetre (accurate to about 1e-9 relative); the exact pixel size in metres is in the
    JSON description.

    References
    ----------
    .. [1] IEEE Std 754-2019, Standard for Floating-Point Arithmetic, §5.12.2 (9 significant
       decimal digits recover every binary32 value).
    .. [2] TIFF Revision 6.0 (Adobe, 1992): XResolution/YResolution, ResolutionUnit 3 =
       centimetre.
    """
    if fmt not in EXPORT_FORMATS:
        raise ExportError(f"export format {fmt!r} is not known; expected one of "
                          f"{', '.join(EXPORT_FORMATS)}")
    if fmt == "tiff":
        _import_tifffile()
    store = open_store(store_path)
    ids = list(store.frame_ids) if frame_ids is None else [str(f) for f in frame_ids]
    unknown = [f for f in ids if f not in store.frame_ids]
    if unknown:
        raise ExportError(f"store {store.path}: no frame(s) {', '.join(map(repr, unknown))} "
                          f"(has: {', '.join(store.frame_ids[:10]) or 'none'}"
                          f"{', ...' if len(store.frame_ids) > 10 else ''})")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise ExportError(f"export folder {out} exists and is not a folder")
    names = {fid: sanitize_id(fid) for fid in ids}
    if not overwrite:
        for fid in ids:
            for suffix in _suffixes(fmt):
                target = out / f"{names[fid]}{suffix}"
                if target.exists():
                    raise OutputExistsError(
                        f"export: {target} already exists (frame {fid!r}); pass "
                        "overwrite=True (--overwrite) to replace it, or choose another folder")
    out.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    for fid in ids:
        ds = store.frame(fid)
        meta = frame_metadata(ds, store=store.path)
        written.extend(_WRITERS[fmt](ds, out / names[fid], meta))
    return written
