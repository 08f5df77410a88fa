"""Write a simulated run to a folder: raw data files plus the ground truth under ``truth/``.

Layout of the folder written by :func:`write_run`::

    frame_000.nc, frame_001.npz + frame_001.toml, frame_002.txt + frame_002.toml, ...
    curves_003.nc, ...                     raw inputs (DESIGN.md §3), time order = number order
    truth/run.toml                         run-level truth (barrier, drift, crystal, file list)
    truth/frame_000.nc, truth/curves_003.nc, ...   per-file truth (netCDF, zlib-compressed)

Readers skip the ``truth`` sub-folder, so the folder is a valid run folder as it stands.
"""

from __future__ import annotations

import contextlib
import math
import os
import shutil
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from pipeline.config import toml_value
from pipeline.errors import IsogapError
from pipeline.io.writers import write_raw_netcdf, write_raw_npz, write_raw_textgrid
from pipeline.simulate.run import RunSpec, SimulatedFile, simulate_run

__all__ = ["TRUTH_FOLDER", "format_run_toml", "write_run"]

TRUTH_FOLDER = "truth"
RUN_TRUTH_FILE = "run.toml"


def _toml(v: Any) -> str:
    """A TOML value; numpy values become Python ones, non-finite floats TOML's nan/inf."""
    if isinstance(v, np.ndarray):
        v = v.tolist()
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml(x) for x in v) + "]"
    if isinstance(v, float) and not math.isfinite(v):
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return toml_value(v)


def format_run_toml(truth: dict[str, Any]) -> str:
    """TOML text of the run-level truth: scalars first, then ``[spec]`` and the arrays of
    tables ``[[frames]]``, ``[[curves]]``, ``[[steps]]``, ``[[adsorbates]]``."""
    lines = ["# Ground truth of a synthetic run made by the isogap simulator (SI units).", ""]
    tables: dict[str, dict[str, Any]] = {}
    arrays: dict[str, list[dict[str, Any]]] = {}
    for key, value in truth.items():
        if isinstance(value, dict):
            tables[key] = value
        elif isinstance(value, list) and value and all(isinstance(x, dict) for x in value):
            arrays[key] = value
        elif isinstance(value, list) and not value:
            lines.append(f"# {key}: none")
        else:
            lines.append(f"{key} = {_toml(value)}")
    for name, table in tables.items():
        lines += ["", f"[{name}]"]
        lines += [f"{k} = {_toml(v)}" for k, v in table.items()]
    for name, rows in arrays.items():
        for row in rows:
            lines += ["", f"[[{name}]]"]
            lines += [f"{k} = {_toml(v)}" for k, v in row.items()]
    return "\n".join(lines) + "\n"


#: Truth variables left out of the written files to keep sample folders small (recomputable
#: with :func:`pipeline.simulate.simulate_run` from the seed in ``truth/run.toml``).
ON_DISK_DROPPED = ("height_at_pixel_backward",)

#: Resolution of the packed truth height maps (1 fm = 0.001 pm), m.
TRUTH_HEIGHT_RESOLUTION_M = 1e-15


def _truth_for_disk(ds: xr.Dataset) -> xr.Dataset:
    """Height maps CF-packed as int32 (``scale_factor`` 1 fm, ``add_offset`` near the mean).

    xarray (and any CF reader) unpacks them to float64 on reading; the packing error is at most
    0.0005 pm, and the integers compress better than float mantissas. Vectors stay float64.
    The variables in :data:`ON_DISK_DROPPED` are not written.
    """
    out = ds.drop_vars([v for v in ON_DISK_DROPPED if v in ds.data_vars])
    for name, var in out.data_vars.items():
        if var.ndim == 2 and var.dtype.kind == "f":
            vals = np.asarray(var.values, dtype=np.float64)
            res = TRUTH_HEIGHT_RESOLUTION_M
            offset = float(np.round(np.nanmean(vals) / res) * res)
            packed = np.round((vals - offset) / res)
            if np.nanmax(np.abs(packed)) >= 2**31 - 1:
                out[name] = var.astype(np.float32)  # pragma: no cover - > 2 mm of relief
                continue
            attrs = {**var.attrs, "scale_factor": res, "add_offset": offset}
            out[name] = (var.dims, packed.astype(np.int32), attrs)
    return out


