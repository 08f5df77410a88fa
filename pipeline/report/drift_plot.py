"""Figure of a run's drift: measured displacement against time with the fitted model.

Display only: the table stays in SI units (:func:`pipeline.stages.drift.drift_table`) and is
converted to nm and minutes for the axes. The figure is a :class:`~matplotlib.figure.Figure` on
an Agg canvas (no pyplot state), safe in worker processes.
"""

from __future__ import annotations

import math
import os

import numpy as np
import xarray as xr
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from pipeline.errors import ProcessingError
from pipeline.stages.drift import m_per_s_to_nm_per_min, model_from_table

__all__ = ["plot_drift"]

#: Colours of the x and y panels, from a perceptually uniform map.
AXIS_COLORS = (colormaps["viridis"](0.25), colormaps["viridis"](0.62))
#: Frames whose pair was not used: neutral grey, so they never look like data in use.
REJECTED_COLOR = "#8c8c8c"

_REQUIRED = ("drift_time_s", "drift_position_x_m", "drift_position_y_m")


def _rate_text(table: xr.Dataset) -> str:
    a = table.attrs
    kind = str(a.get("drift_model", "?"))
    if kind == "none":
        return "drift not measured (no usable frame pairs)"
    parts = []
    for axis in ("x", "y"):
        v = m_per_s_to_nm_per_min(float(a.get(f"drift_velocity_{axis}_m_per_s", math.nan)))
        u = m_per_s_to_nm_per_min(
            float(a.get(f"drift_velocity_uncertainty_{axis}_m_per_s", math.nan)))
        if math.isfinite(u) and u > 0:
            digits = min(6, max(3, 1 - math.floor(math.log10(u))))
            parts.append(f"{axis} {v:+.{digits}f} ± {u:.{digits}f}")
        else:
            parts.append(f"{axis} {v:+.3f}")
    used = a.get("drift_pairs_used")
    rejected = a.get("drift_pairs_rejected")
    pairs = f", {used} of {int(used) + int(rejected)} pairs" if used is not None and \
        rejected is not None else ""
    label = "mean " if kind == "smooth" else ""
    return f"drift {label}{', '.join(parts)} nm/min ({kind} model{pairs})"


def plot_drift(
    table: xr.Dataset,
    path: str | os.PathLike[str] | None = None,
    *,
    dpi: int = 120,
) -> Figure:
    """Plot the drift displacement (nm) of the tip relative to the sample against time (min).

    Parameters
    ----------
    table : xarray.Dataset
        A drift table (:func:`pipeline.stages.drift.drift_table`), or the store's ``run`` group
        (its ``drift_*`` variables and attributes).
    path : path-like, optional
        Where to write a PNG of the figure.
    dpi : int
        Resolution of the PNG.

    Returns
    -------
    matplotlib.figure.Figure
        Two panels (x, y): the measured series with error bars (accumulated over the frame
        pairs, anchored to the model at the first frame), the model curve, and frames whose
        pair was excluded drawn as grey crosses at the model-bridged position. The title gives
        the velocity in nm/min.

    Raises
    ------
    ProcessingError
        If the table lacks the drift variables.
    """
    missing = [v for v in _REQUIRED if v not in table]
    if missing:
        raise ProcessingError(f"plot_drift: the table has no variable(s) {', '.join(missing)} "
                              "(expected a drift table from pipeline.stages.drift.drift_table)")
    t_min = np.asarray(table["drift_time_s"].values, dtype=float) / 60.0
    used = np.asarray(table["drift_pair_used"].values, dtype=bool) if "drift_pair_used" in \
        table else np.ones(t_min.shape, bool)
    has_pair = np.array([bool(p) for p in table["drift_pair_previous_id"].values]) if \
        "drift_pair_previous_id" in table else np.ones(t_min.shape, bool)
    model = None
    if "drift_model_coefficients_x_m" in table.attrs:
        model = model_from_table(table)

    fig = Figure(figsize=(7.2, 5.4), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, 1, sharex=True)
    t_end = float(np.nanmax(t_min)) if t_min.size else 1.0
    grid_s = np.linspace(0.0, max(t_end, 1e-3) * 1.03, 300) * 60.0
    for ax, axis, color in zip(axes, ("x", "y"), AXIS_COLORS, strict=True):
        pos = np.asarray(table[f"drift_position_{axis}_m"].values, dtype=float) * 1e9
        unc_name = f"drift_position_uncertainty_{axis}_m"
        unc = np.asarray(table[unc_name].values, dtype=float) * 1e9 if unc_name in table else \
            np.zeros_like(pos)
        if model is not None and model.is_usable:
            mx, my = model.position_m(grid_s)
            ax.plot(grid_s / 60.0, (mx if axis == "x" else my) * 1e9, color=color, lw=1.6,
                    alpha=0.8, zorder=1)
        ok = used | ~has_pair
        ax.errorbar(t_min[ok], pos[ok], yerr=unc[ok], fmt="o", ms=4.5, color=color,
                    ecolor=color, elinewidth=1.0, capsize=2.5, zorder=3)
        bad = ~used & has_pair
        if bad.any():
            ax.plot(t_min[bad], pos[bad], "x", ms=7, mew=1.8, color=REJECTED_COLOR, zorder=4)
        ax.set_ylabel(f"{axis} displacement (nm)")
        ax.grid(True, color="#dddddd", lw=0.6)
        ax.axhline(0.0, color="#bbbbbb", lw=0.8, zorder=0)
    axes[-1].set_xlabel("time since run start (min)")
    axes[-1].set_xlim(left=0.0)
    handles = [
        Line2D([], [], marker="o", ls="none", color="#444444", label="measured (frame pairs)"),
        Line2D([], [], color="#444444", lw=1.6, label="drift model"),
    ]
    if (~used & has_pair).any():
        handles.append(Line2D([], [], marker="x", ls="none", mew=1.8, color=REJECTED_COLOR,
                              label="pair excluded"))
    axes[0].legend(handles=handles, loc="best", fontsize=8, frameon=False)
    title = _rate_text(table)
    z = table.attrs.get("z_drift_rate_nm_per_min")
    if z is not None and math.isfinite(float(z)):
        title += f"\nz creep {float(z):+.3f} nm/min"
    fig.suptitle(title, fontsize=10)
    if path is not None:
        fig.savefig(os.fspath(path), dpi=dpi, format="png")
    return fig
