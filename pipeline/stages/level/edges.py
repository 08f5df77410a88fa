"""Height edges of a levelled frame (step edges, adsorbate flanks): smoothed gradient kernels.

Shared by line levelling (pixels near edges are left out of the second matching pass) and the
terrace fit (edges between terraces).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from pipeline.stages.level.robust import MAD_TO_SIGMA, _median_mad
from pipeline.stages.level.scars import _dilate_cross


def _sobel_magnitude(sm: np.ndarray) -> np.ndarray:
    """``hypot(sobel(sm, axis=1), sobel(sm, axis=0)) / 8`` with ``mode="nearest"``.

    The Sobel sums are those of ``ndimage.sobel`` term by term (difference ``x[+1] - x[-1]``
    along one axis, then ``2 x[0] + (x[-1] + x[+1])`` along the other, edges replicated), on
    slices of one padded copy; the magnitude is ``sqrt(gx² + gy²)``, within an ulp of hypot.
    """
    p = np.pad(sm, 1, mode="edge")
    dx = p[:, 2:] - p[:, :-2]  # (ny + 2, nx)
    dy = p[2:, :] - p[:-2, :]  # (ny, nx + 2)
    gx = 2.0 * dx[1:-1] + (dx[:-2] + dx[2:])
    gy = 2.0 * dy[:, 1:-1] + (dy[:, :-2] + dy[:, 2:])
    gx /= 8.0
    gy /= 8.0
    gx *= gx
    gy *= gy
    gx += gy
    return np.sqrt(gx, out=gx)


def _masked_smooth(h: np.ndarray, valid: np.ndarray, sigma_px: float
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Normalised Gaussian smoothing over the ``valid`` pixels, and where it has support.

    ``gaussian(h * valid) / gaussian(valid)`` where the smoothed mask is at least 0.5, else 0.
    With every pixel valid the smoothed mask is the same number everywhere (the kernel's sum,
    accumulated in the same order at every pixel), so it is taken from a 1 x 1 frame.
    """
    if sigma_px > 0:
        num = ndimage.gaussian_filter(np.where(valid, h, 0.0), sigma_px, mode="nearest")
        if valid.all():
            den = ndimage.gaussian_filter(np.ones((1, 1)), sigma_px, mode="nearest")
        else:
            den = ndimage.gaussian_filter(valid.astype(np.float64), sigma_px, mode="nearest")
    else:
        num, den = np.where(valid, h, 0.0), valid.astype(np.float64)
    support = np.broadcast_to(den >= 0.5, h.shape)
    if den.size == 1:
        sm = num / den if bool(support.flat[0]) else np.zeros_like(num)
    else:
        sm = np.where(support, num / np.where(support, den, 1.0), 0.0)
    return sm, support


def _edge_mask(h: np.ndarray, valid: np.ndarray, *, min_step_m: float,
               threshold_sigma: float = 4.0, sigma_px: float = 1.0,
               grow_px: int = 2) -> np.ndarray:
    """Pixels near height edges: smoothed gradient above median + k robust deviations.

    The threshold is at least a quarter of the peak gradient of a step of ``min_step_m`` (so
    that small line-to-line errors of a first pass do not count as edges).
    """
    sm, support = _masked_smooth(h, valid, sigma_px)
    g = _sobel_magnitude(sm)
    gv = g[valid & support]
    if gv.size == 0:
        return np.zeros_like(valid)
    med, mad = _median_mad(gv)
    spread = MAD_TO_SIGMA * mad
    floor = 0.25 * min_step_m / (math.sqrt(2 * math.pi) * sigma_px)
    mask = (g > max(med + threshold_sigma * spread, floor)) & support
    return _dilate_cross(mask, grow_px) if mask.any() else mask
