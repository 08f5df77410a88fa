"""Confidence and uncertainty of a registration pass (private).

The uniqueness of the correlation peak (the confidence figure) and the least-squares covariance
of the shift. Public API in :mod:`pipeline.stages.registration`.
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.stages.registration_core import frequencies

#: Half-width (pixels) of the neighbourhood around the main correlation peak that is excluded
#: when looking for the strongest competing peak (the confidence figure).
PEAK_EXCLUSION_PX = 3


def local_maxima(c: np.ndarray) -> np.ndarray:
    """Boolean map of (periodic) 4-neighbour local maxima."""
    rows = np.r_[c.shape[0] - 1, 0:c.shape[0], 0]
    cols = np.r_[c.shape[1] - 1, 0:c.shape[1], 0]
    p = c[rows][:, cols]  # wrapped by one pixel
    core = p[1:-1, 1:-1]
    m = core > p[:-2, 1:-1]
    m &= core >= p[2:, 1:-1]
    m &= core > p[1:-1, :-2]
    m &= core >= p[1:-1, 2:]
    return m


def sym2_eigenvalues(a: float, b: float, c: float) -> tuple[float, float]:
    """Eigenvalues ``(low, high)`` of the symmetric 2 × 2 matrix ``[[a, b], [b, c]]``."""
    mean = 0.5 * (a + c)
    r = math.hypot(0.5 * (a - c), b)
    return mean - r, mean + r


def _sym2_inverse(m: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric 2 × 2 matrix (LAPACK for a singular one, which then raises)."""
    a, b, c = float(m[0, 0]), float(m[0, 1]), float(m[1, 1])
    det = a * c - b * b
    if det == 0 or not math.isfinite(det):
        return np.linalg.inv(m)
    return np.array([[c / det, -b / det], [-b / det, a / det]])


def uniqueness(rivals: np.ndarray, peak: float) -> float:
    """``1 − second/peak`` with ``second`` the highest of the rivals ``(dy, dx, value)``."""
    second = float(rivals[:, 2].max()) if rivals.size else 0.0
    return float(np.clip(1.0 - max(second, 0.0) / peak, 0.0, 1.0))


def rival_gap_sd(shortfall: float, gap: float, n_eff: float) -> float:
    """Standard deviation from noise of the gap between two maxima of a correlation coefficient.

    For ``A = S + n_A`` and ``B = S(· − τ) + n_B``, white noise of equal variance ``σ²`` in both
    images and all of the peak's shortfall ``1 − ρ`` taken as noise (``1 − ρ = Nσ²/E``,
    ``E = ‖S‖²``): a rival maximum at ``τ'`` falls short by ``Δρ = D/(2E)`` with
    ``D = ‖S − S(· − (τ' − τ))‖²``, and the noise adds ``(⟨n_A, d⟩ + ⟨n_B, d'⟩)/E``, of
    variance ``2σ²D/E²``. So ``sd(Δρ) = sqrt(4 (1 − ρ) Δρ / N)``, ``N`` the (effective) number
    of pixels (checked by a Monte Carlo simulation in the tests).

    Parameters
    ----------
    shortfall : float
        ``1 − ρ`` of the peak.
    gap : float
        ``Δρ``, the peak's coefficient minus the rival's.
    n_eff : float
        Effective number of pixels, ``(Σw)²/Σw²`` for weights ``w``.

    Returns
    -------
    float
        The standard deviation of ``Δρ`` from the images' noise.
    """
    return math.sqrt(4.0 * max(shortfall, 0.0) * max(gap, 0.0) / n_eff)


