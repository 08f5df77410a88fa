"""Reference checks of the tunnelling formulas in pipeline.physics."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants as c

from pipeline import physics
from pipeline.errors import ProcessingError

ANGSTROM = 1e-10


def test_barrier_prefactor_is_0_9525_eV_A2() -> None:
    # ħ²/8mₑ = 0.9525 eV·Å² — CODATA via scipy.constants (TESTING.md)
    ref = c.hbar**2 / (8 * c.m_e) / c.e / ANGSTROM**2
    assert physics.BARRIER_PREFACTOR_EV_M2 / ANGSTROM**2 == pytest.approx(ref, rel=1e-12)
    assert physics.BARRIER_PREFACTOR_EV_M2 / ANGSTROM**2 == pytest.approx(0.9525, abs=5e-5)


def test_two_kappa_is_1_0246_per_A_per_sqrt_eV() -> None:
    # 2κ = 1.0246 Å⁻¹·√(φ/eV) — CODATA via scipy.constants (TESTING.md)
    ref = 2 * math.sqrt(2 * c.m_e * c.e) / c.hbar * ANGSTROM
    assert physics.TWO_KAPPA_PER_SQRT_EV * ANGSTROM == pytest.approx(ref, rel=1e-12)
    assert physics.TWO_KAPPA_PER_SQRT_EV * ANGSTROM == pytest.approx(1.0246, abs=5e-5)
    assert 2 * physics.decay_constant(4.0) * ANGSTROM == pytest.approx(2 * 1.0246, abs=1e-4)


def test_one_decade_per_angstrom_is_about_5_05_eV() -> None:
    # current changes tenfold per Å for φ_ap ≈ 5.05 eV: common practice (from memory)
    assert physics.apparent_barrier_eV(math.log(10) / ANGSTROM) == pytest.approx(5.05, abs=0.01)
    # and Au (≈ 5.1 eV, Michaelson 1977, from memory) gives close to a decade per Å
    decades = 2 * physics.decay_constant(5.1) * ANGSTROM / math.log(10)
    assert decades == pytest.approx(1.0, abs=0.01)


def test_decay_constant_and_work_function_are_inverse() -> None:
    phi = np.array([0.8, 3.0, 4.5, 6.0])
    assert physics.work_function_from_decay(physics.decay_constant(phi)) == pytest.approx(phi)
    # φ_ap of the exact exponential law I ∝ exp(−2κz) is φ itself (Binnig et al. 1982)
    assert physics.apparent_barrier_eV(-2 * physics.decay_constant(phi)) == pytest.approx(phi)


@pytest.mark.parametrize("gap_nm", [0.5, 1.0, 1.5])
def test_simmons_low_bias_limit_is_the_exponential_law(gap_nm: float) -> None:
    # Simmons, J. Appl. Phys. 34, 1793 (1963): at eV ≪ φ the intermediate-voltage formula is
    # linear in V, J = (e²V/(2πh s²))(κs − 1)·exp(−2κs), to < 1 % (TESTING.md)
    phi, s = 4.5, gap_nm * 1e-9
    kappa = physics.decay_constant(phi)
    bias = np.array([1e-3, 5e-3, 0.02, 0.05])
    j = physics.simmons_current_density(s, bias, phi)
    low = c.e**2 * bias / (2 * np.pi * c.h * s**2) * (kappa * s - 1) * np.exp(-2 * kappa * s)
    np.testing.assert_allclose(j / low, 1.0, rtol=0.01)
    # the same exponent: J(s₁)/J(s₂) at fixed low bias follows exp(−2κΔs) once the prefactor
    # is divided out
    j2 = physics.simmons_current_density(s + 0.1e-9, 1e-3, phi)
    pref = lambda d: (kappa * d - 1) / d**2  # noqa: E731
    ratio = (j2 / pref(s + 0.1e-9)) / (j[0] / pref(s))
    assert ratio == pytest.approx(math.exp(-2 * kappa * 0.1e-9), rel=0.01)


def test_simmons_current_is_odd_in_bias_and_bounded() -> None:
    # similar electrodes: J(−V) = −J(V) (Simmons 1963, §IV)
    j = physics.simmons_current_density(0.8e-9, np.array([-0.3, 0.3]), 4.0)
    assert j[0] == pytest.approx(-j[1])
    with pytest.raises(ProcessingError, match=r"\|bias_V\| must be below phi_eV"):
        physics.simmons_current_density(0.8e-9, 5.0, 4.0)
    with pytest.raises(ProcessingError, match="gap_m must be positive"):
        physics.simmons_current_density(0.0, 0.1, 4.0)


def test_wkb_transmission_of_a_rectangular_barrier_is_the_closed_form() -> None:
    # rectangular barrier: T(E) = exp(−2d·√(2mₑ(φ − E))/ħ), the WKB integral in closed form
    # (Simmons 1963 eq. 1; Chen, Introduction to STM, §1)
    d, phi = 0.7e-9, 4.2
    x = np.linspace(0, d, 11)
    energy = np.array([0.0, -0.1, -0.5])
    t = physics.wkb_transmission(energy, (x, np.full(x.size, phi)))
    closed = np.exp(-physics.TWO_KAPPA_PER_SQRT_EV * d * np.sqrt(phi - energy))
    np.testing.assert_allclose(t, closed, rtol=1e-12)


def test_wkb_transmission_of_a_trapezoid_is_the_closed_form() -> None:
    # ∫₀ᵈ √(a − b x) dx = (2/(3b))(a^{3/2} − (a − bd)^{3/2}) (elementary calculus)
    d, phi, bias, e = 1.0e-9, 4.5, 1.0, -0.2
    x = np.linspace(0, d, 4001)
    u = physics.barrier_profile_trapezoid(x, d, phi, bias)
    a, b = phi - e, bias / d
    integral = 2 / (3 * b) * (a**1.5 - (a - b * d) ** 1.5)
    t = physics.wkb_transmission(e, (x, u))
    assert t == pytest.approx(math.exp(-physics.TWO_KAPPA_PER_SQRT_EV * integral), rel=1e-6)


@pytest.mark.parametrize("bias", [1e-3, 1e-2, -1e-2])
def test_wkb_current_low_bias_limit_is_g0_v_exp(bias: float) -> None:
    # DESIGN §6: the numerical WKB integral reduces to I = G₀·V·exp(−2κd) at low bias
    # (Tersoff & Hamann 1985; G₀ = 2e²/h from scipy.constants)
    gaps = np.array([0.4e-9, 0.7e-9, 1.0e-9])
    phi = 4.5
    i = physics.wkb_current(gaps, bias, phi_eV=phi)
    g0 = 2 * c.e**2 / c.h
    expected = g0 * bias * np.exp(-2 * physics.decay_constant(phi) * gaps)
    np.testing.assert_allclose(i / expected, 1.0, rtol=0.01)
    assert physics.CONDUCTANCE_QUANTUM_S == pytest.approx(7.748091729e-5, rel=1e-9)  # CODATA


def test_wkb_decay_at_high_bias_follows_the_lowered_mean_barrier() -> None:
    # Simmons 1963: bias lowers the mean barrier to φ − eV/2 at the emitter's Fermi level; the
    # bias window also lets lower-lying electrons through, so φ − eV/2 < φ_ap < φ
    phi, bias, d, h = 4.5, 1.0, 0.6e-9, 1e-12
    i = physics.wkb_current(np.array([d - h, d + h]), bias, phi_eV=phi)
    phi_ap = physics.apparent_barrier_eV(np.log(i[1] / i[0]) / (2 * h))
    assert phi - bias / 2 < phi_ap < phi - 0.05
    # low bias: φ_ap → φ
    i = physics.wkb_current(np.array([d - h, d + h]), 0.01, phi_eV=phi)
    assert physics.apparent_barrier_eV(np.log(i[1] / i[0]) / (2 * h)) == pytest.approx(phi,
                                                                                       abs=2e-3)


def test_wkb_current_at_room_temperature_changes_little() -> None:
    # Sommerfeld expansion (from memory): thermal smearing raises the current by a relative
    # amount of order (πkT·dlnT/dE)²/6, well below 1 % for a 0.1 V, sub-nm junction
    gaps = np.array([0.5e-9, 0.8e-9])
    cold = physics.wkb_current(gaps, 0.1, phi_eV=4.5)
    warm = physics.wkb_current(gaps, 0.1, phi_eV=4.5, temperature_K=300.0)
    assert np.all(warm > cold)
    np.testing.assert_allclose(warm / cold, 1.0, atol=0.01)


def test_image_potential_exact_series_matches_direct_image_sum() -> None:
    # Simmons 1963 §V: the infinite series of images between two plane electrodes, summed here
    # directly (n up to 2·10⁵), against the closed form with the digamma function
    s = 1.0e-9
    u = np.array([0.1, 0.25, 0.5, 0.8])
    n = np.arange(1, 200_001)[:, None]
    series = 1 / (2 * u) + np.sum(n / (n**2 - u**2) - 1 / n, axis=0)
    direct = -c.e / (8 * np.pi * c.epsilon_0 * s) * series
    np.testing.assert_allclose(physics.image_potential_eV(u * s, s), direct, rtol=1e-5)


def test_image_potential_limits() -> None:
    s = 1.0e-9
    # next to one electrode: the classical image −e²/(16πε₀x) (textbook electrostatics)
    x = 1e-12
    single = -c.e / (16 * np.pi * c.epsilon_0 * x)
    assert physics.image_potential_eV(x, s) == pytest.approx(single, rel=2e-3)
    # mid-gap: −e² ln 2/(4πε₀s) (closed form of the series at u = 1/2)
    mid = -c.e * math.log(2) / (4 * np.pi * c.epsilon_0 * s)
    assert physics.image_potential_eV(s / 2, s) == pytest.approx(mid, rel=1e-9)
    # Simmons's approximation is 1.15 × the exact value at mid-gap by construction of λ
    assert physics.image_potential_eV(s / 2, s, form="simmons") == pytest.approx(1.15 * mid)
    # symmetric, and −inf outside the gap
    assert physics.image_potential_eV(0.3 * s, s) == pytest.approx(
        physics.image_potential_eV(0.7 * s, s))
    assert physics.image_potential_eV(0.0, s) == -np.inf
    # a dielectric screens it: ∝ 1/ε_r
    assert physics.image_potential_eV(s / 2, s, 2.0) == pytest.approx(mid / 2)


def test_image_force_lowers_the_apparent_barrier() -> None:
    # Simmons 1963 §V: the image force lowers and rounds the barrier, so the current is larger
    # and decays more slowly than through the bare trapezoid
    gaps = np.array([0.6e-9, 0.6e-9 + 2e-12])
    trap = physics.wkb_current(gaps, 0.1, phi_eV=4.5)
    image = physics.wkb_current(gaps, 0.1, phi_eV=4.5, profile="image-force")
    assert image[0] > trap[0]
    phi_trap = physics.apparent_barrier_eV(np.log(trap[1] / trap[0]) / 2e-12)
    phi_image = physics.apparent_barrier_eV(np.log(image[1] / image[0]) / 2e-12)
    assert phi_image < phi_trap - 0.3


def test_gap_for_current_inverts_wkb_current() -> None:
    gap = physics.gap_for_current(1e-9, 0.1, 4.5)
    assert abs(physics.wkb_current(gap, 0.1, phi_eV=4.5)) == pytest.approx(1e-9, rel=1e-6)
    # one channel at 1 nA and 0.1 V: a gap of a few Å (common practice: sub-nm gaps)
    assert 0.2e-9 < gap < 1.0e-9
    with pytest.raises(ProcessingError, match="no gap between"):
        physics.gap_for_current(1.0, 0.1, 4.5)


def test_wkb_current_sign_follows_bias_and_rejects_unknown_profile() -> None:
    assert physics.wkb_current(0.5e-9, -0.2, phi_eV=4.0) < 0
    assert physics.wkb_current(0.5e-9, 0.0, phi_eV=4.0) == 0
    with pytest.raises(ValueError, match="barrier profile 'round'"):
        physics.wkb_current(0.5e-9, 0.1, phi_eV=4.0, profile="round")
