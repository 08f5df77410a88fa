"""Local sums of the moving image under the template window, for the template match (private).

The normalised template match (:func:`pipeline.stages.registration_passes.register_template`)
needs, at every trial shift ``τ``, four correlations of the moving image ``B'`` with the template
window ``w``: ``Σ w·B'²``, ``Σ w·B'``, ``Σ w·y·B'`` and ``Σ w·x·B'`` (its local energy, mean and
slope), on the whole-pixel lags of the search range and on small sub-pixel blocks. Two ways to
the same numbers:

- the window is separable, ``w = u ⊗ v`` (as are ``w·y = (u·y) ⊗ v`` and ``w·x = u ⊗ (v·x)``),
  so each correlation is ``Uᵀ·F·V``: two thin matrix products with the shifted 1-D factors (on
  whole-pixel lags, circulant columns of the factors; off the grid, the factors' trigonometric
  interpolants, from their 1-D spectra). No 2-D transform at all;
- when pixels are masked the template is no longer separable: four spectra and four inverse
  transforms of the cross-power, evaluated like the numerator.

Both evaluate the circular correlation defined by the discrete Fourier transform, so they agree
to rounding (tests/stages/test_registration.py checks it).
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from pipeline.stages.registration_core import (
    Weights,
    dft_block,
    flat_window,
    frequencies,
    int_frequencies,
    irfft2_at,
    lag_kernel,
    template_window,
)


@dataclass(frozen=True, eq=False)
class TemplateData:
    """Cached per crop shape, margin and window kind (never per image content)."""

    key: tuple[tuple[int, int], int, str]  # (shape, margin, kind)
    weights: Weights  # the template window, inside a border of 2·margin
    flat: Weights  # the moving image's flat-topped taper, border margin
    lags: np.ndarray  # whole-pixel trial shifts −margin … margin
    sums: tuple[float, float, float, float]  # Σw, Σw², Σw·y², Σw·x² (weighted centre)
    inverse_weight: np.ndarray  # 1/w where w > 0, else 1
    inner: tuple[slice, slice]  # rows and columns the template can reach (border margin)
    row_lags: np.ndarray  # (2, inner rows, L): columns u(i − τ), (u·y)(i − τ); y from centre
    col_lags: np.ndarray  # (2, inner columns, L): columns v(j − τ), (v·x)(j − τ)
    row_spectra: np.ndarray  # (2, ny): fft of u, u·y
    col_spectra: np.ndarray  # (2, nx//2 + 1): rfft of v, v·x

    @property
    def shape(self) -> tuple[int, int]:
        return self.key[0]


def _centred(weight: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates from the weighted centre of a 2-D weight map (rows, columns)."""
    ny, nx = weight.shape
    sw = float(weight.sum())
    yc = float(weight.sum(axis=1) @ np.arange(ny)) / sw
    xc = float(weight.sum(axis=0) @ np.arange(nx)) / sw
    return np.arange(ny) - yc, np.arange(nx) - xc


def _sums(weight: np.ndarray) -> tuple[float, float, float, float]:
    yy, xx = _centred(weight)
    return (float(weight.sum()), float(np.sum(weight * weight)),
            float(weight.sum(axis=1) @ yy**2), float(weight.sum(axis=0) @ xx**2))


@functools.lru_cache(maxsize=16)
def template_data(shape: tuple[int, int], margin: int, kind: str) -> TemplateData:
    """Windows, lags and the separable kernels of a template match on ``shape`` crops."""
    weights = template_window(shape, 2 * margin, kind)
    w = weights.w
    yy, xx = _centred(w)
    rows = (weights.u, weights.u * yy)
    cols = (weights.v, weights.v * xx)
    lags = np.arange(-margin, margin + 1)
    ny, nx = shape
    # the template (zero in a border of 2·margin) shifted by at most margin stays inside
    # the border of margin: outside it the shifted factors are zero, and so are those rows
    ri = (np.arange(margin, ny - margin)[:, None] - lags[None, :]) % ny
    ci = (np.arange(margin, nx - margin)[:, None] - lags[None, :]) % nx
    data = TemplateData(
        key=(shape, margin, kind), weights=weights, flat=flat_window(shape, margin), lags=lags,
        sums=_sums(w), inverse_weight=1.0 / np.where(w > 0, w, 1.0),
        inner=(slice(margin, ny - margin), slice(margin, nx - margin)),
        row_lags=np.stack([r[ri] for r in rows]), col_lags=np.stack([c[ci] for c in cols]),
        row_spectra=np.stack([sfft.fft(r) for r in rows]),
        col_spectra=np.stack([sfft.rfft(c) for c in cols]))
    for arr in (lags, data.inverse_weight, data.row_lags, data.col_lags, data.row_spectra,
                data.col_spectra):
        arr.setflags(write=False)
    return data


