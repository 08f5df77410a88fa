"""Small exact statistics shared by the stages (private helpers, no public API).

One fast median for every stage: :func:`median` gives the same number as ``numpy.median``
(tested), several times faster than its three-index partition; :func:`nanmedian` the same
numbers as ``numpy.nanmedian`` along an axis. :func:`changepoint` places one jump in a series.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["changepoint", "median", "median_inplace", "nanmedian"]


def median_inplace(a: np.ndarray) -> float:
    """``numpy.median`` of a 1-D float64 array that may be reordered (NaN if any is NaN).

    One partition at the middle index (the lower middle value for an even count is the
    largest entry below it): the same number as ``numpy.median``, several times faster than
    its three-index partition.
    """
    n = a.size
    if n == 0:
        return math.nan
    k = n // 2
    a.partition(k)
    if math.isnan(float(a[k:].max())):  # NaN sort last: then numpy's median is NaN
        return math.nan
    hi = float(a[k])
    if n % 2:
        return hi
    return (float(a[:k].max()) + hi) / 2


def median(x: np.ndarray) -> float:
    """``numpy.median`` of all entries of ``x`` (a copy is partitioned; ``x`` is unchanged)."""
    return median_inplace(np.array(x, dtype=np.float64).ravel())


def nanmedian(a: np.ndarray, axis: int = -1) -> np.ndarray:
    """``numpy.nanmedian(a, axis)`` (all-NaN slices: NaN, without numpy's RuntimeWarning).

    One sort along the axis (NaN sort last) and the middle of each slice's finite values: the
    same numbers, without numpy's per-slice masked-array path. Integer input is taken as
    float64; float input keeps its precision.
    """
    arr = np.moveaxis(np.asarray(a), axis, -1)
    if arr.dtype.kind != "f":
        arr = arr.astype(np.float64)
    srt = np.sort(arr, axis=-1)
    n = np.sum(~np.isnan(arr), axis=-1)
    lo = np.clip((n - 1) // 2, 0, None)[..., None]
    hi = np.clip(n // 2, 0, None)[..., None]
    med = 0.5 * (np.take_along_axis(srt, lo, -1) + np.take_along_axis(srt, hi, -1))[..., 0]
    return np.where(n > 0, med, np.nan)


def changepoint(level: np.ndarray, lo: int, hi: int,
                candidates: tuple[int, int] | None = None) -> int:
    """Boundary ``k`` (between entries k and k+1) where one jump on a straight line fits
    ``level[lo..hi]`` best (least squares; the slope absorbs a slow trend, which would
    otherwise pull a two-level split towards the window's ends). ``k`` is sought in
    ``candidates`` (first, last; default: the whole window).
    """
    seg = level[lo:hi + 1]
    t = np.arange(seg.size, dtype=np.float64)
    first, last = candidates if candidates is not None else (lo, hi - 1)
    best, best_cost = first, math.inf
    for k in range(max(first, lo), min(last, hi - 1) + 1):
        x = np.column_stack([np.ones_like(t), t, (t > k - lo).astype(np.float64)])
        coef, *_ = np.linalg.lstsq(x, seg, rcond=None)
        cost = float(np.sum((seg - x @ coef) ** 2))
        if cost < best_cost:
            best, best_cost = k, cost
    return best

