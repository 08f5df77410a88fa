"""The stages' shared exact statistics against numpy (the reference) and known answers."""

from __future__ import annotations

import math
import warnings

import numpy as np

from pipeline.stages.stats import changepoint, median, median_inplace, nanmedian


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


def test_nanmedian_equals_numpy_nanmedian() -> None:
    rng = np.random.default_rng(2)
    a = rng.normal(size=(40, 33))
    a[rng.random(a.shape) < 0.3] = np.nan
    a[5] = np.nan  # a row without finite values
    a[7, :-1] = np.nan  # a row with one
    for axis in (1, 0, -1):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # numpy warns on all-NaN slices
            ref = np.nanmedian(a, axis=axis)  # numpy.nanmedian is the reference
        np.testing.assert_array_equal(nanmedian(a, axis=axis), ref)
    f32 = a.astype(np.float32)
    assert nanmedian(f32, axis=1).dtype == np.float32  # float input keeps its precision
    assert nanmedian(np.array([[3, 1, 2]]), axis=1).tolist() == [2.0]


def test_changepoint_finds_a_jump_on_a_slope() -> None:
    # a 20-unit jump after entry 22 on a slope of 1.5 per entry, unit noise (the truth is
    # the construction): a two-level split of the window 10..90 lands at 45, pulled by the
    # slope towards the middle; one jump on a straight line does not
    rng = np.random.default_rng(4)
    t = np.arange(100, dtype=float)
    level = 1.5 * t + np.where(t > 22, 20.0, 0.0) + rng.normal(size=t.size)
    assert changepoint(level, 10, 90) == 22
    assert changepoint(level, 10, 90, candidates=(30, 60)) == 30  # nearest allowed