@dataclass(frozen=True)
class Channels:
    """The four local sums ``(Σw·B'², Σw·B', Σw·y·B', Σw·x·B')`` of one template match."""

    sums: tuple[float, float, float, float]
    inverse_weight: np.ndarray
    grid: Callable[[], tuple[np.ndarray, ...]]  # on the whole-pixel lags (L × L each)
    block: Callable[[np.ndarray, np.ndarray, int | None], tuple[np.ndarray, ...]]  # ty × tx


def _row_kernels_at(tpl: TemplateData, phase: np.ndarray) -> np.ndarray:
    """Real parts of the row kernels ``(1/n) Σ_k conj(P(k)) exp(2πi k (t − i)/n)``: (2, m, n).

    ``phase[s, k] = exp(2πi t_s k/n)``. The imaginary part is only the Nyquist term of an
    even length, ``−(P(n/2)/n)·sin(πt)·(−1)^i``, a rank-one term handled in :func:`_separable`.
    """
    n = tpl.shape[0]
    return sfft.fft(np.conj(tpl.row_spectra)[:, None, :] * (phase[None] / n), axis=-1).real


def _col_kernels_at(tpl: TemplateData, phase: np.ndarray) -> np.ndarray:
    """Column kernels of the half spectra with their Hermitian weights, complex: (2, m, n)."""
    n = tpl.shape[1]
    wk = frequencies((1, n))[2]
    return sfft.fft(np.conj(tpl.col_spectra)[:, None, :] * (wk * phase / n)[None], n=n, axis=-1)


@functools.lru_cache(maxsize=32)
def _kernel_tables(key: tuple[tuple[int, int], int, str], q: int) -> tuple[np.ndarray, ...]:
    """Row and column kernels at the ``q`` sub-pixel offsets ``j/q``, each stored twice over.

    A whole-pixel lag rolls a kernel, so the table of the ``q`` offsets serves every lag on the
    ``1/q`` grid; the doubled copy turns each roll into a slice.
    """
    tpl = template_data(*key)
    (ny, nx), offsets = tpl.shape, np.arange(q) / q
    ky = int_frequencies((ny, 2))[0]
    kx = int_frequencies((1, nx))[1]
    out = (_row_kernels_at(tpl, lag_kernel(offsets, ky, ny, q)),
           _col_kernels_at(tpl, lag_kernel(offsets, kx, nx, q)))
    out = tuple(np.concatenate([a, a], axis=-1) for a in out)
    for arr in out:
        arr.setflags(write=False)
    return out


def _kernels(tpl: TemplateData, t: np.ndarray, axis: int, q: int | None) -> np.ndarray:
    """Row (``axis`` 0) or column (1) kernels at the lags ``t``: (2, len(t), n)."""
    n = tpl.shape[axis]
    if q is None:
        k = int_frequencies((n, n))[axis]
        phase = lag_kernel(t, k, n, None)
        return _row_kernels_at(tpl, phase) if axis == 0 else _col_kernels_at(tpl, phase)
    whole, frac = np.divmod(np.rint(np.asarray(t, dtype=float) * q).astype(np.int64), q)
    table = _kernel_tables(tpl.key, q)[axis]
    starts = (-whole % n).tolist()
    return np.stack([table[:, f, s:s + n] for f, s in zip(frac.tolist(), starts, strict=True)],
                    axis=1)


