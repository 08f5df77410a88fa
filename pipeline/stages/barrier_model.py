"""Bias correction with the numerical WKB model (private: import from pipeline.stages.barrier).

At finite bias (and with the image force) the apparent barrier of a curve is lower than the
electrodes' work function; :func:`fit_barrier_model` finds the model barrier whose apparent
value matches the curve's fit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.stages.barrier_curve import CurveFit, fit_approach_curve
from pipeline.stages.barrier_lines import _line_design, _wls

__all__ = ["BarrierModelFit", "fit_barrier_model"]


@dataclass(frozen=True)
class BarrierModelFit:
    """Barrier height from fitting the numerical WKB model to a curve's fit range.

    Attributes
    ----------
    phi_eV, phi_uncertainty_eV : float
        Model barrier height φ (the electrodes' work function in the model) and its standard
        uncertainty, eV.
    phi_ap_eV : float
        The curve's apparent barrier height, eV.
    correction_eV : float
        φ − φ_ap: how much bias (and image force, for that profile) lowered the apparent value.
    profile : str
        Barrier profile of the model.
    bias_V : float
        Bias of the curve.
    gap_at_zero_m : float
        Absolute gap assumed at z = 0, m.
    """

    phi_eV: float
    phi_uncertainty_eV: float
    phi_ap_eV: float
    correction_eV: float
    profile: str
    bias_V: float
    gap_at_zero_m: float


def fit_barrier_model(
    z_m: np.ndarray,
    current_A: np.ndarray,
    *,
    bias_V: float,
    fit: CurveFit | None = None,
    profile: str = "trapezoid",
    gap_at_zero_m: float | None = None,
    temperature_K: float = 0.0,
    eps_r: float = 1.0,
    **fit_options: Any,
) -> BarrierModelFit:
    """Bias-corrected barrier height: the WKB model whose apparent barrier matches the curve's.

    Parameters
    ----------
    z_m, current_A : numpy.ndarray
        The curve (as for :func:`fit_approach_curve`).
    bias_V : float
        Its bias, V.
    fit : CurveFit, optional
        The curve's fit (computed with ``fit_options`` when not given).
    profile : {"trapezoid", "image-force"}
        Barrier shape of the model (:func:`pipeline.physics.wkb_current`).
    gap_at_zero_m : float, optional
        Absolute gap at z = 0. Unset: the gap at which one conductance channel carries the
        fitted current at z = 0 (:func:`pipeline.physics.gap_for_current`), recomputed for each
        trial φ.
    temperature_K, eps_r : float
        Passed to the model.
    **fit_options
        Passed to :func:`fit_approach_curve` when ``fit`` is not given.

    Returns
    -------
    BarrierModelFit

    Raises
    ------
    ProcessingError
        If the curve has no fitted slope or no model barrier reproduces it.

    Notes
    -----
    The model current through a trapezoidal (optionally image-force-lowered) barrier is
    evaluated at the fit range's gaps and its ln is fitted by a line with the same noise weights
    as the data; φ is the root of φ_ap,model(φ) = φ_ap,data (Brent's method). As ln I_model is
    almost exactly linear in z over a fit range, this is the least-squares fit of the model's
    decay. The uncertainty is σ_φ = σ_φap / (dφ_ap,model/dφ). At low bias (trapezoid) the
    correction vanishes, as the model reduces to the exponential law.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682.
    """
    z = np.asarray(z_m, dtype=float)
    if fit is None:
        fit = fit_approach_curve(z, current_A, bias_V=bias_V, **fit_options)
    if not (math.isfinite(fit.phi_ap_eV) and fit.n_points >= 2):
        raise ProcessingError(f"fit_barrier_model: the curve has no fitted slope ({fit.reason})")
    zu = z[fit.usable]
    mag = np.exp(fit.log_current_at_zero + fit.slope_per_m * zu)
    weights = 1.0 / (max(fit.relative_noise, 1e-4) ** 2 + (fit.noise_floor_A / mag) ** 2)
    i_zero = math.exp(fit.log_current_at_zero)

    def gap0(phi: float) -> float:
        if gap_at_zero_m is not None:
            return float(gap_at_zero_m)
        return physics.gap_for_current(i_zero, bias_V, phi, profile=profile)

    def model_phi_ap(phi: float) -> float:
        gaps = np.maximum(gap0(phi) + zu, 0.02e-9)
        cur = np.abs(physics.wkb_current(gaps, bias_V, phi_eV=phi, profile=profile,
                                         eps_r=eps_r, temperature_K=temperature_K))
        slope = _wls(_line_design(zu), np.log(cur), weights)[1]
        return float(physics.apparent_barrier_eV(slope))

    target = fit.phi_ap_eV
    lo = max(0.3, 0.8 * target)
    hi = target + 1.0
    try:
        while model_phi_ap(lo) > target and lo > 0.3:
            lo = max(0.3, 0.7 * lo)
        while model_phi_ap(hi) < target:
            hi += 2.0
            if hi > 40.0:
                raise ProcessingError(
                    f"fit_barrier_model: no barrier up to 40 eV gives phi_ap = {target:.3g} eV "
                    f"at {bias_V:g} V with profile {profile!r}")
        from scipy import optimize  # here: 0.3 s to import, and frame work never needs it

        phi = float(optimize.brentq(lambda p: model_phi_ap(p) - target, lo, hi, xtol=1e-5))
    except ProcessingError as exc:
        raise ProcessingError(f"fit_barrier_model: {exc}") from None
    h = 0.01
    slope = (model_phi_ap(phi + h) - model_phi_ap(phi - h)) / (2 * h)
    sigma = fit.phi_ap_uncertainty_eV / slope if slope > 0 else math.inf
    return BarrierModelFit(phi_eV=phi, phi_uncertainty_eV=float(sigma), phi_ap_eV=target,
                           correction_eV=phi - target, profile=profile, bias_V=float(bias_V),
                           gap_at_zero_m=gap0(phi))
