"""Small exact statistics shared by the stages (private helpers, no public API).

One fast median for every stage: :func:`median` gives the same number as ``numpy.median``
(tested), several times faster than its three-index partition.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["median", "median_inplace"]


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