def _write_truth(ds: xr.Dataset, path: Path) -> None:
    """Truth netCDF, zlib level 4 with the shuffle filter (lossless). Not atomic by itself: it is
    written inside the hidden staging folder that :func:`write_run` renames into place."""
    encoding = {name: {"zlib": True, "complevel": 4, "shuffle": True}
                for name, var in ds.variables.items() if var.ndim > 1}
    ds.to_netcdf(path, engine="h5netcdf", encoding=encoding)


def _write_entry(folder: Path, entry: SimulatedFile) -> None:
    path = folder / entry.name
    path.parent.mkdir(parents=True, exist_ok=True)
    if entry.format == "nc":
        write_raw_netcdf(entry.dataset, path)
    elif entry.format == "npz":
        write_raw_npz(entry.dataset, path)
    elif entry.format == "txt":
        (channel,) = (str(v) for v in entry.dataset.data_vars)
        write_raw_textgrid(entry.dataset, path, channel=channel)
    elif entry.format == "truth":
        _write_truth(_truth_for_disk(entry.dataset), path)
    else:  # pragma: no cover - simulate_run only makes the formats above
        raise IsogapError(f"simulated file {entry.name}: unknown format {entry.format!r}")


def write_run(out_dir: str | os.PathLike[str], spec: RunSpec, *, seed: int | None = None,
              overwrite: bool = False) -> Path:
    """Simulate ``spec`` with ``seed`` and write the run folder ``out_dir``.

    Parameters
    ----------
    out_dir : path-like
        Folder to create. An existing non-empty folder is refused unless ``overwrite``; even
        then only a folder that holds a previous simulated run (``truth/run.toml``) is replaced,
        never an arbitrary one.
    spec : RunSpec
        The run (e.g. :func:`pipeline.simulate.preset` ``("sample")``).
    seed : int, optional
        Seed (default ``spec.seed``); the same seed writes bit-identical data files.
    overwrite : bool
        Replace a previous simulated run in ``out_dir``.

    Returns
    -------
    Path
        ``out_dir``.

    Notes
    -----
    Everything is written into a hidden sibling folder first, which then replaces ``out_dir``
    by renames, so an interrupted call leaves either the old run or the new one, never a mix.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise IsogapError(f"simulate: {out} exists and is not a folder")
    if out.is_dir() and any(out.iterdir()):
        if not overwrite:
            raise IsogapError(f"simulate: folder {out} exists and is not empty; pass "
                              "overwrite=True (--overwrite) to replace a previous simulated run")
        if not (out / TRUTH_FOLDER / RUN_TRUTH_FILE).is_file():
            raise IsogapError(
                f"simulate: folder {out} is not empty and holds no {TRUTH_FOLDER}/"
                f"{RUN_TRUTH_FILE}, so it is not a simulated run; refusing to replace it "
                "(choose an empty or new folder)")
    files, truth = simulate_run(spec, seed=seed)
    out.parent.mkdir(parents=True, exist_ok=True)
    tag = uuid.uuid4().hex[:10]
    tmp = out.parent / f".{out.name}.new-{tag}"
    old = out.parent / f".{out.name}.old-{tag}"
    try:
        tmp.mkdir()
        for entry in files:
            _write_entry(tmp, entry)
        (tmp / TRUTH_FOLDER).mkdir(exist_ok=True)
        (tmp / TRUTH_FOLDER / RUN_TRUTH_FILE).write_text(format_run_toml(truth),
                                                          encoding="utf-8")
        if out.exists():
            os.replace(out, old)
        os.replace(tmp, out)
    finally:
        with contextlib.suppress(FileNotFoundError):
            shutil.rmtree(tmp)
        with contextlib.suppress(FileNotFoundError):
            shutil.rmtree(old)
    return out