def lobe_rivals(surface: np.ndarray, py: int, px: int, peak: float, *,
                indistinct: float = 0.0) -> np.ndarray:
    """The local maxima ``(dy, dx, value)`` that compete with the peak at ``(py, px)``:
    those outside the peak's lobe.

    The lobe is the ellipse of 2.5 peak widths along the principal axes of the peak's curvature
    (coarse 3 × 3 Hessian), at least :data:`PEAK_EXCLUSION_PX` pixels: bumps along the ridge of
    a step edge belong to the main peak (their spread is in the covariance), separate peaks
    (a lattice translation, a chance match) compete. So does, inside the lobe too, any local
    maximum beyond :data:`PEAK_EXCLUSION_PX` that is within ``indistinct`` of the peak: for a
    correlation coefficient the peak's own shortfall ``1 − peak`` is the size of the
    differences between the two images (noise, and what the frames' distortions leave), and a
    match elsewhere that is better than that by less cannot be told from it. That is a ridge
    holding a row of near-equal maxima — a straight step edge over a periodic remainder (a
    lattice, scan lines) that the Fourier notch did not remove — where the covariance from the
    peak's curvature sees only one of them.
    """
    ny, nx = surface.shape
    ym, yp, xm, xp = (py - 1) % ny, (py + 1) % ny, (px - 1) % nx, (px + 1) % nx
    c11 = 2.0 * float(surface[py, px])
    hyy = c11 - float(surface[ym, px]) - float(surface[yp, px])
    hxx = c11 - float(surface[py, xm]) - float(surface[py, xp])
    hyx = -(float(surface[yp, xp]) - float(surface[yp, xm]) - float(surface[ym, xp])
            + float(surface[ym, xm])) / 4
    a, b, c = hyy / peak, hyx / peak, hxx / peak  # 1/σ² along the principal axes
    cap = 1.0 / (0.25 * min(ny, nx)) ** 2  # lobes no longer than a quarter of the image
    low, high = sym2_eigenvalues(a, b, c)
    if high <= cap:  # both eigenvalues raised to the cap
        a, b, c = cap, 0.0, cap
    elif not low >= cap:  # raise the lower one: high·P_high + cap·P_low
        g = (high - cap) / (high - low)
        a, b, c = g * a + high * (1 - g), g * b, g * c + high * (1 - g)
    lm = np.flatnonzero(local_maxima(surface))
    ly, lx = np.divmod(lm, nx)
    dyl = ((ly - py + ny // 2) % ny - ny // 2).astype(float)
    dxl = ((lx - px + nx // 2) % nx - nx // 2).astype(float)
    maha = a * dyl**2 + 2 * b * dyl * dxl + c * dxl**2
    values = surface.ravel()[lm]
    far = ((maha > 2.5**2) | (values >= peak - indistinct)) & \
        (dyl**2 + dxl**2 > PEAK_EXCLUSION_PX**2)
    return np.column_stack([dyl[far], dxl[far], values[far]])


def ls_covariance(signal_tensor: np.ndarray | None, var_d: float, factor: float,
                  hessian: np.ndarray | None, nn_std: float, grid: float) -> np.ndarray:
    """Shift covariance (px²) of a (weighted) least-squares registration.

    ``var_d · factor · J⁻¹`` with ``J`` the gradient cross-tensor ``Σ w ∇A ∇Bᵀ`` of the two
    images at the found shift. ``J`` is measured as the Hessian of the raw correlation at its
    peak, so the images' noise, being independent, does not inflate it (an auto-tensor
    ``Σ w ∇A ∇Aᵀ`` would count the noise's own gradients as information). Along the ridge of a
    straight step edge ``J`` is small and the uncertainty large, as it should be. Added: the
    noise × noise part of the correlation (std ``nn_std``, slope ``π/√3`` per pixel for white
    noise band-limited to the pixel grid, through the peak's Hessian) and the grid resolution.
    """
    inf = np.array([[math.inf, 0.0], [0.0, math.inf]])
    if signal_tensor is None or not (math.isfinite(var_d) and np.all(np.isfinite(signal_tensor))):
        return inf
    low, high = sym2_eigenvalues(float(signal_tensor[0, 0]), float(signal_tensor[0, 1]),
                                 float(signal_tensor[1, 1]))
    if not (low > 0 and high > 0):
        return inf
    cov = var_d * factor * _sym2_inverse(signal_tensor)
    if hessian is not None and nn_std > 0:
        hinv = _sym2_inverse(hessian)
        cov = cov + (nn_std * math.pi / math.sqrt(3.0)) ** 2 * hinv @ hinv
    return cov + np.eye(2) * grid**2


def raw_hessian(cross: np.ndarray, shape: tuple[int, int], ty: float, tx: float) -> np.ndarray:
    """Negative Hessian of the raw correlation ``irfft2(cross)`` at ``(ty, tx)`` (per pixel²)."""
    ny, nx = shape
    ky, kx, wk = frequencies(shape)
    gy = 2 * np.pi * ky / ny
    gx = 2 * np.pi * kx / nx
    phase = cross * np.exp(2j * np.pi * (np.outer(ky * ty / ny, np.ones(kx.size))
                                         + np.outer(np.ones(ky.size), kx * tx / nx)))
    re = (phase * wk).real
    n = ny * nx
    hyy = float(gy**2 @ re.sum(axis=1)) / n
    hxx = float(re.sum(axis=0) @ gx**2) / n
    hyx = float(gy @ re @ gx) / n
    return np.array([[hyy, hyx], [hyx, hxx]])


def energy(spec: np.ndarray, shape: tuple[int, int]) -> float:
    """``Σ f²`` of a real image from its half spectrum (Parseval)."""
    _, _, wk = frequencies(shape)
    return float(((spec.real**2 + spec.imag**2) @ wk).sum()) / (shape[0] * shape[1])
