"""The stages' shared exact median against numpy.median (the reference)."""

from __future__ import annotations

import math

import numpy as np

from pipeline.stages.stats import median, median_inplace


def test_median_equals_numpy() -> None:
    rng = np.random.default_rng(11)
    for n in (1, 2, 3, 4, 5, 6, 7, 10, 999, 1000, 1001, 4096, 5001):
        for x in (rng.normal(size=n), rng.integers(0, 3, size=n).astype(float)):  # ties too
            assert median(x) == np.median(x)  # numpy.median is the reference
            a = x.copy()
            assert median_inplace(a) == np.median(x)
    x = rng.normal(size=(7, 9))
    assert median(x) == np.median(x) and x.shape == (7, 9)  # any shape, input unchanged
    assert math.isnan(median(np.array([0.0, np.nan, 1.0])))  # numpy: NaN in, NaN out
    assert math.isnan(median(np.array([])))  # empty: NaN
