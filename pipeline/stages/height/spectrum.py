"""Spectral helpers of the noise estimate: gap filling, plane removal, windows, peak bins."""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

#: The noise residual keeps spatial frequencies beyond this band (fractions of the Nyquist
#: radius), with a raised-cosine taper between its edges so that the filter kernel is compact;
#: below it the topography dominates (common practice: white noise is flat in the spectrum,
#: surfaces are red).
_HIGH_PASS_BAND = (0.35, 0.65)


#: Peak bins are widened by this many bins each way: the Hann window's main lobe and first
#: side lobe (−31 dB) of a strong peak or step streak would otherwise stay in the residual.
_PEAK_MARGIN_BINS = 2


#: Above this fraction of rows with gap pixels, a gap-filling step transforms the whole frame
#: (measured at 512²: a whole-frame step costs 1.9 ms, a gathered one 1.2 ms with 10 % of the
#: rows, 1.8 ms with 60 %, 2.0 ms with 80 %; a frame's current map with gaps in 511 rows 3.0 ms).
_WHOLE_FRAME_ROWS = 0.7


def _fill_invalid(values: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Copy of ``values`` with the pixels outside ``ok`` linearly interpolated in raster order."""
    out = np.array(values, dtype=np.float64)
    if ok.all():
        return out
    flat, okf = out.ravel(), ok.ravel()
    good = np.flatnonzero(okf)
    bad = np.flatnonzero(~okf)
    flat[bad] = np.interp(bad, good, flat[good])
    return out


def _remove_plane(values: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """``values`` minus its least-squares plane through the ``ok`` pixels (normal equations).

    The plane is ``c0 + c1 u + c2 v`` with ``u = (i - nx/2)/nx`` along a row and
    ``v = (k - ny/2)/ny`` down a column; the nine sums of the normal equations are taken
    over rows and columns of the masked map (u depends only on the column, v on the row).
    """
    ny, nx = values.shape
    u = (np.arange(nx) - nx / 2) / nx
    v = (np.arange(ny) - ny / 2) / ny
    if ok.all():
        zm = values
        col_n, row_n = np.full(nx, float(ny)), np.full(ny, float(nx))
        suv = float(v.sum()) * float(u.sum())
    else:
        okf = ok.astype(np.float64)
        zm = np.where(ok, values, 0.0)
        col_n, row_n = okf.sum(axis=0), okf.sum(axis=1)
        suv = float(v @ (okf @ u))
    col_z, row_z = zm.sum(axis=0), zm.sum(axis=1)
    n = float(col_n.sum())
    su, sv = float(col_n @ u), float(row_n @ v)
    suu, svv = float(col_n @ (u * u)), float(row_n @ (v * v))
    gram = np.array([[n, su, sv], [su, suu, suv], [sv, suv, svv]])
    rhs = np.array([float(col_z.sum()), float(col_z @ u), float(row_z @ v)])
    coef = np.linalg.lstsq(gram, rhs, rcond=None)[0]
    return values - ((coef[0] + coef[1] * u)[None, :] + (coef[2] * v)[:, None])


def _hann(n: int) -> np.ndarray:
    """Hann window without its zero end points (every pixel keeps some weight)."""
    return np.hanning(n + 2)[1:-1]


@functools.lru_cache(maxsize=8)
def _spectral_grid(ny: int, nx: int) -> _Grid:
    """Window, high-pass gain and bin multiplicity of one frame shape (computed once)."""
    ky = sfft.fftfreq(ny)[:, None]
    kx = sfft.rfftfreq(nx)[None, :]
    rho = np.hypot(ky, kx) / 0.5
    lo, hi = _HIGH_PASS_BAND
    t = np.clip((rho - lo) / (hi - lo), 0.0, 1.0)
    gain = 0.5 - 0.5 * np.cos(np.pi * t)
    mult = np.full(nx // 2 + 1, 2.0)
    mult[0] = 1.0
    if nx % 2 == 0:
        mult[-1] = 1.0
    mult2 = np.broadcast_to(mult[None, :], gain.shape)
    w = _hann(ny)[:, None] * _hann(nx)[None, :]
    grid = _Grid(window=w, window2=w**2, gain=gain, mult=mult2, band=gain > 0.5,
                 kept0=float((mult2 * gain**2).sum()) / (ny * nx))
    for arr in (grid.window, grid.window2, grid.gain, grid.band):
        arr.setflags(write=False)
    return grid


@dataclass(frozen=True)
class _Grid:
    window: np.ndarray  # 2-D Hann window
    window2: np.ndarray  # its square
    gain: np.ndarray  # raised-cosine high-pass gain on the rfft2 grid
    mult: np.ndarray  # multiplicity of each rfft2 bin in the full spectrum (1 or 2)
    band: np.ndarray  # bins with gain > 0.5
    kept0: float  # fraction of white-noise energy the plain high-pass keeps


class _FFT2:
    """Real 2-D FFT of one frame shape into preallocated buffers.

    The same transforms (and numbers) as ``rfft2``/``irfft2``: the two 1-D passes those
    functions make, with the intermediate in one buffer instead of a fresh frame-sized array
    per call.
    """

    def __init__(self, shape: tuple[int, int]) -> None:
        self.nx = shape[1]
        self.tmp = np.empty((shape[0], shape[1] // 2 + 1), dtype=np.complex128)

    def forward(self, x: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        out = np.empty_like(self.tmp) if out is None else out
        return np.fft.rfft2(x, out=out)

    def inverse(self, spec: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``irfft2(spec)``; ``spec`` is left unchanged."""
        np.fft.ifft(spec, axis=0, out=self.tmp)
        return np.fft.irfft(self.tmp, n=self.nx, axis=1, out=out)


class _GapFill:
    """One Landweber step ``x[gap] -= (G² x)[gap]`` at a time, ``x`` a map with gaps.

    ``rfft2`` is a transform of every row, then of every column; ``irfft2`` the reverse. Only
    the rows holding gap pixels change between steps, and only those rows of ``G² x`` are
    needed, so the row transforms of the other rows are kept from the first step and only the
    gap rows are transformed again (identical numbers: each row is transformed on its own).
    When more than :data:`_WHOLE_FRAME_ROWS` of the rows hold gaps, whole-frame transforms into
    fixed buffers are cheaper than gathering and scattering those rows (and give the same
    numbers, the unchanged rows' transforms being recomputed exactly).
    """

    def __init__(self, x: np.ndarray, gap: np.ndarray, fft: _FFT2) -> None:
        self.x, self.fft = x, fft
        self.rows = np.flatnonzero(gap.any(axis=1))
        self.whole_frame = self.rows.size > _WHOLE_FRAME_ROWS * x.shape[0]
        if self.whole_frame:  # plain whole-frame transforms into fixed buffers
            self.flat_gap = np.flatnonzero(gap)
            self.corr = np.empty_like(x)
        else:
            self.idx = np.nonzero(gap[self.rows])  # gap pixels in the (gap rows, x) block
        self.row_spec = np.fft.rfft(x, axis=1)

    def step(self, spec: np.ndarray, filtered: np.ndarray) -> None:
        """Update ``x`` from ``filtered = G² rfft2(x)``; ``spec`` becomes ``rfft2`` of the
        new ``x``. ``filtered`` is overwritten."""
        x, rows, nx = self.x, self.rows, self.fft.nx
        cols = np.fft.ifft(filtered, axis=0, out=filtered)
        if self.whole_frame:
            corr = np.fft.irfft(cols, n=nx, axis=1, out=self.corr)
            flat = x.reshape(-1)
            flat[self.flat_gap] -= corr.reshape(-1)[self.flat_gap]
            np.fft.rfft(x, axis=1, out=self.row_spec)
        else:
            corr = np.fft.irfft(cols[rows], n=nx, axis=1)
            block = x[rows]
            block[self.idx] -= corr[self.idx]
            x[rows] = block
            self.row_spec[rows] = np.fft.rfft(block, axis=1)
        np.fft.fft(self.row_spec, axis=0, out=spec)


def _grow(mask: np.ndarray, radius: int, axis: int, *, wrap: bool = False) -> np.ndarray:
    """Running maximum of a boolean map over ``2 radius + 1`` pixels along ``axis``.

    Outside the map counts as False, or, with ``wrap``, the map repeats periodically (the
    boundary modes ``constant``/``wrap`` of ``ndimage.maximum_filter1d``), as ORs of shifted
    slices.
    """
    out = mask.copy()
    n = mask.shape[axis]

    def sl(start: int | None, stop: int | None) -> tuple[slice, ...]:
        return (slice(None),) * axis + (slice(start, stop),)

    for s in range(1, min(radius, n - 1) + 1):
        out[sl(s, None)] |= mask[sl(None, -s)]
        out[sl(None, -s)] |= mask[sl(s, None)]
        if wrap:
            out[sl(None, s)] |= mask[sl(n - s, None)]
            out[sl(n - s, None)] |= mask[sl(None, s)]
    return out


def _dilate(mask: np.ndarray, radius: int) -> np.ndarray:
    """Binary dilation by a square of half-width ``radius`` (outside the frame counts as False).

    The square is separable: a running maximum along each axis (the same as
    ``ndimage.binary_dilation`` with a full square structure).
    """
    if not mask.any():
        return mask.copy()
    return _grow(_grow(mask.astype(bool, copy=False), radius, 0), radius, 1)


def _peak_bins(power: np.ndarray, threshold: float) -> np.ndarray:
    """Bins at or above ``threshold``, widened by ``_PEAK_MARGIN_BINS`` each way (periodic).

    The same as ``ndimage.maximum_filter(power >= threshold, size=2 m + 1, mode="wrap")``.
    """
    hot = power >= threshold
    r = _PEAK_MARGIN_BINS
    if min(hot.shape) <= 2 * r + 1:
        return ndimage.maximum_filter(hot.astype(np.uint8), size=2 * r + 1,
                                      mode="wrap").astype(bool)
    if not hot.any():
        return hot
    return _grow(_grow(hot, r, 0, wrap=True), r, 1, wrap=True)
