"""Apparent-barrier maps (private: import from pipeline.stages.barrier).

:func:`apparent_barrier_map` turns a frame with a d ln I/dz channel, or a grid of approach
curves, into φ_ap(y, x) with its uncertainty.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import xarray as xr

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.model import stage
from pipeline.stages.barrier_noise import _mad_sigma
from pipeline.stages.barrier_table import fit_curves

__all__ = ["apparent_barrier_map"]


@stage(version="1")
def apparent_barrier_map(
    data: xr.Dataset,
    *,
    grid_tolerance_m: float = 1e-12,
    **fit_options: Any,
) -> xr.Dataset:
    """Per-pixel apparent barrier height φ_ap(y, x) with its uncertainty.

    Parameters
    ----------
    data : xarray.Dataset
        Either a frame (``kind = "frame"``) with a ``dlnI_dz_per_m`` channel, or with
        ``dI_dz_A_per_m`` and ``current`` (a z-modulation lock-in signal); or a grid of curves
        (``kind = "curve"``) with ``position_x_m``/``position_y_m`` attributes (one value per
        curve).
    grid_tolerance_m : float
        Curve positions closer than this are the same grid node.
    **fit_options
        Passed to :func:`fit_curves` for a grid of curves.

    Returns
    -------
    xarray.Dataset
        ``phi_ap_eV`` and ``phi_ap_uncertainty_eV`` (float32, dims ``y, x``, eV) with ``x``/``y``
        coordinates in m; for curves also ``accepted`` (uint8) and ``n_points``.

    Raises
    ------
    ProcessingError
        If the dataset has neither kind of input.

    Notes
    -----
    Frames: φ_ap = (ħ²/8mₑ)(d ln I/dz)² per pixel; the slope's noise σ_s is estimated once
    from pixel-to-pixel differences along the fast axis (MAD of first differences / √2, which
    assumes that the barrier varies slowly on the pixel scale) and propagated as
    σ_φ = 2(ħ²/8mₑ)|s|σ_s. Curves: one :func:`fit_approach_curve` per curve, placed on the grid
    of their distinct positions; rejected curves give NaN.

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57.
    """
    kind = data.attrs.get("kind")
    name = str(data.attrs.get("frame_id") or data.attrs.get("curve_set_id")
               or data.attrs.get("source_file") or "<data>")
    if kind == "frame":
        if "dlnI_dz_per_m" in data:
            s = np.asarray(data["dlnI_dz_per_m"].values, dtype=float)
        elif "dI_dz_A_per_m" in data and "current" in data:
            with np.errstate(divide="ignore", invalid="ignore"):
                s = (np.asarray(data["dI_dz_A_per_m"].values, float)
                     / np.asarray(data["current"].values, float))
        else:
            raise ProcessingError(
                f"apparent_barrier_map: frame {name} has no 'dlnI_dz_per_m' channel (nor "
                "'dI_dz_A_per_m' with 'current')")
        sigma_s = _mad_sigma(np.diff(s, axis=1).ravel()) / math.sqrt(2.0)
        phi = physics.apparent_barrier_eV(s)
        sig = 2.0 * physics.BARRIER_PREFACTOR_EV_M2 * np.abs(s) * sigma_s
        coords = {k: data.coords[k] for k in ("x", "y") if k in data.coords}
        out = xr.Dataset(
            {"phi_ap_eV": (("y", "x"), phi.astype(np.float32),
                           {"units": "eV", "long_name": "apparent barrier height"}),
             "phi_ap_uncertainty_eV": (("y", "x"), sig.astype(np.float32),
                                       {"units": "eV", "long_name": "standard uncertainty"})},
            coords=coords)
        out.attrs = {"kind": "barrier_map", "source": name,
                     "phi_ap_median_eV": float(np.nanmedian(phi))}
        return out
    if kind == "curve":
        if "position_x_m" not in data.attrs or "position_y_m" not in data.attrs:
            raise ProcessingError(f"apparent_barrier_map: curves {name} have no "
                                  "'position_x_m'/'position_y_m' attributes")
        n = data.sizes["curve"]
        px = np.broadcast_to(np.asarray(data.attrs["position_x_m"], float), (n,))
        py = np.broadcast_to(np.asarray(data.attrs["position_y_m"], float), (n,))
        table = fit_curves(data, **fit_options)

        def nodes(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            order = np.sort(p)
            keep = np.concatenate([[True], np.diff(order) > grid_tolerance_m])
            levels = order[keep]
            return levels, np.searchsorted(levels, p - grid_tolerance_m)

        xs, ix = nodes(px)
        ys, iy = nodes(py)
        shape = (ys.size, xs.size)
        acc = np.asarray(table["accepted"].values).astype(bool)

        def grid(values: np.ndarray, fill: float, dtype: type) -> np.ndarray:
            g = np.full(shape, fill, dtype=dtype)
            g[iy, ix] = values
            return g

        phi = np.where(acc, table["phi_ap_eV"].values, np.nan)
        sig = np.where(acc, table["phi_ap_uncertainty_eV"].values, np.nan)
        out = xr.Dataset(
            {"phi_ap_eV": (("y", "x"), grid(phi, np.nan, np.float32),
                           {"units": "eV", "long_name": "apparent barrier height"}),
             "phi_ap_uncertainty_eV": (("y", "x"), grid(sig, np.nan, np.float32),
                                       {"units": "eV", "long_name": "standard uncertainty"}),
             "accepted": (("y", "x"), grid(acc.astype(np.uint8), 0, np.uint8),
                          {"long_name": "curve fit accepted (1) or not (0)"}),
             "n_points": (("y", "x"), grid(table["n_points"].values, 0, np.int32),
                          {"long_name": "samples in the fit range"})},
            coords={"x": ("x", xs, {"units": "m"}), "y": ("y", ys, {"units": "m"})})
        out.attrs = {"kind": "barrier_map", "source": name,
                     "phi_ap_median_eV": float(np.nanmedian(phi)) if acc.any() else math.nan}
        return out
    raise ProcessingError(f"apparent_barrier_map: {name}: kind {kind!r}; expected a frame with "
                          "a d ln I/dz channel or a grid of curves")
