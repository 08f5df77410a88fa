"""Figure of a run's approach-curve fits: the curves with their fit ranges, and φ_ap per curve.

Drawn from the curves and their fit table, or from the fit table alone (``curves=None``: what a
store keeps). Display only: the data stay in SI units and are converted to nm for the axis. The
figure is a :class:`~matplotlib.figure.Figure` on an Agg canvas (no pyplot state), safe in worker
processes.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from matplotlib import colormaps
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from pipeline.errors import ProcessingError
from pipeline.stages.barrier import WorkFunctionEstimate

__all__ = ["plot_approach_curves"]

#: Perceptually uniform map for the accepted curves (one colour per curve, in order).
CURVE_COLORMAP = "viridis"
#: Rejected curves: a neutral grey, dashed, so they never look like data in use.
REJECTED_COLOR = "#8c8c8c"
#: Background band of the run estimate on the φ_ap panel.
ESTIMATE_COLOR = "#3b528b"


def _as_list(curves: xr.Dataset | Sequence[xr.Dataset]) -> list[xr.Dataset]:
    return [curves] if isinstance(curves, xr.Dataset) else list(curves)


#: Columns of the fit table the figure reads (:func:`pipeline.stages.barrier.fit_curves`).
TABLE_COLUMNS = ("accepted", "reason", "phi_ap_eV", "phi_ap_uncertainty_eV",
                 "log_current_at_zero", "slope_per_m", "z_min_m", "z_max_m")


def plot_approach_curves(
    curves: xr.Dataset | Sequence[xr.Dataset] | None,
    table: xr.Dataset,
    estimate: WorkFunctionEstimate | None = None,
    path: str | os.PathLike[str] | None = None,
    *,
    max_labels: int = 12,
    dpi: int = 120,
) -> Figure:
    """Plot approach curves with their fits and the run's estimate.

    Parameters
    ----------
    curves : xarray.Dataset or sequence of them, or None
        The curve datasets, in the order their fits appear in ``table``. ``None`` draws the
        figure from the table alone (a store keeps the fits, not the samples): the left panel
        then shows each curve's fitted line over its fit range, without the samples.
    table : xarray.Dataset
        The fit table (:func:`pipeline.stages.barrier.fit_curves`, combined over the datasets
        with :func:`pipeline.stages.barrier.combine_fit_tables`; after outlier rejection use
        :meth:`~pipeline.stages.barrier.WorkFunctionEstimate.updated_table`), or the same
        variables read back from a store's run group.
    estimate : WorkFunctionEstimate, optional
        The run's estimate (title and the band on the right-hand panel).
    path : path-like, optional
        Where to write the figure (PNG, or any format matplotlib infers from the suffix).
    max_labels : int
        Curves named on the φ_ap panel at most (rejected ones first).
    dpi : int
        Resolution of the written file.

    Returns
    -------
    matplotlib.figure.Figure
        Left: |I| against z (nm, log scale) for every curve; samples in grey, the fit range of
        accepted curves as a coloured line along the fit, rejected curves dashed grey. Without
        ``curves``: the fitted lines only (accepted coloured, rejected ones that have a fit
        dashed grey) and the median noise floor as a dotted line.
        Right: φ_ap per curve with its uncertainty, the run estimate ± its uncertainty as a
        band, rejected curves as grey crosses with their reason.

    Raises
    ------
    ProcessingError
        If the table lacks a column the figure needs, or its length differs from the number of
        curves.
    """
    n = table.sizes.get("curve", 0)
    missing = [c for c in TABLE_COLUMNS if c not in table]
    if missing:
        raise ProcessingError(f"plot_approach_curves: the fit table has no {', '.join(missing)} "
                              f"column(s) (needed: {', '.join(TABLE_COLUMNS)})")
    samples = None if curves is None else _stacked_samples(curves, n)
    acc = np.asarray(table["accepted"].values).astype(bool)
    reason = [str(r) for r in table["reason"].values]
    ids = ([str(c) for c in table["curve_id"].values] if "curve_id" in table
           else [str(k) for k in range(n)])
    phi = np.asarray(table["phi_ap_eV"].values, float)
    sig = np.asarray(table["phi_ap_uncertainty_eV"].values, float)
    a = np.asarray(table["log_current_at_zero"].values, float)
    b = np.asarray(table["slope_per_m"].values, float)
    zmin = np.asarray(table["z_min_m"].values, float)
    zmax = np.asarray(table["z_max_m"].values, float)

    fig = Figure(figsize=(11.0, 4.6), layout="constrained")
    FigureCanvasAgg(fig)
    ax_c, ax_p = fig.subplots(1, 2, width_ratios=[1.5, 1.0])
    cmap = colormaps[CURVE_COLORMAP]
    n_acc = max(int(acc.sum()), 1)
    colours = {}
    for rank, k in enumerate(np.flatnonzero(acc)):
        colours[int(k)] = cmap(0.1 + 0.75 * rank / max(n_acc - 1, 1))
    floors = (np.asarray(table["noise_floor_A"].values, float) if "noise_floor_A" in table
              else np.zeros(n))
    floors = floors[np.isfinite(floors) & (floors > 0)]
    floor = float(np.median(floors)) if floors.size else 0.0
    lines = _FitLines(acc, a, b, zmin, zmax, colours)
    if samples is None:
        _draw_fits_only(ax_c, lines, floor)
    else:
        _draw_curves(ax_c, *samples, lines, floor)
    _draw_phi(ax_p, phi, sig, acc, reason, ids, estimate, colours, max_labels)

    title = "approach curves"
    if estimate is not None:
        title = (f"φ = {estimate.work_function_eV:.3f} ± "
                 f"{estimate.work_function_uncertainty_eV:.3f} eV ({estimate.method}, "
                 f"{estimate.n_curves_used} of {n} curves)")
        if estimate.model_work_function_eV is not None:
            title += f"; bias-corrected {estimate.model_work_function_eV:.3f} eV"
    fig.suptitle(title, fontsize=12)
    if path is not None:
        Path(path).parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(path, dpi=dpi)
    return fig


def _stacked_samples(curves: xr.Dataset | Sequence[xr.Dataset], n: int
                     ) -> tuple[np.ndarray, np.ndarray]:
    """(z, current) of all curves stacked along the first axis; checked against the table."""
    sets = _as_list(curves)
    z_all = [np.atleast_2d(np.asarray(ds["z"].values, float)) for ds in sets]
    i_all = [np.atleast_2d(np.asarray(ds["current"].values, float)) for ds in sets]
    z = np.concatenate(z_all, axis=0) if z_all else np.zeros((0, 0))
    cur = np.concatenate(i_all, axis=0) if i_all else np.zeros((0, 0))
    if z.shape[0] != n:
        raise ProcessingError(f"plot_approach_curves: {z.shape[0]} curve(s) but {n} row(s) in "
                              "the fit table")
    return z, cur


@dataclass(frozen=True)
class _FitLines:
    """The fitted lines ln|I| = a + b z of the table, each over its fit range [z_min, z_max]."""

    accepted: np.ndarray
    a: np.ndarray
    b: np.ndarray
    z_min: np.ndarray
    z_max: np.ndarray
    colours: dict[int, tuple[float, ...]]

    def has_fit(self, k: int) -> bool:
        return bool(np.isfinite([self.a[k], self.b[k], self.z_min[k], self.z_max[k]]).all())

    def draw(self, ax: Axes, k: int, **style: Any) -> None:
        zf = np.linspace(self.z_min[k], self.z_max[k], 50)
        ax.plot(zf * 1e9, np.exp(self.a[k] + self.b[k] * zf), **style)


def _draw_curves(ax: Axes, z: np.ndarray, cur: np.ndarray, lines: _FitLines,
                 floor: float) -> None:
    acc = lines.accepted
    for k in range(z.shape[0]):
        mag = np.abs(cur[k])
        ok = np.isfinite(mag) & np.isfinite(z[k]) & (mag > 0)
        zn = z[k, ok] * 1e9
        if acc[k]:
            ax.plot(zn, mag[ok], ".", ms=2.0, color="#b0b0b0", zorder=1)
        else:
            ax.plot(zn, mag[ok], "--", lw=0.8, color=REJECTED_COLOR, zorder=1)
        if acc[k] and math.isfinite(lines.a[k]) and math.isfinite(lines.b[k]):
            lines.draw(ax, k, ls="-", lw=1.8, color=lines.colours[k], zorder=3)
    _decorate_curve_axes(ax, floor, [
        Line2D([], [], ls="", marker=".", color="#b0b0b0", label="samples"),
        Line2D([], [], lw=1.8, color=lines.colours[min(lines.colours)] if lines.colours else "k",
               label="fit over its range"),
        Line2D([], [], ls="--", lw=0.8, color=REJECTED_COLOR, label="rejected curve"),
    ])


def _draw_fits_only(ax: Axes, lines: _FitLines, floor: float) -> None:
    """The left panel from the table alone: fitted lines over their ranges, no samples."""
    for k in range(lines.accepted.size):
        if not lines.has_fit(k):
            continue
        if lines.accepted[k]:
            lines.draw(ax, k, ls="-", lw=1.8, color=lines.colours[k], zorder=3)
        else:
            lines.draw(ax, k, ls="--", lw=1.0, color=REJECTED_COLOR, zorder=2)
    handles = [
        Line2D([], [], lw=1.8, color=lines.colours[min(lines.colours)] if lines.colours else "k",
               label="fit over its range"),
        Line2D([], [], ls="--", lw=1.0, color=REJECTED_COLOR, label="fit of a rejected curve"),
    ]
    if floor > 0:
        ax.axhline(floor, ls=":", lw=1.0, color=REJECTED_COLOR, zorder=1)
        handles.append(Line2D([], [], ls=":", lw=1.0, color=REJECTED_COLOR,
                              label="noise floor (median)"))
    ax.set_title("fits from the table (samples not stored)", fontsize=9, color="#444444")
    _decorate_curve_axes(ax, floor, handles)


def _decorate_curve_axes(ax: Axes, floor: float, handles: list[Line2D]) -> None:
    ax.set_yscale("log")
    if floor > 0:  # show the noise floor, not the decades of noise below it
        ax.set_ylim(bottom=0.3 * floor)
    ax.set_xlabel("tip displacement z (nm, + = retract)")
    ax.set_ylabel("|I| (A)")
    ax.grid(True, which="major", lw=0.4, alpha=0.5)
    ax.legend(handles=handles, loc="upper right", fontsize=8, frameon=False)


def _draw_phi(ax: Axes, phi: np.ndarray, sig: np.ndarray, acc: np.ndarray, reason: list[str],
              ids: list[str], estimate: WorkFunctionEstimate | None,
              colours: dict[int, tuple[float, ...]], max_labels: int) -> None:
    idx = np.arange(phi.size)
    if estimate is not None:
        lo = estimate.work_function_eV - estimate.work_function_uncertainty_eV
        hi = estimate.work_function_eV + estimate.work_function_uncertainty_eV
        ax.axhspan(lo, hi, color=ESTIMATE_COLOR, alpha=0.18, lw=0)
        ax.axhline(estimate.work_function_eV, color=ESTIMATE_COLOR, lw=1.0)
    for k in np.flatnonzero(acc):
        ax.errorbar(k, phi[k], yerr=sig[k], fmt="o", ms=4, color=colours[int(k)], capsize=2)
    finite_rej = np.flatnonzero(~acc & np.isfinite(phi))
    ax.plot(finite_rej, phi[finite_rej], "x", ms=6, color=REJECTED_COLOR)
    # y range from the accepted values (rejected ones may be far off: they are clipped to the
    # edge and marked)
    good = acc & np.isfinite(phi)
    if good.any():
        span = np.concatenate([phi[good] - sig[good], phi[good] + sig[good]])
        if estimate is not None:
            span = np.append(span, [estimate.work_function_eV])
        lo, hi = float(np.min(span)), float(np.max(span))
        pad = max(0.15 * (hi - lo), 0.02)
        ax.set_ylim(lo - pad, hi + 3 * pad)
    y_lo, y_hi = ax.get_ylim()
    rejected = np.flatnonzero(~acc)
    for k in rejected:  # off-scale or fitless rejected curves: a marker at the edge
        y = phi[k]
        if not math.isfinite(y) or y > y_hi or y < y_lo:
            up = not math.isfinite(y) or y > y_hi
            ax.plot(k, y_hi if up else y_lo, marker="^" if up else "v", ms=6, clip_on=False,
                    color=REJECTED_COLOR)
    if rejected.size:
        lines = [f"{k}  {ids[k]}: {reason[k]}" for k in rejected[:max_labels]]
        if rejected.size > max_labels:
            lines.append(f"... and {rejected.size - max_labels} more")
        ax.text(0.02, 0.98, "rejected\n" + "\n".join(lines), transform=ax.transAxes,
                va="top", ha="left", fontsize=7.5, color="#444444",
                bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": "#cccccc", "alpha": 0.9})
    ax.set_xlim(-0.7, max(phi.size - 0.3, 0.7))
    step = max(1, phi.size // 12)
    ax.set_xticks(idx[::step])
    ax.set_xlabel("curve")
    ax.set_ylabel("apparent barrier height φ_ap (eV)")
    ax.grid(True, axis="y", lw=0.4, alpha=0.5)