def template_channels(tpl: TemplateData, weight: np.ndarray, fb: np.ndarray,
                      spec_b: np.ndarray, workers: int | None) -> Channels:
    """The local sums of the prepared moving image ``fb`` (half spectrum ``spec_b``).

    ``weight`` is ``tpl.weights.w`` itself for an unmasked reference (the separable route),
    else the masked template (the spectral route).
    """
    if weight is tpl.weights.w:
        return _separable(tpl, fb)
    return _spectral(tpl, weight, fb, spec_b, workers)


def _separable(tpl: TemplateData, fb: np.ndarray) -> Channels:
    b2 = fb * fb
    nl = tpl.lags.size
    ny = tpl.shape[0]

    def grid() -> tuple[np.ndarray, ...]:
        f, f2 = fb[tpl.inner], b2[tpl.inner]
        bv = f @ np.concatenate([tpl.col_lags[0], tpl.col_lags[1]], axis=1)  # (rows, 2L)
        b2v = f2 @ tpl.col_lags[0]
        u, uy = tpl.row_lags
        s1 = u.T @ bv[:, :nl]
        return u.T @ b2v, s1, uy.T @ bv[:, :nl], u.T @ bv[:, nl:]

    def block(ty: np.ndarray, tx: np.ndarray, q: int | None = None) -> tuple[np.ndarray, ...]:
        m = tx.size
        a_u, a_uy = _kernels(tpl, ty, 0, q)  # (m, ny) each, real parts
        beta = _kernels(tpl, tx, 1, q)  # v, v·x at tx: (2, m, nx) complex
        x1 = fb @ beta.real.reshape(2 * m, -1).T  # (ny, 2m): [v | v·x]
        x2 = b2 @ beta[0].real.T  # (ny, m)
        s2, s1 = a_u @ x2, a_u @ x1[:, :m]
        sy, sx = a_uy @ x1[:, :m], a_u @ x1[:, m:]
        if ny % 2 == 0:  # Re(α·F·βᵀ) also has −Im α·F·Im βᵀ; Im α is rank one (Nyquist row)
            alt = np.where(np.arange(ny) % 2 == 0, 1.0, -1.0)
            c_u, c_uy = -np.outer(tpl.row_spectra[:, ny // 2].real / ny, np.sin(np.pi * ty))
            r1 = (alt @ fb) @ beta.imag.reshape(2 * m, -1).T  # (2m,): [v | v·x]
            r2 = (alt @ b2) @ beta[0].imag.T
            s2 = s2 - np.outer(c_u, r2)
            s1 = s1 - np.outer(c_u, r1[:m])
            sy = sy - np.outer(c_uy, r1[:m])
            sx = sx - np.outer(c_u, r1[m:])
        return s2, s1, sy, sx

    return Channels(tpl.sums, tpl.inverse_weight, grid, block)


def _spectral(tpl: TemplateData, weight: np.ndarray, fb: np.ndarray, spec_b: np.ndarray,
              workers: int | None) -> Channels:
    shape = tpl.shape
    ny, nx = shape
    yy, xx = _centred(weight)
    stack = np.empty((4, *spec_b.shape), dtype=complex)
    np.multiply(np.conj(sfft.rfft2(weight, workers=workers)),
                sfft.rfft2(fb * fb, workers=workers), out=stack[0])
    for row, g in ((1, weight), (2, weight * yy[:, None]), (3, weight * xx[None, :])):
        np.multiply(np.conj(sfft.rfft2(g, workers=workers)), spec_b, out=stack[row])

    def grid() -> tuple[np.ndarray, ...]:
        return tuple(irfft2_at(stack, shape, tpl.lags % ny, tpl.lags % nx, workers))

    def block(ty: np.ndarray, tx: np.ndarray, q: int | None = None) -> tuple[np.ndarray, ...]:
        return tuple(dft_block(stack, shape, ty, tx, q))

    return Channels(_sums(weight), 1.0 / np.where(weight > 0, weight, 1.0), grid, block)
