"""The stages' shared exact statistics against numpy (the reference) and known answers."""

from __future__ import annotations

import math
import warnings

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.stages import stats
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


def test_large_median_equals_numpy_on_frames() -> None:
    # large arrays take the bracketed path; numpy.median is the reference. A plane in raster
    # order is the case a strided sample would alias with; heavy ties and a far outlier tail
    # move the middle ranks; a NaN anywhere gives NaN (numpy's rule)
    rng = np.random.default_rng(5)
    yy, xx = np.mgrid[0:512, 0:512]
    plane = (0.3 * yy + 2.0 * xx).astype(float).ravel()
    tail = rng.normal(size=300_001)
    tail[rng.random(tail.size) < 0.3] += 1e3
    ties = rng.integers(0, 4, size=65_536).astype(float)
    for x in (plane, tail, ties, rng.normal(size=stats._BRACKET_MIN)):
        assert median(x) == np.median(x)
        assert median_inplace(x.copy()) == np.median(x)
    for where in (0, 262_143, 131_072):
        x = plane.copy()
        x[where] = np.nan
        assert math.isnan(median(x))


@settings(max_examples=60, deadline=None)
@given(n=st.integers(stats._BRACKET_MIN, 3 * stats._BRACKET_MIN), seed=st.integers(0, 2**32 - 1),
       levels=st.sampled_from([0, 2, 50]), shift=st.floats(-1.0, 1.0))
def test_bracketed_median_equals_numpy(n: int, seed: int, levels: int, shift: float) -> None:
    # numpy.median is the reference; levels > 0 gives ties, shift moves the middle off the
    # sample's centre (a skewed mixture)
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n) if levels == 0 else rng.integers(0, levels, size=n).astype(float)
    x[: int(abs(shift) * n / 2)] += 100.0 * np.sign(shift)
    assert median(x) == np.median(x)


def test_bracket_miss_falls_back_to_the_full_partition(monkeypatch) -> None:
    # a sample drawn only from the lowest entries puts the middle rank above the bracket:
    # the full partition must take over and still give numpy's number
    x = np.arange(40_000, dtype=float)[::-1].copy()
    monkeypatch.setattr(stats, "_sample_index", lambda n: np.arange(n - stats._SAMPLE, n))
    assert stats._bracketed_median(x.copy()) is None
    assert median(x) == np.median(x) == 19_999.5
    # a bracket whose low end is the upper middle value (rank n/2) misses the lower one
    j = (20_000 * stats._SAMPLE) // 40_000
    d = 2 * math.isqrt(stats._SAMPLE) + 2
    start = 20_000 - (j - d)
    monkeypatch.setattr(stats, "_sample_index", lambda n: np.arange(start, start + stats._SAMPLE))
    x = np.arange(40_000, dtype=float)
    assert stats._bracketed_median(x.copy()) is None
    assert median(x) == np.median(x) == 19_999.5


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
