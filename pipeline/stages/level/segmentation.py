"""Terrace segmentation: regions between height edges, which of them face each other, merges."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from pipeline.stages.level.edges import _masked_smooth, _sobel_magnitude
from pipeline.stages.level.robust import MAD_TO_SIGMA, _median_mad
from pipeline.stages.level.scars import _dilate_cross, _dilate_square


def _segment(r: np.ndarray, valid: np.ndarray, *, sigma_px: float, threshold_sigma: float,
             min_step_m: float, min_px: int) -> tuple[np.ndarray, float]:
    """Terrace labels (0..T-1, -1 unassigned) from height-gradient edges + components.

    Returns the labels and the gradient threshold used (m per pixel).
    """
    sm, support = _masked_smooth(r, valid, sigma_px)
    g = _sobel_magnitude(sm)
    inside = valid & support
    gv = g[inside]
    med, mad = _median_mad(gv) if gv.size else (0.0, 0.0)
    spread = MAD_TO_SIGMA * mad
    # a sharp step of min_step_m, smoothed by the Gaussian, peaks at min_step/(sqrt(2 pi) sigma)
    floor = 0.5 * min_step_m / (math.sqrt(2 * math.pi) * max(sigma_px, 0.5))
    thr = max(med + threshold_sigma * spread, floor)
    edges = (g > thr) | ~inside
    edges = _dilate_cross(edges, 1)
    lab, n = ndimage.label(~edges)
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    keep = sizes >= min_px
    keep[0] = False
    new_id = np.full(n + 1, -1, dtype=np.int64)
    new_id[keep] = np.arange(int(keep.sum()))
    return new_id[lab], thr


def _adjacent_pairs(labels: np.ndarray, n_labels: int, reach: int) -> dict[tuple[int, int], int]:
    """Pairs of labels that face each other across at most ``reach`` pixels, with counts.

    Every pixel pair (p, p + s) along a row, column or diagonal with two different labels is
    counted. Regions are 4-connected, so the straight path between such a pair crosses an
    unassigned pixel (for a diagonal step the two pixels beside it are unassigned) within
    ``|s|`` of p: only pixels that close to an unassigned one are examined.
    """
    counts: dict[tuple[int, int], int] = {}
    if n_labels < 2:
        return counts
    ny, nx = labels.shape
    assigned = labels >= 0
    ys, xs = np.nonzero(assigned & _dilate_square(~assigned, reach))
    la = labels[ys, xs]
    total = np.zeros(n_labels * n_labels, dtype=np.int64) if n_labels <= 1024 else None
    for s in range(1, reach + 1):
        for dy, dx in ((0, s), (s, 0), (s, s), (s, -s)):
            y2, x2 = ys + dy, xs + dx
            inb = (y2 < ny) & (x2 >= 0) & (x2 < nx)
            a, b = la[inb], labels[y2[inb], x2[inb]]
            m = (b >= 0) & (a != b)
            if not m.any():
                continue
            am, bm = a[m], b[m]
            code = np.minimum(am, bm) * n_labels + np.maximum(am, bm)
            if total is not None:  # few labels: one count per possible pair
                total += np.bincount(code, minlength=n_labels * n_labels)
                continue
            codes, cnt = np.unique(code, return_counts=True)
            for c, k in zip(codes.tolist(), cnt.tolist(), strict=True):
                key = (c // n_labels, c % n_labels)
                counts[key] = counts.get(key, 0) + k
    if total is not None:
        for c in np.flatnonzero(total).tolist():
            counts[(c // n_labels, c % n_labels)] = int(total[c])
    return {k: c for k, c in counts.items() if c >= 3}


def _merge(labels: np.ndarray, n_labels: int, pairs: list[tuple[int, int]]
           ) -> tuple[np.ndarray, int]:
    parent = list(range(n_labels))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for s, t in pairs:
        rs, rt = root(s), root(t)
        if rs != rt:
            parent[max(rs, rt)] = min(rs, rt)
    roots = np.array([root(i) for i in range(n_labels)])
    uniq, new = np.unique(roots, return_inverse=True)
    lut = np.append(new, -1)  # index -1 -> -1
    return lut[labels], int(uniq.size)
