"""A curve dataset → a table of fits (private: import from pipeline.stages.barrier).

:func:`fit_curves` runs :func:`~pipeline.stages.barrier.fit_approach_curve` on every curve of a
dataset (and optionally the WKB bias correction) and returns one row per curve, dim ``curve``;
:func:`combine_fit_tables` joins the tables of a run's curve files.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError, ShapeError
from pipeline.model import stage
from pipeline.stages.barrier_curve import fit_approach_curve
from pipeline.stages.barrier_model import fit_barrier_model

__all__ = ["FIT_CURVES_CONFIG_KEYS", "combine_fit_tables", "fit_curves"]

#: Keys of :class:`pipeline.config.BarrierConfig` that are keyword arguments of
#: :func:`fit_curves` under the same names: ``fit_curves(ds, **cfg.barrier.model_dump(
#: include=set(FIT_CURVES_CONFIG_KEYS)))``.
FIT_CURVES_CONFIG_KEYS = (
    "min_points", "noise_floor_A", "current_limit_A", "floor_threshold_sigma",
    "tip_change_threshold_sigma", "reject_contact_curves", "bias_correction", "barrier_profile",
)

_TABLE_VARS: dict[str, tuple[str, str]] = {
    "phi_ap_eV": ("eV", "apparent barrier height"),
    "phi_ap_uncertainty_eV": ("eV", "standard uncertainty of the apparent barrier height"),
    "decay_constant_per_m": ("1/m", "decay constant kappa = -(1/2) dln|I|/dz"),
    "slope_per_m": ("1/m", "slope dln|I|/dz over the fit range"),
    "slope_uncertainty_per_m": ("1/m", "standard uncertainty of the slope"),
    "log_current_at_zero": ("1", "fitted ln(|I|/A) at z = 0"),
    "z_min_m": ("m", "closest tip displacement of the fit range"),
    "z_max_m": ("m", "farthest tip displacement of the fit range"),
    "n_points": ("1", "samples in the fit range"),
    "rms_residual": ("1", "RMS residual of ln|I| in the fit range"),
    "noise_floor_A": ("A", "additive current noise (standard deviation) used"),
    "relative_noise": ("1", "estimated relative noise of the current"),
    "bias_V": ("V", "sample bias"),
}


def _curve_ids(curves: xr.Dataset) -> list[str]:
    base = str(curves.attrs.get("curve_set_id") or curves.attrs.get("source_stem") or "curves")
    return [f"{base}#{k}" for k in range(curves.sizes["curve"])]


@stage(version="1")
def fit_curves(
    curves: xr.Dataset,
    *,
    min_points: int = 8,
    noise_floor_A: float | None = None,
    current_limit_A: float | None = None,
    floor_threshold_sigma: float = 5.0,
    tip_change_threshold_sigma: float = 8.0,
    reject_contact_curves: bool = True,
    bias_correction: bool = False,
    barrier_profile: str = "trapezoid",
) -> xr.Dataset:
    """Fit every curve of a curve dataset; return the table of fits (dim ``curve``).

    Parameters
    ----------
    curves : xarray.Dataset
        Validated curves (dims ``curve, sample``; :func:`pipeline.model.validate_curves`).
    min_points, noise_floor_A, floor_threshold_sigma : optional
        As for :func:`fit_approach_curve`.
    tip_change_threshold_sigma, reject_contact_curves : optional
        As for :func:`fit_approach_curve`.
    current_limit_A : float, optional
        Preamplifier limit; unset = the dataset's ``current_limit_A`` attribute, else detected.
    bias_correction : bool
        Also fit the WKB model (:func:`fit_barrier_model`) to accepted curves and add
        ``phi_model_eV``, ``phi_model_uncertainty_eV``.
    barrier_profile : {"trapezoid", "image-force"}
        Profile of that model.

    Returns
    -------
    xarray.Dataset
        Variables ``phi_ap_eV``, ``phi_ap_uncertainty_eV``, ``decay_constant_per_m``,
        ``slope_per_m``, ``slope_uncertainty_per_m``, ``log_current_at_zero``, ``z_min_m``,
        ``z_max_m``, ``n_points`` (int32), ``rms_residual``,
        ``noise_floor_A``, ``relative_noise``, ``bias_V``, ``accepted`` (uint8), ``reason``,
        ``curve_id``, ``source_file``, ``time`` (strings), and ``position_x_m``/``position_y_m``
        when the curves carry positions; attrs ``kind = "curve_fits"`` and the provenance.
        Writable with ``to_netcdf(engine="h5netcdf")``.

    Notes
    -----
    One :func:`fit_approach_curve` per curve (a loop over curves, each fit vectorised over its
    samples). The input is not modified.
    """
    if "curve" not in curves.dims or "sample" not in curves.dims:
        raise ShapeError(f"fit_curves: {curves.attrs.get('source_file', '<curves>')}: expected "
                         f"dims (curve, sample), got {tuple(curves.dims)}")
    src = str(curves.attrs.get("source_file", ""))
    bias = float(curves.attrs["bias_V"])
    limit = current_limit_A if current_limit_A is not None else curves.attrs.get(
        "current_limit_A")
    limit = float(limit) if limit is not None else None
    z = np.asarray(curves["z"].values, dtype=float)
    cur = np.asarray(curves["current"].values, dtype=float)
    n = z.shape[0]
    fits = [fit_approach_curve(z[k], cur[k], bias_V=bias, current_limit_A=limit,
                               noise_floor_A=noise_floor_A, min_points=min_points,
                               floor_threshold_sigma=floor_threshold_sigma,
                               tip_change_threshold_sigma=tip_change_threshold_sigma,
                               reject_contact_curves=reject_contact_curves) for k in range(n)]
    data: dict[str, Any] = {}
    for name, (units, long) in _TABLE_VARS.items():
        if name == "bias_V":
            values = np.full(n, bias)
        else:
            values = np.array([getattr(f, name) for f in fits], dtype=float)
        if name == "n_points":
            values = values.astype(np.int32)
        data[name] = ("curve", values, {"units": units, "long_name": long})
    data["accepted"] = ("curve", np.array([f.accepted for f in fits], dtype=np.uint8),
                        {"long_name": "curve used for the run estimate (1) or not (0)"})
    data["reason"] = ("curve", np.array([f.reason for f in fits], dtype=str),
                      {"long_name": "why the curve was not used (empty when used)"})
    data["curve_id"] = ("curve", np.array(_curve_ids(curves), dtype=str),
                        {"long_name": "curve identifier (curve set # index)"})
    data["source_file"] = ("curve", np.array([src] * n, dtype=str), {"long_name": "source file"})
    data["time"] = ("curve", np.array([str(curves.attrs.get("start_time", ""))] * n, dtype=str),
                    {"long_name": "start time of the curve set (ISO 8601)"})
    for axis in ("x", "y"):
        key = f"position_{axis}_m"
        if key in curves.attrs:
            pos = np.broadcast_to(np.asarray(curves.attrs[key], dtype=float), (n,)).copy()
            data[key] = ("curve", pos, {"units": "m", "long_name": f"tip position {axis}"})
    if bias_correction:
        phi_m = np.full(n, np.nan)
        sig_m = np.full(n, np.nan)
        for k, f in enumerate(fits):
            if f.accepted:
                try:
                    m = fit_barrier_model(z[k], cur[k], bias_V=bias, fit=f,
                                          profile=barrier_profile)
                except ProcessingError:
                    continue
                phi_m[k], sig_m[k] = m.phi_eV, m.phi_uncertainty_eV
        data["phi_model_eV"] = ("curve", phi_m, {
            "units": "eV", "long_name": f"bias-corrected barrier height ({barrier_profile} WKB)"})
        data["phi_model_uncertainty_eV"] = ("curve", sig_m, {
            "units": "eV", "long_name": "standard uncertainty of phi_model_eV"})
    attrs = {"kind": "curve_fits", "source_file": src,
             "curve_set_id": str(curves.attrs.get("curve_set_id", ""))}
    if bias_correction:
        attrs["barrier_profile"] = barrier_profile
    return xr.Dataset(data, attrs=attrs)


def combine_fit_tables(tables: Sequence[xr.Dataset]) -> xr.Dataset:
    """Concatenate the fit tables of several curve files along ``curve`` (one run table)."""
    if not tables:
        raise ProcessingError("combine_fit_tables: no tables to combine")
    return xr.concat(list(tables), dim="curve", data_vars="all", coords="minimal",
                     compat="override", combine_attrs="drop_conflicts", join="outer",
                     fill_value={"accepted": 0})
