"""Physical constants and pure formulas of electron tunnelling (SI units, energies in eV).

Every formula lives here once, with its source. Constants come from :mod:`scipy.constants`
(CODATA).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants as _c
from scipy.special import digamma

from pipeline.errors import ProcessingError

__all__ = [
    "BARRIER_PREFACTOR_EV_M2",
    "CONDUCTANCE_QUANTUM_S",
    "TWO_KAPPA_PER_SQRT_EV",
    "apparent_barrier_eV",
    "barrier_profile_image_force",
    "barrier_profile_trapezoid",
    "decay_constant",
    "gap_for_current",
    "height_from_current",
    "image_potential_eV",
    "simmons_current_density",
    "wkb_current",
    "wkb_transmission",
    "work_function_from_decay",
]

#: 2κ per √eV in 1/m: 2·√(2 mₑ · 1 eV)/ħ ≈ 1.0246 Å⁻¹ (Chen, Introduction to STM, ch. 1).
TWO_KAPPA_PER_SQRT_EV: float = 2.0 * np.sqrt(2.0 * _c.m_e * _c.e) / _c.hbar

#: ħ²/(8 mₑ) in eV·m²  (≈ 0.9525 eV·Å²), the prefactor of the apparent barrier height.
BARRIER_PREFACTOR_EV_M2: float = _c.hbar**2 / (8.0 * _c.m_e) / _c.e


def decay_constant(phi_eV: ArrayLike) -> np.ndarray:
    """Decay constant κ = √(2 mₑ φ)/ħ of the tunnelling current, in 1/m.

    The current falls as exp(−2κd) with the gap d (1-D WKB, rectangular barrier, low bias).

    Parameters
    ----------
    phi_eV : array_like
        Barrier height in eV (must be positive).

    References
    ----------
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805.
    """
    phi = np.asarray(phi_eV, dtype=float)
    return 0.5 * TWO_KAPPA_PER_SQRT_EV * np.sqrt(phi)


def work_function_from_decay(kappa_per_m: ArrayLike) -> np.ndarray:
    """Inverse of :func:`decay_constant`: φ = (ħκ)²/(2 mₑ), in eV."""
    k = np.asarray(kappa_per_m, dtype=float)
    return (2.0 * k / TWO_KAPPA_PER_SQRT_EV) ** 2


def apparent_barrier_eV(dlnI_dz_per_m: ArrayLike) -> np.ndarray:
    """Apparent barrier height φ_ap = (ħ²/8mₑ)(d ln I/dz)², in eV.

    Parameters
    ----------
    dlnI_dz_per_m : array_like
        Slope of ln I against tip displacement, in 1/m (negative on retraction; the sign is
        irrelevant here).

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57; C. J. Chen, *Introduction to Scanning Tunneling Microscopy*,
    2nd ed. (Oxford, 2008), §1.
    """
    s = np.asarray(dlnI_dz_per_m, dtype=float)
    return BARRIER_PREFACTOR_EV_M2 * s**2


def height_from_current(
    current_A: ArrayLike, reference_A: float, phi_eV: float
) -> np.ndarray:
    """Gap change ln(I/I_ref)/(2κ) in m: positive where the current exceeds the reference.

    A larger current means a smaller gap, i.e. a surface *higher* under a tip at fixed height,
    so this is directly the height change of the surface (constant-height mode), or the feedback
    error to add to the piezo z (constant-current mode). ``current_A`` and ``reference_A`` must
    have the same sign.

    References
    ----------
    Tersoff & Hamann (1985); DESIGN.md §6.
    """
    ratio = np.asarray(current_A, dtype=float) / reference_A
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(ratio) / (2.0 * decay_constant(phi_eV))


# --------------------------------------------------------------------------------------------
# bias and barrier shape: Simmons (1963), numerical WKB
# --------------------------------------------------------------------------------------------

#: Conductance quantum G₀ = 2e²/h in S (spin-degenerate single channel), from scipy.constants.
CONDUCTANCE_QUANTUM_S: float = 2.0 * _c.e**2 / _c.h

_BARRIER_PROFILES = ("trapezoid", "image-force")


def simmons_current_density(gap_m: ArrayLike, bias_V: ArrayLike, phi_eV: ArrayLike) -> np.ndarray:
    """Tunnelling current density through a planar rectangular barrier, Simmons's formula, A/m².

    The intermediate-voltage formula for similar electrodes (0 ≤ e|V| < φ):

    .. math::
        J = \\frac{e}{2\\pi h s^2}\\Big[\\bar\\varphi\\, e^{-A\\sqrt{\\bar\\varphi}}
            - (\\bar\\varphi + eV)\\, e^{-A\\sqrt{\\bar\\varphi + eV}}\\Big],
        \\quad \\bar\\varphi = \\varphi - eV/2,\\quad A = 2 s\\sqrt{2 m_e}/\\hbar ,

    energies in J inside, with the correction factor β = 1. The sign of ``J`` follows the bias.

    Parameters
    ----------
    gap_m : array_like
        Barrier thickness s in m (> 0).
    bias_V : array_like
        Bias across the junction in V; |V| must stay below φ/e (intermediate range).
    phi_eV : array_like
        Height φ of the rectangular barrier (work function of both electrodes) in eV.

    Returns
    -------
    numpy.ndarray
        Current density in A/m², broadcast over the inputs.

    Raises
    ------
    ProcessingError
        If a gap is not positive or a bias is outside the intermediate range.

    Notes
    -----
    At e|V| ≪ φ the bracket is linear in V and the formula reduces to the exponential law
    J ≈ (e²V/(2πh s²))(κs − 1)·exp(−2κs), κ = √(2mₑφ)/ħ (Simmons's low-voltage form plus its
    1/(κs) correction); at larger bias the mean barrier φ − eV/2 lowers the decay constant.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682, eq. (20) with the
    rectangular-barrier mean height of §IV.
    """
    s = np.asarray(gap_m, dtype=float)
    v = np.asarray(bias_V, dtype=float)
    phi = np.asarray(phi_eV, dtype=float)
    if np.any(~(s > 0)):
        raise ProcessingError(f"Simmons formula: gap_m must be positive (got {s.min():.3g} m)")
    if np.any(~(np.abs(v) < phi)):
        raise ProcessingError(
            "Simmons intermediate-voltage formula: |bias_V| must be below phi_eV/e "
            f"(got |V| up to {np.abs(v).max():.3g} V, phi down to {phi.min():.3g} eV)")
    ev = np.abs(v) * _c.e
    phibar = phi * _c.e - ev / 2.0
    a = 2.0 * s * np.sqrt(2.0 * _c.m_e) / _c.hbar
    bracket = phibar * np.exp(-a * np.sqrt(phibar)) - (phibar + ev) * np.exp(
        -a * np.sqrt(phibar + ev))
    return np.sign(v) * _c.e / (2.0 * np.pi * _c.h * s**2) * bracket


def image_potential_eV(x_m: ArrayLike, gap_m: ArrayLike, eps_r: float = 1.0, *,
                       form: str = "exact") -> np.ndarray:
    """Image-force potential energy of an electron between two flat metal electrodes, in eV.

    ``form="exact"`` sums the infinite series of images in closed form,

    .. math::
        V_{im}(x) = \\frac{e^2}{8\\pi\\varepsilon_r\\varepsilon_0 s}
            \\Big[\\tfrac12\\big(\\psi(u) + \\psi(1-u)\\big) + \\gamma\\Big],\\quad u = x/s,

    (ψ the digamma function, γ Euler's constant), which tends to the single-surface image
    −e²/(16πε_rε₀x) at either electrode and equals −e² ln 2/(4πε_rε₀s) at mid-gap.
    ``form="simmons"`` is Simmons's approximation −1.15 λ s²/(x(s − x)) with
    λ = e² ln 2/(16πε_rε₀s), the λ at which λ s²/(x(s − x)) equals the exact series at mid-gap.

    Parameters
    ----------
    x_m : array_like
        Distance from the emitting electrode, in m (0 < x < s; the ends give −inf).
    gap_m : array_like
        Electrode separation s in m.
    eps_r : float
        Relative permittivity of the gap (1 for vacuum).
    form : {"exact", "simmons"}
        Closed-form series or Simmons's approximation.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682, §V (image series and
    its approximation); the series sum uses ψ(1 + u) = ψ(u) + 1/u and
    Σₙ[1/n − 1/(n + a)] = ψ(1 + a) + γ (Abramowitz & Stegun 6.3.5, 6.3.16).
    """
    x = np.asarray(x_m, dtype=float)
    s = np.asarray(gap_m, dtype=float)
    scale = _c.e / (8.0 * np.pi * eps_r * _c.epsilon_0 * s)  # e²/(8πε s) expressed in eV
    with np.errstate(divide="ignore", invalid="ignore"):
        u = x / s
        if form == "exact":
            v = scale * (0.5 * (digamma(u) + digamma(1.0 - u)) + np.euler_gamma)
        elif form == "simmons":
            lam = scale * np.log(2.0) / 2.0
            v = -1.15 * lam / (u * (1.0 - u))
        else:
            raise ValueError(f"image potential form {form!r}; expected 'exact' or 'simmons'")
        inside = (u > 0) & (u < 1)
    return np.where(inside, v, -np.inf)


def barrier_profile_trapezoid(x_m: ArrayLike, gap_m: ArrayLike, phi_eV: ArrayLike,
                              bias_V: ArrayLike) -> np.ndarray:
    """Trapezoidal barrier U(x) = φ − e|V|·x/s in eV, above the emitter's Fermi level.

    Similar electrodes (both of work function φ); x is measured from the emitting electrode,
    whose Fermi level is the energy zero; the collector's Fermi level lies e|V| lower. Values
    outside 0 ≤ x ≤ s are −inf (no barrier there).

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682, §IV (rectangular
    barrier under bias).
    """
    x = np.asarray(x_m, dtype=float)
    s = np.asarray(gap_m, dtype=float)
    u = x / s
    u_ok = (u >= 0) & (u <= 1)
    u_safe = np.where(u_ok, u, 0.0)
    return np.where(u_ok, np.asarray(phi_eV, float) - np.abs(np.asarray(bias_V, float))
                    * u_safe, -np.inf)


def barrier_profile_image_force(x_m: ArrayLike, gap_m: ArrayLike, phi_eV: ArrayLike,
                                bias_V: ArrayLike, eps_r: float = 1.0, *,
                                form: str = "exact") -> np.ndarray:
    """Image-force-lowered trapezoidal barrier U(x) = φ − e|V|x/s + V_im(x), in eV.

    See :func:`barrier_profile_trapezoid` for the energy zero and :func:`image_potential_eV`
    for V_im (``form`` chooses the exact series or Simmons's 1.15 λ approximation). The barrier
    goes to −inf at both electrodes, so the classically forbidden region is shorter than s.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682, §V.
    """
    return barrier_profile_trapezoid(x_m, gap_m, phi_eV, bias_V) + image_potential_eV(
        x_m, gap_m, eps_r, form=form)


def wkb_transmission(energy_eV: ArrayLike, profile: tuple[ArrayLike, ArrayLike]) -> np.ndarray:
    """WKB transmission T(E) = exp(−2∫√(2mₑ(U(x) − E))/ħ dx) through a 1-D barrier.

    The integral runs over the classically forbidden region U(x) > E only, by the trapezoid rule
    on the profile's own grid (exact for a rectangular barrier; the √ behaviour at turning points
    limits the error to O(h^1.5) there).

    Parameters
    ----------
    energy_eV : array_like
        Electron energy (normal to the barrier) in eV, on the same energy zero as the profile;
        shape ``(...)``.
    profile : (x_m, barrier_eV)
        Positions in m, shape ``(n_x,)`` or broadcastable to ``(..., n_x)``, and the barrier
        potential energy in eV at those positions, broadcastable to ``(..., n_x)``.

    Returns
    -------
    numpy.ndarray
        T(E) in [0, 1], shape of the broadcast leading dimensions.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682, eq. (1);
    C. J. Chen, *Introduction to Scanning Tunneling Microscopy*, 2nd ed. (Oxford, 2008), §1.
    """
    x = np.asarray(profile[0], dtype=float)
    u = np.asarray(profile[1], dtype=float)
    e = np.asarray(energy_eV, dtype=float)[..., None]
    integrand = np.sqrt(np.maximum(u - e, 0.0))
    exponent = TWO_KAPPA_PER_SQRT_EV * np.trapezoid(integrand, x, axis=-1)
    return np.exp(-exponent)


def _profile_function(profile: str | Callable[..., np.ndarray], eps_r: float
                      ) -> Callable[[np.ndarray, np.ndarray, np.ndarray, np.ndarray], np.ndarray]:
    if callable(profile):
        return profile
    if profile == "trapezoid":
        return barrier_profile_trapezoid
    if profile == "image-force":
        return lambda x, s, phi, v: barrier_profile_image_force(x, s, phi, v, eps_r)
    raise ValueError(f"barrier profile {profile!r}; expected one of {_BARRIER_PROFILES} or a "
                     "callable (x_m, gap_m, phi_eV, bias_V) -> barrier_eV")


def wkb_current(
    gap_m: ArrayLike,
    bias_V: float,
    *,
    phi_eV: float,
    profile: str | Callable[..., np.ndarray] = "trapezoid",
    eps_r: float = 1.0,
    temperature_K: float = 0.0,
    channels: float = 1.0,
    n_x: int = 400,
    n_energy: int = 32,
) -> np.ndarray:
    """Tunnelling current from the WKB transmission integrated over the bias window, in A.

    .. math::
        I = n\\,\\frac{2e}{h}\\int T(E)\\,[f(E) - f(E + e|V|)]\\,dE ,

    the Landauer current of ``channels`` = n spin-degenerate channels with energy-independent
    electrode states, T from :func:`wkb_transmission` through the chosen barrier profile, and f
    the Fermi function (a step at ``temperature_K = 0``). Energies are measured from the emitter's
    Fermi level. The sign of the result follows the bias.

    Parameters
    ----------
    gap_m : array_like
        Gaps in m, any shape (the computation is vectorised over them).
    bias_V : float
        Bias in V (non-zero).
    phi_eV : float
        Barrier height (work function of both electrodes) in eV.
    profile : {"trapezoid", "image-force"} or callable
        Barrier shape; a callable ``(x_m, gap_m, phi_eV, bias_V) -> barrier_eV`` for anything
        else.
    eps_r : float
        Relative permittivity for the image force.
    temperature_K : float
        Electron temperature; > 0 smears the window by the Fermi functions.
    channels : float
        Number of conductance channels (scales the current).
    n_x, n_energy : int
        Points across the barrier and Gauss–Legendre nodes over the energy window.

    Returns
    -------
    numpy.ndarray
        Current in A, shape of ``gap_m``.

    Notes
    -----
    At e|V| ≪ φ and a rectangular barrier T(E_F) = exp(−2κs), so I → G₀·V·exp(−2κs)
    (G₀ = 2e²/h): the exponential law of Tersoff & Hamann with apparent barrier φ. At larger
    bias the trapezoid's mean height φ − e|V|/2 governs the decay, the bias effect that
    :func:`pipeline.stages.barrier.fit_barrier_model` corrects for.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682;
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805;
    R. Landauer, IBM J. Res. Dev. 1, 223 (1957), doi:10.1147/rd.13.0223.
    """
    s = np.asarray(gap_m, dtype=float)
    v = float(bias_V)
    if v == 0.0:
        return np.zeros_like(s)
    av = abs(v)
    fn = _profile_function(profile, eps_r)
    kt = _c.k * float(temperature_K) / _c.e  # eV
    if kt > 0:
        lo, hi = -av - 12.0 * kt, 12.0 * kt
        n_e = max(n_energy, int(np.ceil(4.0 * (hi - lo) / kt)))
    else:
        lo, hi, n_e = -av, 0.0, n_energy
    nodes, weights = np.polynomial.legendre.leggauss(n_e)
    energy = 0.5 * (hi - lo) * nodes + 0.5 * (hi + lo)
    weights = 0.5 * (hi - lo) * weights
    if kt > 0:
        with np.errstate(over="ignore"):
            window = 1.0 / (1.0 + np.exp(energy / kt)) - 1.0 / (1.0 + np.exp((energy + av) / kt))
    else:
        window = np.ones_like(energy)
    flat = s.reshape(-1)
    u = np.linspace(0.0, 1.0, n_x)
    x = flat[:, None] * u[None, :]  # (n_gap, n_x)
    barrier = fn(x, flat[:, None], phi_eV, av)  # (n_gap, n_x)
    t = wkb_transmission(energy[None, :], (x[:, None, :], barrier[:, None, :]))  # (n_gap, n_e)
    integral = t @ (weights * window)  # eV
    current = channels * CONDUCTANCE_QUANTUM_S * integral  # (2e²/h)·∫T dE[eV] = A
    return np.sign(v) * current.reshape(s.shape)


def gap_for_current(
    current_A: float,
    bias_V: float,
    phi_eV: float,
    *,
    profile: str | Callable[..., np.ndarray] = "trapezoid",
    channels: float = 1.0,
    bracket_m: tuple[float, float] = (0.05e-9, 5e-9),
) -> float:
    """Gap (m) at which :func:`wkb_current` carries ``|current_A|`` at ``bias_V``.

    With one channel this is the usual estimate of the absolute tip-sample distance from the
    current level (the conductance I/V compared with G₀ = 2e²/h).

    Raises
    ------
    ProcessingError
        If no gap in ``bracket_m`` gives that current.

    References
    ----------
    R. Landauer, IBM J. Res. Dev. 1, 223 (1957), doi:10.1147/rd.13.0223; Simmons (1963).
    """
    target = np.log(abs(float(current_A)))

    def f(log_gap: float) -> float:
        i = wkb_current(np.exp(log_gap), bias_V, phi_eV=phi_eV, profile=profile,
                        channels=channels)
        return float(np.log(abs(float(i))) - target)

    lo, hi = np.log(bracket_m[0]), np.log(bracket_m[1])
    if f(lo) * f(hi) > 0:
        raise ProcessingError(
            f"no gap between {bracket_m[0]:.3g} and {bracket_m[1]:.3g} m carries "
            f"{abs(current_A):.3g} A at {bias_V:g} V with phi = {phi_eV:g} eV")
    from scipy import optimize  # here: 0.3 s to import, and frame work never needs it

    return float(np.exp(optimize.brentq(f, lo, hi, xtol=1e-7)))
