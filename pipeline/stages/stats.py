"""Small exact statistics shared by the stages (private helpers, no public API).

One fast median for every stage: :func:`median` gives the same number as ``numpy.median``
(tested), about three times faster on a 512 x 512 frame; :func:`nanmedian` the same
numbers as ``numpy.nanmedian`` along an axis. :func:`changepoint` places one jump in a series.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["changepoint", "median", "median_inplace", "nanmedian"]


# Above this many entries the median is found inside a bracket read off a random sample
# (below it one partition of the whole array is as fast).
_BRACKET_MIN = 16384
_SAMPLE = 2048


def median_inplace(a: np.ndarray) -> float:
    """``numpy.median`` of a 1-D float64 array that may be reordered (NaN if any is NaN).

    One partition at the middle index (the lower middle value for an even count is the
    largest entry below it) gives the same number as ``numpy.median``; large arrays are
    first narrowed to a few per cent of their entries by :func:`_bracketed_median`.
    """
    n = a.size
    if n == 0:
        return math.nan
    if n >= _BRACKET_MIN:
        med = _bracketed_median(a)
        if med is not None:
            return med
    k = n // 2
    a.partition(k)
    if math.isnan(float(a[k:].max())):  # NaN sort last: then numpy's median is NaN
        return math.nan
    return _middle(a, k, odd=bool(n % 2))


def _bracketed_median(a: np.ndarray) -> float | None:
    """The exact median of a large array, or None when the bracket misses.

    The middle ranks of a random sample of ``m`` entries, widened by four standard
    deviations of a sample rank (``2 sqrt(m)``), bracket the middle value ``[lo, hi]``; the
    entries inside (a few per cent of the array) are partitioned at the middle rank less
    the count below ``lo``. The result is the same number as the full partition; when the
    middle ranks fall outside the bracket (rare), None hands back to it. NaN compare
    neither below nor above, so they land inside and give NaN, as in ``numpy.median``.
    """
    n = a.size
    k = n // 2
    sample = a[_sample_index(n)]
    m = sample.size
    j = (k * m) // n
    d = 2 * math.isqrt(m) + 2
    ranks = [max(j - d, 0), min(j + d, m - 1)]
    part = np.partition(sample, ranks)
    lo, hi = float(part[ranks[0]]), float(part[ranks[1]])
    if math.isnan(lo) or math.isnan(hi):
        return None
    below = np.less(a, lo)
    n_below = int(np.count_nonzero(below))
    outside = np.greater(a, hi, out=np.empty_like(below))
    np.logical_or(below, outside, out=below)
    inside = a[~below]
    r = k - n_below
    if r < (n + 1) % 2 or r >= inside.size:  # a middle rank lies outside the bracket
        return math.nan if np.isnan(inside).any() else None
    if np.isnan(inside).any():
        return math.nan
    inside.partition(r)
    return _middle(inside, r, odd=bool(n % 2))


def _sample_index(n: int) -> np.ndarray:
    """``_SAMPLE`` indices into ``n`` entries drawn with a fixed seed: a random sample, since
    a strided one aliases with an image's rows and biases the bracket."""
    return np.random.default_rng(n).integers(0, n, _SAMPLE)


def _middle(a: np.ndarray, r: int, *, odd: bool) -> float:
    """The median of an array partitioned at ``r`` (its middle rank, or the upper of two)."""
    hi = float(a[r])
    if odd:
        return hi
    return (float(a[:r].max()) + hi) / 2


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

