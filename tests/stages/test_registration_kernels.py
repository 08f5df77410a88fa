"""Building blocks of the registration: each fast route against a direct or reference computation.

The separable local sums of the template match, the tabulated DFT kernels and the pruned inverse
transform all evaluate the same DFT-defined circular correlation as the plain formulas (an
identity, so agreement to rounding); numpy.fft and numpy.linalg.lstsq are the outside references.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft as sfft
from scipy import ndimage as ndi

from pipeline.stages import registration_core as core
from pipeline.stages import registration_passes as passes
from pipeline.stages import registration_template as tmpl
from pipeline.stages.registration import register_images


def smooth(seed: int, shape: tuple[int, int], corr_px: float = 4.0) -> np.ndarray:
    f = ndi.gaussian_filter(np.random.default_rng(seed).normal(size=shape), corr_px, mode="wrap")
    return f / f.std()


def close(a: np.ndarray, b: np.ndarray, rtol: float = 1e-10) -> bool:
    """Agreement relative to the largest magnitude (rounding of sums over ~1e5 terms)."""
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b)))) <= rtol * float(np.max(np.abs(b)))


@pytest.mark.parametrize(("shape", "margin"), [((243, 250), 15), ((240, 250), 15),
                                               ((97, 130), 6), ((64, 64), 4)])
def test_separable_local_sums_equal_the_spectral_route(shape, margin):
    # odd and even row counts: an even one has a Nyquist row, handled as a rank-one term (white
    # noise gives that row weight, so that leaving the term out fails this test)
    tpl = tmpl.template_data(shape, margin, "hann")
    image = smooth(1, shape) + 0.3 + np.random.default_rng(9).normal(0, 0.5, shape)
    fb, _, _ = core.prepare(image, None, tpl.flat, "moving")
    spec_b = sfft.rfft2(fb)
    fast = tmpl.template_channels(tpl, tpl.weights.w, fb, spec_b, None)
    # an equal but distinct weight map takes the general route (spectra + inverse transforms)
    slow = tmpl.template_channels(tpl, tpl.weights.w.copy(), fb, spec_b, None)
    assert np.allclose(fast.sums, slow.sums, rtol=1e-12)  # identity
    for a, b in zip(fast.grid(), slow.grid(), strict=True):
        assert close(a, b)  # identity: whole-pixel lags
    for q, ty, tx in [(None, np.array([-0.3, 0.41, 2.7]), np.array([1.15, -3.9])),
                      (4, 1.0 + np.arange(-3, 4) * 0.25, -2.0 + np.arange(-3, 4) * 0.25),
                      (20, -0.35 + np.arange(-4, 5) * 0.05, 0.6 + np.arange(-4, 5) * 0.05)]:
        for a, b in zip(fast.block(ty, tx, q), slow.block(ty, tx, None), strict=True):
            assert close(a, b)  # identity: sub-pixel lags, tabulated or direct kernels


@pytest.mark.parametrize("shape", [(97, 130), (64, 64), (243, 250)])
def test_dft_block_against_numpy_inverse_fft(shape):
    spec = np.fft.rfft2(smooth(2, shape))
    ny, nx = shape
    # reference: numpy.fft.irfft2 at whole-pixel lags (incl. wrapped negative ones)
    ty, tx = np.array([0.0, 3.0, -5.0]), np.array([-1.0, 0.0, 7.0, -12.0])
    ref = np.fft.irfft2(spec, s=shape)[np.ix_(ty.astype(int) % ny, tx.astype(int) % nx)]
    for q in (None, 1, 4, 20):
        assert close(core.dft_block(spec, shape, ty, tx, q), ref, 1e-12)
    # off the grid: tabulated kernels equal the directly computed ones
    ty, tx = 2.35 + np.arange(-4, 5) / 20, -7.1 + np.arange(-4, 5) / 20
    assert close(core.dft_block(spec, shape, ty, tx, 20), core.dft_block(spec, shape, ty, tx),
                 1e-12)


def test_irfft2_at_against_numpy():
    shape = (243, 250)
    spec = np.stack([np.fft.rfft2(smooth(s, shape)) for s in (3, 4)])
    rows, cols = np.arange(-15, 16) % shape[0], np.arange(-15, 16) % shape[1]
    ref = np.fft.irfft2(spec, s=shape)[:, rows][:, :, cols]  # numpy.fft reference
    assert close(core.irfft2_at(spec, shape, rows, cols, None), ref, 1e-12)


@pytest.mark.parametrize("mask", [None, "holes"])
def test_weighted_plane_removal_against_lstsq(mask):
    shape = (40, 56)
    rng = np.random.default_rng(5)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    image = 0.3 + 0.02 * yy - 0.05 * xx + rng.normal(0, 0.1, shape)
    weights = core.window(shape, "hann")
    m = None if mask is None else rng.random(shape) > 0.2
    out, weight, frac = core.prepare(image, m, weights, "reference")
    w = weights.w if m is None else np.where(m, weights.w, 0.0)
    assert (weight is weights.w) == (m is None)  # the cached window itself when unmasked
    # reference: numpy.linalg.lstsq of the plane with sqrt(w) row weights
    design = np.column_stack([np.ones(image.size), yy.ravel(), xx.ravel()])
    sw = np.sqrt(w.ravel())
    coef, *_ = np.linalg.lstsq(design * sw[:, None], image.ravel() * sw, rcond=None)
    expected = (image - (design @ coef).reshape(shape)) * w
    assert close(out, expected, 1e-12)
    assert frac == pytest.approx(1.0 if m is None else m.mean())


def test_parabolic_start_reaches_the_same_grid_maximum():
    # a smooth peak sampled by its own formula: the 1/u-grid maximum and the final parabola do
    # not depend on whether a 0.25 px block or the whole-pixel parabola found the start
    def f(ty, tx, q=None):
        return np.exp(-((ty[:, None] - 0.37) ** 2 / 3.0 + (tx[None, :] + 0.62) ** 2 / 5.0
                        + 0.2 * (ty[:, None] - 0.37) * (tx[None, :] + 0.62)))

    whole = f(np.arange(-2.0, 3.0), np.arange(-3.0, 2.0))
    jy, jx = np.unravel_index(int(np.argmax(whole)), whole.shape)
    sy, sx = float(jy - 2), float(jx - 3)
    dy, dx = core.parabolic_peak(whole, int(jy), int(jx), wrap=False)
    two_stage = core.upsample_peak(f, sy, sx, 20)
    started = core.upsample_peak(f, sy, sx, 20, start=(sy + dy, sx + dx))
    assert started[0] == pytest.approx(two_stage[0], abs=1e-12)
    assert started[1] == pytest.approx(two_stage[1], abs=1e-12)
    assert started[3] == pytest.approx(two_stage[3], abs=1e-12)
    # and it is the peak, to half the 1/20 px grid step (the per-axis parabolas ignore the
    # cross term; common practice)
    assert started[0] == pytest.approx(0.37, abs=0.025)
    assert started[1] == pytest.approx(-0.62, abs=0.025)


def test_peak_value_of_a_separable_quadratic_is_exact():
    # A separable quadratic peak (value 0.9 at (0.61, -0.37)): the two per-axis parabola
    # vertices are exact, whatever the 1/4 px grid misses (exact quadratic: common practice).
    # From a start 0.6 px off too; a ridge still rising after four moves has no maximum
    # nearby and gives NaN.
    def f(ty, tx, q=None):
        return 0.9 - (ty[:, None] - 0.61) ** 2 - 0.5 * (tx[None, :] + 0.37) ** 2

    assert core.peak_value(f, 0.0, 0.0, 4) == pytest.approx(0.9, abs=1e-12)
    assert core.peak_value(f, 0.6, -0.4, 4) == pytest.approx(0.9, abs=1e-12)

    def ridge(ty, tx, q=None):
        return ty[:, None] + 0.0 * tx[None, :]

    assert np.isnan(core.peak_value(ridge, 0.0, 0.0, 4))


def test_results_do_not_depend_on_what_was_registered_before():
    a, b = smooth(7, (200, 180)), np.roll(smooth(7, (200, 180)), (3, -5), axis=(0, 1))
    c, d = smooth(8, (128, 160)), np.roll(smooth(8, (128, 160)), (-2, 4), axis=(0, 1))
    first = register_images(a, b)
    register_images(c, d)
    register_images(a, b, refine=False)
    again = register_images(a, b)
    for fn in (tmpl.template_data, tmpl._kernel_tables, core.window, core.template_window,
               core.flat_window, core.frequencies, core._phase_table, passes._fast_length_below):
        fn.cache_clear()
    fresh = register_images(a, b)
    assert first == again == fresh  # caches are keyed on shapes and options only
    assert first.shift_px == pytest.approx((3.0, -5.0), abs=0.02)  # the roll applied above


def test_peak_search_climbs_to_a_peak_far_from_its_start():
    # an exact quadratic peak 1.2 px from the start: each 1/20 px block spans ±0.2 px, so the
    # search must recentre six times; with three it stopped on the block's edge and returned no
    # curvature (an infinite uncertainty for a good match). Exact quadratic: common practice
    def f(ty, tx, q=None):
        return -((ty[:, None] - 1.53) ** 2 + 0.5 * (tx[None, :] + 0.88) ** 2)

    sy, sx, hessian, peak = core.upsample_peak(f, 0.0, 0.0, 20, start=(0.33, 0.02))
    assert hessian is not None
    # the value at the 1/20 px grid maximum (1.55, -0.90), before the parabola
    assert peak == pytest.approx(-(0.02**2 + 0.5 * 0.02**2), abs=1e-12)
    assert (sy, sx) == (pytest.approx(1.53, abs=1e-9), pytest.approx(-0.88, abs=1e-9))
    assert np.allclose(hessian, [[2.0, 0.0], [0.0, 1.0]], atol=1e-9)  # minus the Hessian
