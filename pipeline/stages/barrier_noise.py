"""Noise model of ln|I| for the approach-curve fit (private: import from pipeline.stages.barrier).

The current of an approach curve carries relative noise f, correlated between successive samples
like an AR(1) process (the preamplifier's bandwidth), plus white additive floor noise σ. Here:
robust scale estimates, the floor from the retracted tail, moment matching of (f², ρ) on fit
residuals, and the slope variance of a weighted line fit under that covariance.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["MAD_TO_SIGMA"]

#: Consistency factor turning a median absolute deviation into a Gaussian standard deviation.
MAD_TO_SIGMA = 1.482602218505602


def _mad_sigma(values: np.ndarray) -> float:
    v = values[np.isfinite(values)]
    if v.size == 0:
        return math.nan
    return MAD_TO_SIGMA * float(np.median(np.abs(v - np.median(v))))


def _tail_noise(y: np.ndarray) -> tuple[bool, float, float]:
    """Noise of the retracted tail.  Returns (flat, median, sigma).

    The tail is the most retracted fifth of the curve (at least 10 samples). ``sigma`` comes from
    its second differences (σ = MAD-σ(Δ²y)/√6), which a smooth remaining signal barely affects;
    the tail is ``flat`` (noise-dominated, so its median is the channel's offset) when the spread
    of its values is no larger than twice that.
    """
    n_tail = max(10, y.size // 5)
    tail = y[-n_tail:]
    sigma = _mad_sigma(np.diff(tail, 2)) / math.sqrt(6.0)
    flat = bool(sigma > 0 and _mad_sigma(tail) <= 2.0 * sigma)
    return flat, float(np.median(tail)), float(sigma)


def _ar1_apply(v: np.ndarray, rho: float) -> np.ndarray:
    """R·v for the AR(1) correlation matrix R_ij = ρ^|i−j| (two recursive passes, O(n))."""
    if rho == 0.0:
        return v.copy()
    from scipy import signal  # here: scipy.signal takes 0.3 s to import

    fwd = signal.lfilter([1.0], [1.0, -rho], v, axis=0)
    bwd = signal.lfilter([1.0], [1.0, -rho], v[::-1], axis=0)[::-1]
    return fwd + bwd - v


def _slope_variance(z: np.ndarray, weights: np.ndarray, mult_var: float, floor_var: np.ndarray,
                    rho: float) -> float:
    """Variance of the weighted-least-squares slope under the noise model of ln|I|.

    Noise covariance C = f²·R(ρ) + diag(σ_floor²/I²): relative noise correlated AR(1)-like
    between successive samples, additive floor noise white. Sandwich A⁻¹(XᵀWCWX)A⁻¹ with
    A = XᵀWX.
    """
    x = np.column_stack([np.ones_like(z), z])
    wx = x * weights[:, None]
    a_inv = np.linalg.inv(x.T @ wx)
    cwx = mult_var * _ar1_apply(wx, rho) + floor_var[:, None] * wx
    cov = a_inv @ (wx.T @ cwx) @ a_inv
    return float(cov[1, 1])


def _residual_moments(x: np.ndarray, b: np.ndarray, c_diag: np.ndarray, c_off: np.ndarray,
                      g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal and first off-diagonal of M C Mᵀ, M = I − X B (the residual-maker).

    ``g`` = B C (2 × n), ``c_diag``/``c_off`` the diagonal and first off-diagonal of C.
    """
    q = g @ b.T  # B C Bᵀ, 2 × 2
    xg = np.einsum("ik,ki->i", x, g)
    diag = c_diag - 2.0 * xg + np.einsum("ik,kl,il->i", x, q, x)
    off = (c_off - np.einsum("ik,ki->i", x[:-1], g[:, 1:])
           - np.einsum("ik,ki->i", x[1:], g[:, :-1])
           + np.einsum("ik,kl,il->i", x[:-1], q, x[1:]))
    return diag, off


def _noise_model(x: np.ndarray, resid: np.ndarray, weights: np.ndarray, floor_var: np.ndarray,
                 mult_var: float) -> tuple[float, float]:
    """Relative-noise variance f² and its lag-one correlation ρ from the ln|I| residuals.

    Moment matching that is unbiased for the fitted model (design matrix ``x``, n × p): the
    expected weighted sums S₀ = Σuᵢrᵢ² and S₁ = Σvᵢrᵢrᵢ₊₁ under C = f²R(ρ) + D are computed
    exactly through the residual-maker M = I − X(XᵀWX)⁻¹XᵀW (E[rrᵀ] = MCMᵀ, O(n) with the
    AR(1) recursion), and (f², ρ) solve E[S₀] = S₀, E[S₁] = S₁. Residuals are winsorised at 3σ
    against outliers.
    """
    n = x.shape[0]
    xw = x * weights[:, None]
    b = np.linalg.solve(x.T @ xw, xw.T)  # p × n
    fl_diag, fl_off = _residual_moments(x, b, floor_var, np.zeros(n - 1), b * floor_var)
    rho = 0.0
    for _ in range(2):
        var = mult_var + floor_var
        sd = np.sqrt(var)
        r = np.clip(resid, -3.0 * sd, 3.0 * sd)
        u = 1.0 / var**2
        v = 1.0 / (var[1:] * var[:-1])
        s0 = float(np.sum(u * r * r))
        s1 = float(np.sum(v * r[1:] * r[:-1]))
        e0_floor = float(np.sum(u * fl_diag))
        e1_floor = float(np.sum(v * fl_off))
        rho, e0 = _match_moments(x, b, u, v, s0, s1, e0_floor, e1_floor)
        mult_var = max((s0 - e0_floor) / e0, 1e-10)
    return mult_var, rho


def _match_moments(x: np.ndarray, b: np.ndarray, u: np.ndarray, v: np.ndarray, s0: float,
                   s1: float, e0_floor: float, e1_floor: float) -> tuple[float, float]:
    """Solve for ρ in the moment equations of :func:`_noise_model`; returns (ρ, E₀ per f²)."""
    n = x.shape[0]

    def parts(rh: float) -> tuple[float, float]:
        g = _ar1_apply(b.T, rh).T
        d, o = _residual_moments(x, b, np.ones(n), np.full(n - 1, rh), g)
        return float(np.sum(u * d)), float(np.sum(v * o))

    def mismatch(rh: float) -> float:
        e0, e1 = parts(rh)
        return max((s0 - e0_floor) / e0, 0.0) * e1 + e1_floor - s1

    lo, hi = -0.5, 0.95
    m_lo, m_hi = mismatch(lo), mismatch(hi)
    if m_lo * m_hi < 0:
        from scipy import optimize  # here: 0.3 s to import, and frame work never needs it

        rho = float(optimize.brentq(mismatch, lo, hi, xtol=1e-4))
    else:
        rho = lo if abs(m_lo) < abs(m_hi) else hi
    return rho, parts(rho)[0]
