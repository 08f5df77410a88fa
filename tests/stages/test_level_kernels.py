"""The fast numerical kernels of the levelling stages against their reference definitions.

Each kernel replaces a plainer numpy/scipy call (for speed); these tests pin it to that call
(numpy, scipy.ndimage, numpy.linalg are the references) or to the textbook formula.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import ndimage

from pipeline.stages.level import edges as E
from pipeline.stages.level import lines as Li
from pipeline.stages.level import robust as R
from pipeline.stages.level import scars as S
from pipeline.stages.level import segmentation as Sg


def _arrays(rng: np.random.Generator) -> list[np.ndarray]:
    out = []
    for n in (1, 2, 3, 4, 7, 10, 1001, 4096):
        out.append(rng.normal(size=n))
        out.append(rng.integers(0, 4, size=n).astype(float))  # heavy ties
    return out


def test_median_and_mad_equal_numpy() -> None:
    rng = np.random.default_rng(1)
    for x in _arrays(rng):
        med = np.median(x)  # numpy.median is the reference
        mad = np.median(np.abs(x - med))
        assert R._median_mad(x) == (med, mad)
        assert R._mad_scale(x) == R.MAD_TO_SIGMA * mad
    # numpy: NaN in, NaN out (the median itself: tests/stages/test_stats.py)
    assert all(math.isnan(v) for v in R._median_mad(np.array([1.0, np.nan, 3.0, 4.0])))


def test_reweighting_functions_are_the_textbook_ones() -> None:
    t = np.array([-np.inf, -6.0, -4.685, -4.6, -1.345, -1.0, 0.0, 0.5, 1.345, 2.0, 4.7, np.inf])
    # Tukey biweight (1 - (t/c)^2)^2 inside |t| < c (Beaton & Tukey, Technometrics 16, 147,
    # 1974), Huber weight min(1, k/|t|) (Huber, Ann. Math. Stat. 35, 73, 1964)
    a = t / R.TUKEY_C
    with np.errstate(invalid="ignore", divide="ignore"):
        tukey = np.where(np.abs(a) < 1, (1 - a * a) ** 2, 0.0)
        huber = np.where(np.abs(t) <= R.HUBER_K, 1.0, R.HUBER_K / np.abs(t))
    np.testing.assert_array_equal(R._tukey_weights(t, np.empty_like(t)), tukey)
    np.testing.assert_array_equal(R._huber_weights(t, np.empty_like(t)), huber)


@pytest.mark.parametrize("shape", [(60, 45), (3, 4), (1, 9), (8, 1)])
def test_binary_morphology_equals_ndimage(shape: tuple[int, int]) -> None:
    rng = np.random.default_rng(3)
    for p in (0.02, 0.3, 0.8):
        m = rng.random(shape) < p
        for it in (1, 2):  # scipy.ndimage.binary_dilation (cross structure) is the reference
            np.testing.assert_array_equal(S._dilate_cross(m, it),
                                          ndimage.binary_dilation(m, iterations=it))
        for r in (1, 4):
            square = np.ones((2 * r + 1,) * 2, bool)
            np.testing.assert_array_equal(S._dilate_square(m, r),
                                          ndimage.binary_dilation(m, structure=square))
            np.testing.assert_array_equal(
                S._close_rows(m, r),
                ndimage.binary_closing(m, structure=np.ones((1, 2 * r + 1))))


def test_sobel_magnitude_equals_ndimage_within_an_ulp() -> None:
    rng = np.random.default_rng(4)
    for shape in ((50, 37), (2, 3), (1, 6)):
        x = rng.normal(size=shape) * 1e-10
        ref = np.hypot(ndimage.sobel(x, axis=1, mode="nearest"),
                       ndimage.sobel(x, axis=0, mode="nearest")) / 8.0  # scipy.ndimage
        np.testing.assert_allclose(E._sobel_magnitude(x), ref, rtol=4.5e-16, atol=0)


def _pairs_brute_force(labels: np.ndarray, reach: int) -> dict[tuple[int, int], int]:
    ny, nx = labels.shape
    counts: dict[tuple[int, int], int] = {}
    for y, x in itertools.product(range(ny), range(nx)):
        for s in range(1, reach + 1):
            for dy, dx in ((0, s), (s, 0), (s, s), (s, -s)):
                y2, x2 = y + dy, x + dx
                if y2 >= ny or not 0 <= x2 < nx:
                    continue
                a, b = int(labels[y, x]), int(labels[y2, x2])
                if a >= 0 and b >= 0 and a != b:
                    key = (min(a, b), max(a, b))
                    counts[key] = counts.get(key, 0) + 1
    return {k: c for k, c in counts.items() if c >= 3}


def test_adjacent_pairs_equal_brute_force_count() -> None:
    rng = np.random.default_rng(5)
    for _ in range(6):
        edges = rng.random((24, 31)) < 0.35
        lab, n = ndimage.label(~edges)  # 4-connected regions, as in the segmentation
        labels = lab - 1
        for reach in (1, 3):
            assert Sg._adjacent_pairs(labels, n, reach) == _pairs_brute_force(labels, reach)


def test_grid_variance_equals_quadratic_form() -> None:
    rng = np.random.default_rng(6)
    u, v = np.linspace(-1, 1, 13), np.linspace(-1, 1, 9)
    basis = R._Basis(u, v, 3, constant=True)
    a = rng.normal(size=(basis.n, basis.n))
    cov = a @ a.T
    iy, ix = np.divmod(np.arange(v.size * u.size), u.size)
    phi = basis.at(iy, ix)
    ref = np.einsum("ij,jk,ik->i", phi, cov, phi).reshape(v.size, u.size)  # phi^T C phi
    np.testing.assert_allclose(basis.variance(cov), ref, rtol=1e-12, atol=1e-14 * ref.max())
    np.testing.assert_array_equal(basis.at_t(iy, ix), phi.T)


def test_joint_fit_equals_lstsq_with_one_hot_design() -> None:
    rng = np.random.default_rng(7)
    n, t = 3000, 4
    phi = rng.normal(size=(2, n))
    labels = rng.integers(0, t, size=n)
    z = phi.T @ [0.3, -1.2] + np.array([0.0, 1.0, 2.5, -0.7])[labels] + rng.normal(size=n)
    design = np.column_stack([phi.T, np.eye(t)[labels]])
    ref = np.linalg.lstsq(design, z, rcond=None)[0]  # numpy.linalg.lstsq is the reference
    fit = R._fit(phi, z, labels, t, robust=False)
    np.testing.assert_allclose(fit.beta, ref, rtol=1e-10)
    np.testing.assert_allclose(fit.resid, z - design @ ref, rtol=0, atol=1e-10)


def test_whole_grid_robust_fit_equals_pixel_list_fit() -> None:
    rng = np.random.default_rng(8)
    ny, nx = 40, 56
    basis = R._Basis(np.linspace(-1, 1, nx), np.linspace(-1, 1, ny), 2, constant=True)
    iy, ix = np.divmod(np.arange(ny * nx), nx)
    phi = basis.at_t(iy, ix)
    z = phi.T @ rng.normal(size=basis.n) + rng.normal(size=ny * nx)
    z[rng.random(z.size) < 0.05] += 20.0  # outliers for the biweight to reject
    a = R._fit(phi, z, robust=True)
    b = R._fit(phi, z, robust=True, grid=basis)  # same IRLS, separable sums
    assert a.n_iter == b.n_iter
    np.testing.assert_allclose(b.beta, a.beta, rtol=1e-10, atol=1e-12)
    np.testing.assert_array_equal(b.weights == 0, a.weights == 0)


def test_line_matching_is_the_same_block_by_block(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(9)
    d = rng.normal(size=(50, 40))
    m = rng.random(d.shape) > 0.1
    u = np.linspace(-1, 1, 40)
    whole = Li._robust_line_differences(d, m, u, slopes=True)
    monkeypatch.setattr(Li, "_BLOCK_PIXELS", 7 * 40)  # blocks of 7 rows
    for a, b in zip(Li._robust_line_differences(d, m, u, slopes=True), whole, strict=True):
        np.testing.assert_array_equal(a, b)
