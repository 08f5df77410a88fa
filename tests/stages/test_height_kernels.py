"""The fast numerical kernels of height reconstruction against their reference definitions.

Each kernel replaces a plainer numpy/scipy call (for speed); these tests pin it to that call
(numpy, scipy.fft, scipy.ndimage, numpy.linalg are the references) or to its formula.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import fft as sfft
from scipy import ndimage

from pipeline.model import Flag
from pipeline.stages.height import conversion as Cv
from pipeline.stages.height import noise as No
from pipeline.stages.height import reconstruct as Re
from pipeline.stages.height import spectrum as Sp
from pipeline.stages.height import traces as Tr


@pytest.mark.parametrize("shape", [(64, 48), (7, 7), (6, 4), (13, 5)])
def test_dilation_and_peak_widening_equal_ndimage(shape: tuple[int, int]) -> None:
    rng = np.random.default_rng(12)
    for p in (0.003, 0.05, 0.4):
        m = rng.random(shape) < p
        for r in (1, 3):  # scipy.ndimage.binary_dilation with a square is the reference
            square = np.ones((2 * r + 1,) * 2, bool)
            np.testing.assert_array_equal(Sp._dilate(m, r),
                                          ndimage.binary_dilation(m, structure=square))
        power = rng.random(shape)
        ref = ndimage.maximum_filter((power >= 1 - p).astype(np.uint8),
                                     size=2 * Sp._PEAK_MARGIN_BINS + 1, mode="wrap") != 0
        np.testing.assert_array_equal(Sp._peak_bins(power, 1 - p), ref)


def test_level_groups_are_the_stable_quantile_bins() -> None:
    rng = np.random.default_rng(13)
    for key in (rng.random(5000), rng.integers(0, 7, size=5000).astype(float),
                np.repeat(rng.random(40), 125)):
        for n_bins in (2, 5, 16):
            ref = np.array_split(np.argsort(key, kind="stable"), n_bins)  # numpy reference
            got = No._level_groups(key, n_bins)
            assert all(np.array_equal(np.sort(a), np.sort(b))
                       for a, b in zip(got, ref, strict=True))


def test_buffered_fft_equals_scipy_fft() -> None:
    rng = np.random.default_rng(14)
    x = rng.normal(size=(48, 40))
    fft = Sp._FFT2(x.shape)
    spec = fft.forward(x)
    np.testing.assert_allclose(spec, sfft.rfft2(x), rtol=1e-13, atol=1e-12)  # scipy.fft
    np.testing.assert_allclose(fft.inverse(spec), sfft.irfft2(spec, s=x.shape), rtol=1e-13,
                               atol=1e-13)


@pytest.mark.parametrize("rows", ["few", "most", "all"])
def test_gap_fill_steps_equal_plain_landweber(rows: str) -> None:
    rng = np.random.default_rng(15)
    ny, nx = 40, 36
    x = rng.normal(size=(ny, nx))
    gap = np.zeros((ny, nx), bool)
    if rows == "few":
        gap[[3, 17, 18], 5:9] = True
    else:  # "most": 36 of 40 rows, the whole-frame path with some rows free of gaps
        with_gaps = np.arange(ny) if rows == "all" else np.arange(4, ny)
        gap[with_gaps, rng.integers(0, nx, size=with_gaps.size)] = True
    g2 = rng.random((ny, nx // 2 + 1))
    ref = x.copy()
    for _ in range(4):  # x[gap] -= (G² x)[gap], G² applied with scipy.fft (the reference)
        ref[gap] -= sfft.irfft2(sfft.rfft2(ref) * g2, s=(ny, nx))[gap]
    fft = Sp._FFT2((ny, nx))
    got = x.copy()
    fill = Sp._GapFill(got, gap, fft)
    spec = fft.forward(got)
    for _ in range(4):
        fill.step(spec, spec * g2)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(spec, sfft.rfft2(got), rtol=0, atol=1e-11)


def test_gap_fill_whole_frame_and_gathered_rows_agree_exactly(monkeypatch) -> None:
    # the choice between the two paths is a matter of speed only: the same bits either way
    rng = np.random.default_rng(18)
    ny, nx = 40, 36
    x = rng.normal(size=(ny, nx))
    gap = np.zeros((ny, nx), bool)
    gap[np.arange(0, ny, 2), rng.integers(0, nx, size=ny // 2)] = True
    g2 = rng.random((ny, nx // 2 + 1))
    results = []
    for threshold in (0.0, 1.0):  # every gap pattern whole-frame / always gathered
        monkeypatch.setattr(Sp, "_WHOLE_FRAME_ROWS", threshold)
        got = x.copy()
        fft = Sp._FFT2((ny, nx))
        fill = Sp._GapFill(got, gap, fft)
        assert fill.whole_frame == (threshold == 0.0)
        spec = fft.forward(got)
        for _ in range(3):
            fill.step(spec, spec * g2)
        results.append((got, spec))
    np.testing.assert_array_equal(results[0][0], results[1][0])
    np.testing.assert_array_equal(results[0][1], results[1][1])


def test_take_columns_equals_fancy_indexing() -> None:
    rng = np.random.default_rng(16)
    for nx in (4, 5, 64):
        a = rng.normal(size=(3, nx))
        for shift in (-3.7, -1.2, -0.003, 0.0, 0.4, 2.5):
            for idx in Tr._bracket(nx, shift):
                np.testing.assert_array_equal(Tr._take_columns(a, idx), a[:, idx])


def test_remove_plane_equals_lstsq() -> None:
    rng = np.random.default_rng(17)
    ny, nx = 30, 44
    yy, xx = np.mgrid[0:ny, 0:nx]
    u, v = (xx - nx / 2) / nx, (yy - ny / 2) / ny
    z = 2.0 + 3.0 * u - 1.5 * v + rng.normal(size=(ny, nx))
    for ok in (np.ones((ny, nx), bool), rng.random((ny, nx)) > 0.3):
        design = np.column_stack([np.ones(ok.sum()), u[ok], v[ok]])
        coef = np.linalg.lstsq(design, z[ok], rcond=None)[0]  # numpy.linalg.lstsq reference
        ref = z - (coef[0] + coef[1] * u + coef[2] * v)
        np.testing.assert_allclose(Sp._remove_plane(z, ok), ref, rtol=0, atol=1e-12)


def test_combined_traces_follow_the_documented_rule() -> None:
    # every pixel in both traces: mean where they agree within mismatch_sigma combined σ,
    # forward trace (flagged) where not; σ of the mean = hypot(σf, σb)/2 (common practice)
    rng = np.random.default_rng(18)
    shape = (20, 24)
    hf, hb = rng.normal(size=shape), rng.normal(size=shape)
    sf, sb = rng.uniform(0.5, 1.0, shape), rng.uniform(0.5, 1.0, shape)
    pf, pb = rng.normal(size=shape), rng.normal(size=shape)
    zero = np.zeros(shape, np.uint8)
    fw, bw = Cv._Trace(hf, sf, pf, zero), Cv._Trace(hb, sb, pb, zero)
    got, n_mism = Re._combine(fw, bw, lag_px=0.0, mismatch_sigma=1.5)
    sd = np.hypot(sf, sb)
    mism = np.abs(hf - hb) > 1.5 * sd
    assert 0 < n_mism == int(mism.sum()) < mism.size
    np.testing.assert_allclose(got.height, np.where(mism, hf, 0.5 * (hf + hb)), rtol=1e-15)
    np.testing.assert_allclose(got.phi_part, np.where(mism, pf, 0.5 * (pf + pb)), rtol=1e-15)
    np.testing.assert_allclose(got.sigma, np.where(mism, sf, 0.5 * sd), rtol=4.5e-16)
    np.testing.assert_array_equal(got.flags, np.where(mism, int(Flag.TRACE_MISMATCH), 0))
