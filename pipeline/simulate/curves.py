"""Synthetic approach curves I(z) with known barrier, noise, saturation, contacts and tip changes.

The curves follow the raw curve contract (DESIGN.md §3): dims ``(curve, sample)``, ``z`` the tip
displacement in m (+ = retract, 0 at the setpoint), ``current`` in A with the sign of the bias.
The ground truth (barrier per curve, which curves touch the surface or change their tip) is
returned beside the dataset so tests can score the fit.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
import xarray as xr
from numpy.typing import ArrayLike
from scipy import signal

from pipeline import physics
from pipeline.errors import ConfigError
from pipeline.model import make_curves, parse_time

__all__ = ["grid_positions", "simulate_approach_curves"]


def _check(cond: bool, name: str, value: Any, allowed: str) -> None:
    if not cond:
        raise ConfigError(f"simulate_approach_curves: {name} = {value!r}; {allowed}")


def _ar1_noise(rng: np.random.Generator, shape: tuple[int, int], rho: float) -> np.ndarray:
    """Unit-variance Gaussian noise, AR(1)-correlated along the last axis (stationary start)."""
    white = rng.standard_normal(shape)
    if rho == 0.0:
        return white
    c = math.sqrt(1.0 - rho**2)
    # y[0] = white[0]; y[n] = rho*y[n-1] + c*white[n]; lfilter's state zi = rho*y[0]
    out, _ = signal.lfilter([c], [1.0, -rho], white[:, 1:], axis=1, zi=rho * white[:, :1])
    return np.concatenate([white[:, :1], out], axis=1)


def simulate_approach_curves(
    rng: np.random.Generator,
    *,
    n_curves: int = 8,
    phi_eV: float | ArrayLike = 4.5,
    phi_spread_eV: float = 0.0,
    bias_V: float = 0.1,
    start_time: str = "2026-03-14T22:00:00",
    setpoint_current_A: float = 1e-9,
    z_range_m: tuple[float, float] = (-0.35e-9, 0.75e-9),
    n_samples: int = 256,
    noise_fraction: float = 0.03,
    noise_correlation: float = 0.3,
    noise_floor_A: float = 3e-12,
    current_offset_A: float = 0.0,
    current_limit_A: float = 1e-7,
    contact_fraction: float = 0.0,
    tip_change_fraction: float = 0.0,
    model: Literal["exponential", "wkb"] = "exponential",
    profile: Literal["trapezoid", "image-force"] = "trapezoid",
    gap_at_setpoint_m: float | None = None,
    positions: ArrayLike | None = None,
    curve_set_id: str = "curves",
) -> tuple[xr.Dataset, dict[str, Any]]:
    """Simulate a set of approach curves and return them with their ground truth.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of all randomness (seed it for reproducible curves).
    n_curves : int
        Number of curves (dimension ``curve``).
    phi_eV : float or array_like
        True barrier height, one value or one per curve, eV.
    phi_spread_eV : float
        Standard deviation of a per-curve Gaussian scatter added to ``phi_eV`` (tip and site
        variation), eV.
    bias_V : float
        Sample bias, V (non-zero); the current has its sign.
    start_time : str
        ISO 8601 time of the first sample.
    setpoint_current_A : float
        Noise-free current magnitude at ``z = 0``, A.
    z_range_m : (float, float)
        Closest and farthest tip displacement, m (samples are evenly spaced, increasing).
    n_samples : int
        Samples per curve.
    noise_fraction : float
        Relative standard deviation of the multiplicative (shot and preamplifier gain) noise.
    noise_correlation : float
        Lag-one correlation of the multiplicative noise between successive samples (AR(1); the
        preamplifier bandwidth makes neighbouring samples alike), in [0, 0.95].
    noise_floor_A : float
        Standard deviation of the additive zero-mean Gaussian noise (the preamplifier's input
        noise), A: far from the surface the current scatters around zero.
    current_offset_A : float
        Constant offset of the current channel, A.
    current_limit_A : float
        Preamplifier saturation: the recorded current is clipped at ± this value, A.
    contact_fraction : float
        Fraction of curves (rounded) whose closest part touches the surface: the junction is in
        series with a contact conductance, so the current levels off into a plateau below the
        preamplifier limit.
    tip_change_fraction : float
        Fraction of curves (rounded) with an abrupt tip change mid-curve: from a random sample
        within ±0.1 nm of the setpoint on, ln I jumps by 0.3–1.0 and the barrier changes by
        0.5–1.5 eV.
    model : {"exponential", "wkb"}
        ``"exponential"``: I = I_set·exp(−2κz) exactly (apparent barrier = φ);
        ``"wkb"``: the numerical WKB current (:func:`pipeline.physics.wkb_current`) through the
        ``profile`` barrier at gap ``gap_at_setpoint_m + z``, scaled to the setpoint.
    profile : {"trapezoid", "image-force"}
        Barrier shape for ``model = "wkb"``.
    gap_at_setpoint_m : float, optional
        Gap at ``z = 0`` for the WKB model; by default the gap at which one conductance channel
        carries the setpoint current.
    positions : array_like, optional
        ``(n_curves, 2)`` lateral positions (x, y) in m, stored as the ``position_x_m`` and
        ``position_y_m`` attributes (arrays, one value per curve).
    curve_set_id : str
        Identifier stored in the ``curve_set_id`` attribute.

    Returns
    -------
    curves : xarray.Dataset
        Raw curve dataset (dims ``curve, sample``) with attrs ``bias_V``, ``start_time``,
        ``current_limit_A``, ``setpoint_A`` and optionally the positions.
    truth : dict
        ``phi_eV`` (per curve), ``phi_ap_eV`` (true apparent barrier at the setpoint: equal to
        ``phi_eV`` for the exponential model, lower for WKB at high bias or with image force),
        ``contact`` and ``tip_change`` (bool per curve), ``tip_change_z_m``,
        ``contact_current_A``, ``gap_at_setpoint_m`` and the noise parameters.
    """
    _check(n_curves >= 1, "n_curves", n_curves, "must be at least 1")
    _check(n_samples >= 5, "n_samples", n_samples, "must be at least 5")
    _check(bias_V != 0 and math.isfinite(bias_V), "bias_V", bias_V, "must be finite, non-zero")
    _check(setpoint_current_A > 0, "setpoint_current_A", setpoint_current_A, "must be > 0")
    _check(z_range_m[0] < z_range_m[1], "z_range_m", z_range_m, "must be increasing")
    _check(0 <= noise_fraction < 0.5, "noise_fraction", noise_fraction, "allowed: [0, 0.5)")
    _check(0 <= noise_correlation <= 0.95, "noise_correlation", noise_correlation,
           "allowed: [0, 0.95]")
    _check(noise_floor_A >= 0, "noise_floor_A", noise_floor_A, "must be >= 0")
    _check(current_limit_A > setpoint_current_A, "current_limit_A", current_limit_A,
           "must exceed the setpoint current")
    _check(0 <= contact_fraction <= 1, "contact_fraction", contact_fraction, "allowed: [0, 1]")
    _check(0 <= tip_change_fraction <= 1, "tip_change_fraction", tip_change_fraction,
           "allowed: [0, 1]")
    _check(model in ("exponential", "wkb"), "model", model, "expected 'exponential' or 'wkb'")
    parse_time(start_time, source="simulate_approach_curves")

    phi = np.broadcast_to(np.asarray(phi_eV, dtype=float), (n_curves,)).copy()
    if phi_spread_eV > 0:
        phi = phi + phi_spread_eV * rng.standard_normal(n_curves)
    _check(bool(np.all(phi > 0.5)), "phi_eV", phi_eV, "every barrier must exceed 0.5 eV")

    z = np.linspace(z_range_m[0], z_range_m[1], n_samples)
    zz = np.broadcast_to(z, (n_curves, n_samples)).copy()

    # noise-free magnitude |I(z)| per curve
    log_i = np.empty((n_curves, n_samples))
    phi_ap = np.empty(n_curves)
    gaps = np.full(n_curves, np.nan)
    for k in range(n_curves):
        if model == "exponential":
            log_i[k] = np.log(setpoint_current_A) - 2.0 * physics.decay_constant(phi[k]) * z
            phi_ap[k] = phi[k]
        else:
            d0 = gap_at_setpoint_m or physics.gap_for_current(
                setpoint_current_A, bias_V, phi[k], profile=profile)
            gaps[k] = d0
            gap = np.maximum(d0 + z, 0.02e-9)
            cur = np.abs(physics.wkb_current(gap, bias_V, phi_eV=phi[k], profile=profile))
            i0 = abs(float(physics.wkb_current(d0, bias_V, phi_eV=phi[k], profile=profile)))
            log_i[k] = np.log(cur) - np.log(i0) + np.log(setpoint_current_A)
            h = 1e-12
            pair = np.abs(physics.wkb_current(np.array([d0 - h, d0 + h]), bias_V,
                                              phi_eV=phi[k], profile=profile))
            phi_ap[k] = physics.apparent_barrier_eV(np.log(pair[1] / pair[0]) / (2 * h))

    # tip changes: from a random sample on, a jump in ln I and a new decay constant
    n_tip = round(tip_change_fraction * n_curves)
    n_contact = round(contact_fraction * n_curves)
    order = rng.permutation(n_curves)
    tip = np.zeros(n_curves, bool)
    tip[order[:n_tip]] = True
    contact = np.zeros(n_curves, bool)
    contact[order[n_tip:n_tip + n_contact]] = True  # disjoint from the tip changes
    tip_z = np.full(n_curves, np.nan)
    for k in np.flatnonzero(tip):
        zt = rng.uniform(-0.1e-9, 0.1e-9)
        tip_z[k] = zt
        jump = rng.choice([-1.0, 1.0]) * rng.uniform(0.3, 1.0)
        new_phi = max(1.0, phi[k] + rng.choice([-1.0, 1.0]) * rng.uniform(0.5, 1.5))
        j = np.searchsorted(z, zt)
        after = z >= zt
        log_i[k, after] = (log_i[k, j] + jump
                           - 2.0 * physics.decay_constant(new_phi) * (z[after] - z[j]))

    # point contact: the junction in series with a contact conductance (plateau near z_min)
    contact_current = np.full(n_curves, np.nan)
    for k in np.flatnonzero(contact):
        top = min(current_limit_A, math.exp(log_i[k, 0]))
        ic = rng.uniform(0.1, 0.3) * top
        contact_current[k] = ic
        iexp = np.exp(log_i[k])
        log_i[k] = np.log(iexp * ic / (iexp + ic))

    magnitude = np.exp(log_i)
    mult = 1.0 + noise_fraction * _ar1_noise(rng, (n_curves, n_samples), noise_correlation)
    if n_contact:
        extra = 1.0 + 0.05 * rng.standard_normal((n_curves, n_samples))
        near = contact[:, None] & (magnitude > 0.5 * contact_current[:, None])
        mult = np.where(near, mult * extra, mult)
    sign = math.copysign(1.0, bias_V)
    current = (sign * magnitude * mult + noise_floor_A * rng.standard_normal(mult.shape)
               + current_offset_A)
    current = np.clip(current, -current_limit_A, current_limit_A)

    attrs: dict[str, Any] = {
        "bias_V": float(bias_V),
        "start_time": start_time,
        "current_limit_A": float(current_limit_A),
        "setpoint_A": sign * float(setpoint_current_A),
        "curve_set_id": curve_set_id,
        "title": "simulated approach curves",
    }
    if positions is not None:
        pos = np.asarray(positions, dtype=float).reshape(n_curves, 2)
        attrs["position_x_m"] = pos[:, 0].copy()
        attrs["position_y_m"] = pos[:, 1].copy()
    ds = make_curves(zz, current, attrs=attrs)
    truth: dict[str, Any] = {
        "phi_eV": phi,
        "phi_ap_eV": phi_ap,
        "contact": contact,
        "tip_change": tip,
        "tip_change_z_m": tip_z,
        "contact_current_A": contact_current,
        "gap_at_setpoint_m": gaps,
        "noise_fraction": noise_fraction,
        "noise_correlation": noise_correlation,
        "noise_floor_A": noise_floor_A,
        "current_limit_A": current_limit_A,
        "model": model,
    }
    return ds, truth


def grid_positions(nx: int, ny: int, pitch_m: float) -> Sequence[tuple[float, float]]:
    """(x, y) positions of an ``ny × nx`` grid of curves centred on 0, row by row, in m."""
    xs = (np.arange(nx) - (nx - 1) / 2) * pitch_m
    ys = (np.arange(ny) - (ny - 1) / 2) * pitch_m
    return [(float(x), float(y)) for y in ys for x in xs]
