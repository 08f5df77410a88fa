"""Apparent-barrier map: φ_ap over a grid of approach curves, with its uncertainty."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import xarray as xr
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = ["plot_barrier_map"]


def plot_barrier_map(
    ds: xr.Dataset, path: str | os.PathLike[str] | None = None, *, name: str = "",
    dpi: float = 110,
) -> Figure:
    """Two panels: φ_ap (eV) on the curve grid, and its standard uncertainty.

    Parameters
    ----------
    ds : xarray.Dataset
        An apparent-barrier map (``phi_ap_eV``, ``phi_ap_uncertainty_eV`` on ``y, x`` in m), as
        made by :func:`pipeline.stages.barrier.apparent_barrier_map`.
    path : path-like, optional
        Where to save the PNG.
    name : str, optional
        The map's name for the title (default: its ``curve_set_id``).
    """
    phi = np.asarray(ds["phi_ap_eV"].values, dtype=float)
    unc = np.asarray(ds["phi_ap_uncertainty_eV"].values, dtype=float)
    x = np.asarray(ds["x"].values) * 1e9
    y = np.asarray(ds["y"].values) * 1e9
    dx = (x[1] - x[0]) if x.size > 1 else 1.0
    dy = (y[1] - y[0]) if y.size > 1 else 1.0
    extent = (x[0] - dx / 2, x[-1] + dx / 2, y[0] - dy / 2, y[-1] + dy / 2)
    fig = Figure(figsize=(8.2, 3.6), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, 2)
    for ax, data, label, cmap in ((axes[0], phi, "apparent barrier height φ_ap (eV)", "viridis"),
                                  (axes[1], unc, "standard uncertainty (eV)", "magma")):
        masked = np.ma.masked_invalid(data)
        im = ax.imshow(masked, origin="lower", extent=extent, cmap=cmap, interpolation="nearest")
        ax.set_facecolor("0.8")
        ax.set_xlabel("x (nm)")
        ax.set_ylabel("y (nm)")
        fig.colorbar(im, ax=ax, label=label, shrink=0.9)
    n_ok = int(np.isfinite(phi).sum())
    name = name or str(ds.attrs.get("curve_set_id", "curve grid"))
    fig.suptitle(f"barrier map {name}: {n_ok} of {phi.size} grid points fitted "
                 "(grey: curve rejected)", fontsize=10)
    if path is not None:
        Path(path).parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(path, dpi=dpi)
    return fig
