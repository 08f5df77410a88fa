"""Frame helpers shared by the levelling stages: inputs, checks, coordinates, copies."""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS, FLAG_MEANINGS, add_warning


def _name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def _bad_names() -> str:
    return "/".join(FLAG_MEANINGS[f] for f in FLAG_MEANINGS if f & BAD_PIXELS)


def _inputs(ds: xr.Dataset, what: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Height (float64 copy), flags (uint8 copy) and the mask of pixels usable in fits."""
    if "height" not in ds.data_vars or ds["height"].dims != ("y", "x"):
        raise ProcessingError(
            f"frame {_name(ds)}: {what} needs a variable 'height' with dims (y, x) (a processed "
            f"frame from make_height_frame); found {', '.join(map(str, ds.data_vars)) or 'none'}")
    h = np.array(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        flags = np.array(ds["flags"].values, dtype=np.uint8)
    else:
        flags = np.zeros(h.shape, dtype=np.uint8)
    valid = np.isfinite(h) & ((flags & np.uint8(BAD_PIXELS)) == 0)
    return h, flags, valid


def _require(ds: xr.Dataset, valid: np.ndarray, need: int, what: str) -> None:
    n = int(valid.sum())
    if n < need:
        raise ProcessingError(
            f"frame {_name(ds)}: {what} needs at least {need} usable pixels, found {n} of "
            f"{valid.size} (the others are NaN or flagged {_bad_names()})")


def _warn_if_constant(out: xr.Dataset, h: np.ndarray, valid: np.ndarray, what: str) -> bool:
    vals = h[valid]
    if vals.size and float(vals.max() - vals.min()) == 0.0:
        add_warning(out, f"{what}: height is constant over all {vals.size} usable pixels "
                    "(no topography: feedback or channel problem?); nothing to level")
        return True
    return False


def _coords(ds: xr.Dataset) -> tuple[np.ndarray, np.ndarray, float, float, float, float]:
    """Normalised coordinates u (x), v (y) in [-1, 1] and the half ranges/pixel steps in m."""
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    if "x" not in ds.coords or "y" not in ds.coords:
        raise ProcessingError(
            f"frame {_name(ds)}: coordinates 'x' and 'y' (m) are missing; they are needed to "
            "express tilts in radians")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    hx = 0.5 * float(x.max() - x.min())
    hy = 0.5 * float(y.max() - y.min())
    if not (hx > 0 and hy > 0):
        raise ProcessingError(f"frame {_name(ds)}: coordinates x, y must span a positive range "
                              f"(got {2 * hx:g} m x {2 * hy:g} m)")
    u = (x - 0.5 * float(x.max() + x.min())) / hx
    v = (y - 0.5 * float(y.max() + y.min())) / hy
    dx = 2 * hx / max(nx - 1, 1)
    dy = 2 * hy / max(ny - 1, 1)
    return u, v, hx, hy, dx, dy



def _copy_with(ds: xr.Dataset, *, height: np.ndarray, flags: np.ndarray | None = None,
               uncertainty: np.ndarray | None = None,
               extra: dict[str, tuple[np.ndarray, dict[str, Any]]] | None = None,
               attrs: dict[str, Any] | None = None) -> xr.Dataset:
    """A new frame with some maps replaced (float32 heights), the input left untouched."""
    out = ds.copy()
    out.attrs = dict(ds.attrs)
    out["height"] = (("y", "x"), height.astype(np.float32), dict(ds["height"].attrs))
    if flags is not None:
        fa = dict(ds["flags"].attrs) if "flags" in ds else {}
        out["flags"] = (("y", "x"), flags.astype(np.uint8), fa)
    if uncertainty is not None and "height_uncertainty" in ds:
        out["height_uncertainty"] = (("y", "x"), uncertainty.astype(np.float32),
                                     dict(ds["height_uncertainty"].attrs))
    for name, (arr, a) in (extra or {}).items():
        out[name] = (("y", "x"), arr, dict(a))
    out.attrs.update(attrs or {})
    return out


def _add_variance(ds: xr.Dataset, var: np.ndarray) -> np.ndarray | None:
    """sqrt(u^2 + var) for the frame's uncertainty map (None when the frame has none)."""
    if "height_uncertainty" not in ds:
        return None
    u = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
    return np.sqrt(u * u + var)
