"""Line fits of ln|I| against z (private: import from pipeline.stages.barrier).

A Huber M-estimate by iteratively reweighted least squares, plain weighted least squares, and
the best split of a range into two independent lines (the tip-change test).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.stages.barrier_noise import MAD_TO_SIGMA

__all__ = ["HUBER_C"]

#: Huber's tuning constant: 95 % efficiency for Gaussian residuals (Huber, Robust Statistics).
HUBER_C = 1.345


@dataclass
class _LineFit:
    a: float
    b: float
    scale: float
    u: np.ndarray  # standardised residuals
    weights: np.ndarray  # final robust weights (noise model × Huber)


def _line_design(z: np.ndarray) -> np.ndarray:
    return np.column_stack([np.ones_like(z), z])


def _wls(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    xw = x * w[:, None]
    return np.linalg.solve(x.T @ xw, xw.T @ y)


def _robust_line(z: np.ndarray, y: np.ndarray, w: np.ndarray, *, n_iter: int = 30) -> _LineFit:
    """Huber M-estimate of y = a + b z with known relative variances 1/w (IRLS).

    Scale from the MAD of the standardised residuals (Huber, Robust Statistics, 1981, §7).
    The uncertainty is not taken from here but from the noise model (:func:`_slope_variance`).
    """
    sw = np.sqrt(w)
    x = np.column_stack([sw, sw * z])
    yt = sw * y

    def solve(h: np.ndarray) -> np.ndarray:
        xh = x * h[:, None]
        return np.linalg.solve(xh.T @ x, xh.T @ yt)

    h = np.ones_like(y)
    beta = solve(h)
    scale = 1.0
    for _ in range(n_iter):
        r = yt - x @ beta
        scale = MAD_TO_SIGMA * float(np.median(np.abs(r)))
        if not scale > 0:
            scale = float(np.sqrt(np.mean(r**2))) or 1e-300
        h = np.minimum(1.0, HUBER_C / np.maximum(np.abs(r / scale), 1e-300))
        beta_new = solve(h)
        step = float(np.max(np.abs(beta_new - beta) / (np.abs(beta) + 1e-300)))
        beta = beta_new
        if step < 1e-9:
            break
    u = (yt - x @ beta) / scale
    return _LineFit(float(beta[0]), float(beta[1]), scale, u, w * h)


def _two_segment_statistic(z: np.ndarray, y: np.ndarray, w: np.ndarray, m: int
                           ) -> tuple[float, int]:
    """Largest drop in weighted RSS from one line to two independent lines split at one sample.

    Returns (ΔRSS_max, index of the first sample of the right segment). Vectorised over split
    points with prefix sums; both segments keep at least ``m`` samples.
    """
    n = z.size
    if n < 2 * m:
        return 0.0, -1

    def prefix(a: np.ndarray) -> np.ndarray:
        return np.concatenate([[0.0], np.cumsum(a)])

    sums = [prefix(v) for v in (w, w * z, w * z * z, w * y, w * z * y, w * y * y)]

    def rss(lo: np.ndarray | int, hi: np.ndarray | int) -> np.ndarray:
        s0, sz, szz, sy, szy, syy = (c[hi] - c[lo] for c in sums)
        det = s0 * szz - sz * sz
        with np.errstate(divide="ignore", invalid="ignore"):
            a = (szz * sy - sz * szy) / det
            b = (s0 * szy - sz * sy) / det
        return np.asarray(syy - a * sy - b * szy)

    total = float(rss(0, n))
    splits = np.arange(m, n - m + 1)
    two = rss(0, splits) + rss(splits, n)
    best = int(np.nanargmin(two))
    return max(0.0, total - float(two[best])), int(splits[best])
