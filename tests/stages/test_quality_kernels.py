"""The fast numerical kernels of the quality stage and the tip-change detector against their
reference definitions."""

from __future__ import annotations

import itertools

import numpy as np
from scipy import stats

from pipeline.stages import quality as Q
from pipeline.stages import tip_blocks as T
from pipeline.stages.stats import nanmedian


def test_comparator_network_sorts_every_input() -> None:
    # 0-1 principle (Knuth, TAOCP vol. 3, §5.3.4): a comparator network that sorts every
    # 0/1 sequence sorts every sequence
    for n in range(1, 11):
        net = T._network(n)
        for bits in itertools.product((0, 1), repeat=n):
            a = list(bits)
            for i, j in net:
                if a[i] > a[j]:
                    a[i], a[j] = a[j], a[i]
            assert a == sorted(bits), (n, bits)


def test_block_medians_equal_sliding_window_medians() -> None:
    rng = np.random.default_rng(21)
    for shape in ((60, 33), (8, 5), (9, 2)):
        h = rng.normal(size=shape)
        for frac in (0.0, 0.1, 0.7, 1.0):
            a = h.copy()
            a[rng.random(shape) < frac] = np.nan
            win = np.lib.stride_tricks.sliding_window_view(a, T._BLOCK_LINES, axis=0)
            ref = nanmedian(win, axis=-1)  # the per-window sort it replaces
            np.testing.assert_array_equal(T._block_medians(a), ref)


def test_skewness_and_kurtosis_equal_scipy_stats() -> None:
    rng = np.random.default_rng(23)
    h = rng.gamma(2.0, 1e-11, size=(64, 64))  # skewed heights
    p = Q.areal_parameters(h)
    # ISO 25178-2 Ssk, Sku are the population moment ratios (scipy.stats reference)
    np.testing.assert_allclose(p["Ssk"], stats.skew(h.ravel()), rtol=1e-12)
    np.testing.assert_allclose(p["Sku"], stats.kurtosis(h.ravel(), fisher=False), rtol=1e-12)
