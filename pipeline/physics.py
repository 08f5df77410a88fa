"""Physical constants and pure formulas of electron tunnelling (SI units, energies in eV).

Every formula lives here once, with its source. Constants come from :mod:`scipy.constants`
(CODATA).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants as _c

__all__ = [
    "BARRIER_PREFACTOR_EV_M2",
    "TWO_KAPPA_PER_SQRT_EV",
    "apparent_barrier_eV",
    "decay_constant",
    "height_from_current",
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
