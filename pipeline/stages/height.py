"""Height reconstruction: tunnelling current or feedback signal → height map, uncertainty, flags.

Constant-height frames are converted through the barrier-decay law, constant-current frames are
the piezo z plus the feedback-error correction from the residual current (DESIGN.md §6). Both
traces of a line are aligned by their measured lag and averaged where they agree. The white
noise of every channel is measured on the frame itself, so the reported uncertainty does not
depend on a number typed into a config file.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy import fft as sfft
from scipy import ndimage

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS, Flag, add_warning, make_height_frame, stage
from pipeline.stages.stats import median as _median

__all__ = [
    "NoiseEstimate",
    "estimate_trace_lag",
    "estimate_white_noise",
    "reconstruct_height",
]

#: The noise residual keeps spatial frequencies beyond this band (fractions of the Nyquist
#: radius), with a raised-cosine taper between its edges so that the filter kernel is compact;
#: below it the topography dominates (common practice: white noise is flat in the spectrum,
#: surfaces are red).
_HIGH_PASS_BAND = (0.35, 0.65)
#: Bins whose power exceeds this multiple of the expected noise power are signal peaks
#: (lattice, step streaks); an exponentially distributed noise bin exceeds it with
#: probability e^-10 ≈ 5e-5.
_PEAK_FACTOR = 10.0
#: Peak bins are widened by this many bins each way: the Hann window's main lobe and first
#: side lobe (−31 dB) of a strong peak or step streak would otherwise stay in the residual.
_PEAK_MARGIN_BINS = 2
#: Median of |F|²/E|F|² for a complex Gaussian Fourier coefficient (exponential law): ln 2.
_MEDIAN_EXP = math.log(2.0)
#: σ of a Gaussian = this factor × its median absolute value (1/Φ⁻¹(3/4)).
_MAD_TO_SIGMA = 1.482602218505602
#: Fewest pixels per level bin (σ² from a median of n values is good to about 2.6/√n).
_MIN_BIN_PIXELS = 256
#: Iterations that fill gaps smoothly before the transform (error shrinks ~2x per step).
_INPAINT_ITERATIONS = 6
#: Pixels closer than this to a gap are left out of the noise statistics.
_GAP_MARGIN_PX = 3
#: Pixels of the plain high-passed map beyond this many robust σ are local defects.
_DEFECT_SIGMA = 8.0
#: Above this fraction of defect pixels the map is not "noise plus a few defects": keep all.
_MAX_DEFECT_FRACTION = 0.1
#: Pixels where the 2-D window is below this value are left out of the noise statistics.
_MIN_WINDOW = 0.3
#: Quantile bins of the signal level for the heteroscedastic noise model.
_LEVEL_BINS = 16
#: Default noise floor in multiples of the additive current noise: below it the relative
#: current uncertainty exceeds 1/3 (common practice).
_NOISE_FLOOR_SIGMA = 3.0
#: A current at or above this fraction of ``current_limit_A`` is saturated.
_SATURATION_FRACTION = 0.999
#: Below this peak correlation coefficient the two traces are not compared for a lag.
_MIN_TRACE_CORRELATION = 0.3
#: Largest believable lag between the traces, as a fraction of the line length.
_MAX_LAG_FRACTION = 0.25


# --------------------------------------------------------------------------------------------
# noise
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class NoiseEstimate:
    """White-noise model of one 2-D channel: ``σ² = constant² + (relative·level)²``.

    Attributes
    ----------
    sigma : numpy.ndarray
        Per-pixel standard deviation of the noise, in the channel's units.
    constant : float
        Level-independent (additive) part, in the channel's units.
    relative : float
        Part proportional to the signal level (dimensionless; 0 without a level map).
    """

    sigma: np.ndarray
    constant: float
    relative: float


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
    """

    def __init__(self, x: np.ndarray, gap: np.ndarray, fft: _FFT2) -> None:
        self.x, self.fft = x, fft
        self.rows = np.flatnonzero(gap.any(axis=1))
        self.all_rows = self.rows.size == x.shape[0]
        if self.all_rows:  # plain whole-frame transforms into fixed buffers
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
        if self.all_rows:
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


def _robust_var(y: np.ndarray) -> float:
    return float((_MAD_TO_SIGMA * _median(np.abs(y))) ** 2)


def _level_groups(key: np.ndarray, n_bins: int) -> list[np.ndarray]:
    """Index sets of ``np.array_split(np.argsort(key, kind="stable"), n_bins)``.

    A quicksort order, with every run of equal keys that straddles a split put back in index
    order (which is what the stable sort does), gives the same sets several times faster.
    """
    order = np.argsort(key)
    srt = key[order]
    q, r = divmod(key.size, n_bins)
    bounds = np.cumsum([q + 1] * r + [q] * (n_bins - r))[:-1]
    done = -1  # end of the last run put in order (one run may straddle several splits)
    for b in bounds.tolist():
        if max(done, 0) < b < srt.size and srt[b - 1] == srt[b]:
            lo = int(np.searchsorted(srt, srt[b], side="left"))
            done = int(np.searchsorted(srt, srt[b], side="right"))
            order[lo:done] = np.sort(order[lo:done])
    return np.split(order, bounds)


def estimate_white_noise(
    values: np.ndarray,
    *,
    valid: np.ndarray | None = None,
    level: np.ndarray | None = None,
) -> NoiseEstimate:
    """Measure the white noise of a 2-D map from its high-frequency content.

    Parameters
    ----------
    values : numpy.ndarray
        The map (y, x); non-finite pixels are ignored.
    valid : numpy.ndarray of bool, optional
        Pixels to use (default: the finite ones).
    level : numpy.ndarray, optional
        Signal level on which the noise variance may depend, as ``a² + b²·level²`` (e.g. the
        current magnitude: an additive preamplifier floor plus a multiplicative part). Without
        it the noise is taken as the same at every pixel.

    Returns
    -------
    NoiseEstimate
        Per-pixel σ and the two model coefficients.

    Notes
    -----
    The map (invalid pixels interpolated, a least-squares plane removed, a Hann window ``w``
    applied) is Fourier transformed and high-pass filtered (raised-cosine taper from 0.35 to
    0.65 of the Nyquist radius). Spectral bins holding more than ten times the expected noise
    power are signal peaks (lattice, step streaks) and are removed too, with two bins of
    margin for the window's main lobe; the rest is transformed back into a residual map ``r``.
    For white noise ``r/(w√f)`` (``f`` the kept fraction of the spectral energy) has the local
    noise variance, and its median absolute value is a robust estimate of σ — the
    median-absolute-deviation estimator of fine-scale coefficients of Donoho & Johnstone. The
    expected noise power that decides which bins are peaks starts from the median periodogram
    ordinate (``ln 2`` times the mean for exponentially distributed ordinates) and is refined
    once from the first σ estimate.

    Localised defects would be spread over the whole frame by the peak removal, so they are
    treated like gaps: pixels beyond 8 robust σ of the plain high-passed map (spikes, scars,
    step edges), and the invalid pixels, are refilled with the values of least filtered
    energy (Landweber iterations) and left out of the statistics with a 3-pixel margin.

    With ``level``, the pixels are grouped into 16 quantile bins of the level, σ² is
    measured in each, and ``a² + b²·level²`` is fitted by non-negative least squares with
    relative weights. Precision: about 2 % in σ for a 128×128 frame. A broad-band signal at
    the highest spatial frequencies (a surface sampled at its own resolution) is
    indistinguishable from noise and inflates the estimate: the uncertainty errs on the safe
    side.

    References
    ----------
    D. L. Donoho and I. M. Johnstone, Biometrika 81, 425 (1994), doi:10.1093/biomet/81.3.425;
    M. B. Priestley, *Spectral Analysis and Time Series* (Academic Press, 1981), §6.1
    (distribution of periodogram ordinates).
    """
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim != 2:
        raise ProcessingError(f"noise estimate needs a 2-D map, got shape {arr.shape}")
    ok = np.isfinite(arr) if valid is None else (np.asarray(valid, bool) & np.isfinite(arr))
    shape = arr.shape
    nan = NoiseEstimate(np.full(shape, np.nan), math.nan, math.nan)
    if ok.sum() < 16:
        return nan
    ny, nx = shape
    filled = _remove_plane(arr if ok.all() else _fill_invalid(arr, ok), ok)
    grid = _spectral_grid(ny, nx)
    w, w2, gain, mult, band = grid.window, grid.window2, grid.gain, grid.mult, grid.band
    windowed = filled * w
    if band.sum() < 8:
        return nan
    fft = _FFT2((ny, nx))
    spec = fft.forward(windowed)
    # Localised defects (spikes, scars, the edge of a step) are treated like gaps: they are
    # found on the plain high-passed map, where they stay local, as pixels beyond
    # _DEFECT_SIGMA robust σ (inflated by any lattice, hence conservative).
    work = np.empty_like(spec)
    y0 = fft.inverse(np.multiply(spec, gain, out=work))
    y0 /= w * math.sqrt(grid.kept0)
    inner = ok & (w > _MIN_WINDOW)
    if inner.sum() >= 16:
        s0 = _MAD_TO_SIGMA * _median(np.abs(y0[inner]))
        defect = ok & (np.abs(y0) > _DEFECT_SIGMA * s0) if s0 > 0 else np.zeros_like(ok)
        if defect.mean() < _MAX_DEFECT_FRACTION:
            ok = ok & ~_dilate(defect, 1)
    bad = ~ok
    stats = ok & (w > _MIN_WINDOW) & ~_dilate(bad, _GAP_MARGIN_PX)
    if stats.sum() < 16:
        stats = ok
    lev = None if level is None else np.asarray(level, dtype=np.float64)
    if lev is not None:
        stats &= np.isfinite(lev)
    if stats.sum() < 16:
        return nan
    power = spec.real**2 + spec.imag**2
    expected = _median(power[band]) / _MEDIAN_EXP  # pass 1: periodogram median
    levels = _LevelBins(lev[stats], stats.sum()) if lev is not None else None
    fill = _GapFill(windowed, bad, fft) if bad.any() else None
    w_stats = w[stats]
    corr = np.empty(shape)
    est = nan
    for n_fill in (_INPAINT_ITERATIONS, _INPAINT_ITERATIONS // 2):  # pass 2 starts warm
        g = np.where(_peak_bins(power, _PEAK_FACTOR * expected), 0.0, gain)
        kept = float((mult * g**2).sum()) / (ny * nx)
        if not kept > 0:
            return nan
        if fill is not None:
            # Fill the gaps with the values of least filtered energy ‖G x‖² (Landweber
            # iterations, stable for step 1 since the gain is at most 1), so that a gap on a
            # sharp feature leaves no defect for the peak mask to spread over the frame.
            # ``spec`` is the transform of the current ``windowed`` throughout.
            g2 = g**2
            for _ in range(n_fill):
                fill.step(spec, np.multiply(spec, g2, out=work))
        resid = fft.inverse(np.multiply(spec, g, out=work), out=corr)
        y = resid[stats] / (w_stats * math.sqrt(kept))
        est = _fit_noise(y, levels, lev, shape)
        # pass 2: E|F|² = Σ w²σ² over the usable pixels
        if est.relative == 0 and math.isfinite(est.constant):  # σ the same everywhere
            expected = est.constant**2 * float(w2[ok].sum())
        else:
            expected = float(np.dot(np.where(ok, w2, 0.0).ravel(), (est.sigma**2).ravel()))
        if not expected > 0:
            break
        power = spec.real**2 + spec.imag**2
    return est


class _LevelBins:
    """Quantile bins of the signal level over the statistics pixels (the same in both passes)."""

    def __init__(self, lev_stats: np.ndarray, n_pixels: int) -> None:
        self.s2 = lev_stats**2
        self.n_bins = min(_LEVEL_BINS, int(n_pixels) // _MIN_BIN_PIXELS)
        self._groups: list[np.ndarray] | None = None
        self._sb: np.ndarray | None = None

    @property
    def groups(self) -> list[np.ndarray]:
        if self._groups is None:
            self._groups = _level_groups(self.s2, self.n_bins)
        return self._groups

    @property
    def sb(self) -> np.ndarray:
        if self._sb is None:
            self._sb = np.array([_median(self.s2[g]) for g in self.groups])
        return self._sb


def _nnls2(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Non-negative least squares ``min ‖a x − b‖, x ≥ 0`` for two unknowns, exactly.

    By the Karush–Kuhn–Tucker conditions the solution is the unconstrained one if that is
    non-negative, else the best of the one-variable solutions on the faces ``x₀ = 0`` and
    ``x₁ = 0`` (and the origin): what ``scipy.optimize.nnls`` returns (tested), without
    importing ``scipy.optimize`` into every worker (0.3 s).
    """
    x, *_ = np.linalg.lstsq(a, b, rcond=None)
    if np.all(x >= 0):
        return x
    best, best_r = np.zeros(2), float(b @ b)
    for k in (0, 1):
        col = a[:, k]
        norm = float(col @ col)
        if norm > 0:
            cand = np.zeros(2)
            cand[k] = max(float(col @ b) / norm, 0.0)
            r = float(np.sum((a @ cand - b) ** 2))
            if r < best_r:
                best, best_r = cand, r
    return best


def _fit_noise(y: np.ndarray, levels: _LevelBins | None, lev: np.ndarray | None,
               shape: tuple[int, ...]) -> NoiseEstimate:
    """Constant σ, or ``a² + b²·level²`` fitted to σ² in quantile bins of the level."""
    var0 = _robust_var(y)

    def const() -> NoiseEstimate:
        return NoiseEstimate(np.full(shape, math.sqrt(var0)), math.sqrt(var0), 0.0)

    if levels is None or lev is None or not var0 > 0:
        return const()
    if levels.n_bins < 2:
        return const()
    yb = np.array([_robust_var(y[g]) for g in levels.groups])
    sb = levels.sb
    s_scale = _median(sb)
    if not (s_scale > 0 and np.all(yb > 0)):
        return const()
    design = np.column_stack([np.ones_like(sb), sb / s_scale])
    weight = yb
    for _ in range(3):  # relative weights from the model, not from the noisy bin values
        coef = _nnls2(design / weight[:, None], yb / weight)
        fitted = design @ coef
        if not np.all(fitted > 0):
            return const()
        weight = fitted
    a2, b2 = float(coef[0]), float(coef[1]) / s_scale
    finite = np.isfinite(lev)
    lev_f = np.where(finite, lev, 0.0)
    model = a2 + b2 * lev_f**2
    # a2, b2 >= 0 (non-negative least squares): the model is positive wherever a2 is
    if not (a2 > 0 or np.all(model[finite] > 0)):
        return const()
    return NoiseEstimate(np.sqrt(model, out=model), math.sqrt(a2), math.sqrt(b2))


# --------------------------------------------------------------------------------------------
# forward / backward traces
# --------------------------------------------------------------------------------------------


def _detrend_rows(a: np.ndarray) -> np.ndarray:
    """Remove each row's least-squares line (one shared design for all rows)."""
    nx = a.shape[1]
    xc = np.arange(nx) - (nx - 1) / 2
    slope = (a @ xc) / float(xc @ xc)
    return a - a.mean(axis=1, keepdims=True) - slope[:, None] * xc[None, :]


def estimate_trace_lag(forward: np.ndarray, backward: np.ndarray) -> tuple[float, float]:
    """Sub-pixel lag between the forward and backward traces along the fast axis.

    Parameters
    ----------
    forward, backward : numpy.ndarray
        Two maps (y, x) of the same quantity, both in spatial order; NaN allowed.

    Returns
    -------
    lag_px : float
        ``L`` such that ``forward(x) ≈ backward(x − L)``: positive when features appear at
        larger x in the forward trace than in the backward one (the sign of a lagging feedback
        loop or preamplifier). NaN when the traces do not correlate.
    correlation : float
        Peak normalised cross-correlation (1 = identical up to the shift).

    Notes
    -----
    Rows with at least half their pixels finite in both traces are used, each detrended and
    Hann-windowed. Their cross-power spectra are summed over all lines at once, the integer
    peak of the correlation is found by one inverse FFT and refined on a 0.01-pixel grid by a
    matrix DFT over ±1 pixel (the upsampled-DFT idea of Guizar-Sicairos et al., in 1-D),
    then by a parabola through the best three points. Precision for a pure shift: well below
    0.01 pixel without noise.

    References
    ----------
    M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, Opt. Lett. 33, 156 (2008),
    doi:10.1364/OL.33.000156.
    """
    f = np.asarray(forward, dtype=np.float64)
    b = np.asarray(backward, dtype=np.float64)
    ok = np.isfinite(f) & np.isfinite(b)
    rows = ok.mean(axis=1) >= 0.5
    nx = f.shape[1]
    if not rows.any() or nx < 4:
        return math.nan, 0.0
    if ok.all():  # nothing to fill: the same rows without the copies
        fr, br = _detrend_rows(f), _detrend_rows(b)
    else:
        fr = _detrend_rows(_fill_invalid(np.where(ok, f, np.nan), ok)[rows])
        br = _detrend_rows(_fill_invalid(np.where(ok, b, np.nan), ok)[rows])
    win = _hann(nx)
    ff = sfft.rfft(fr * win, axis=1)
    fb = sfft.rfft(br * win, axis=1)
    cross = (ff * np.conj(fb)).sum(axis=0)
    colw = np.full(cross.size, 2.0)
    colw[0] = 1.0
    if nx % 2 == 0:
        colw[-1] = 1.0
    energy = math.sqrt(float((colw * np.abs(ff) ** 2).sum() * (colw * np.abs(fb) ** 2).sum()))
    if not energy > 0:
        return math.nan, 0.0
    coarse = sfft.irfft(cross, n=nx)
    k0 = int(np.argmax(coarse))
    if k0 > nx // 2:
        k0 -= nx
    tau = k0 + np.linspace(-1.0, 1.0, 201)
    kk = np.arange(cross.size)
    phase = np.exp(2j * np.pi * np.outer(tau, kk) / nx)
    corr = (phase * (colw * cross)[None, :]).real.sum(axis=1)
    i = int(np.argmax(corr))
    lag = float(tau[i])
    if 0 < i < tau.size - 1:
        c_m, c_0, c_p = corr[i - 1], corr[i], corr[i + 1]
        denom = c_m - 2 * c_0 + c_p
        if denom < 0:
            lag += 0.5 * (c_m - c_p) / denom * (tau[1] - tau[0])
    rcoef = float(corr[i]) / energy
    if rcoef < _MIN_TRACE_CORRELATION:
        return math.nan, rcoef
    return lag, rcoef


def _shift_rows(maps: list[np.ndarray], shift_px: float) -> list[np.ndarray]:
    """``a(x + shift_px)`` along the fast axis for each map: Fourier shift of the
    mirror-extended rows (all maps in one transform).

    Non-finite pixels are interpolated for the transform and come back as NaN wherever one of
    the two pixels bracketing the source position was non-finite. Sources beyond the frame
    edge are mirrored.
    """
    ny, nx = maps[0].shape
    ext = np.empty((len(maps), ny, 2 * nx))
    oks = []
    for i, a in enumerate(maps):
        ok = np.isfinite(a)
        oks.append(ok)
        if ok.all():
            ext[i, :, :nx] = a
        elif ok.any():
            ext[i, :, :nx] = _fill_invalid(a, ok)
        else:
            ext[i, :, :nx] = 0.0
        ext[i, :, nx:] = ext[i, :, nx - 1::-1]
    k = sfft.rfftfreq(2 * nx)
    spec = np.fft.rfft(ext, axis=-1)
    spec *= np.exp(2j * np.pi * k * shift_px)
    full = np.fft.irfft(spec, n=2 * nx, axis=-1, out=ext)
    outs = []
    lo, hi = _bracket(nx, shift_px)
    for i, ok in enumerate(oks):
        out = full[i, :, :nx].copy()
        if not ok.all():
            out[~_take_columns(ok, lo) | ~_take_columns(ok, hi)] = np.nan
        outs.append(out)
    return outs


def _bracket(nx: int, shift_px: float) -> tuple[np.ndarray, np.ndarray]:
    """Columns bracketing the source positions ``x + shift_px`` (clipped to the frame)."""
    src = np.arange(nx) + shift_px
    lo = np.clip(np.floor(src).astype(int), 0, nx - 1)
    hi = np.clip(lo + 1, 0, nx - 1)
    return lo, hi


def _take_columns(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """``a[:, idx]`` for column indices that are a clipped shift ``clip(j + k)`` except at a
    few edge columns (as here): copied by slices, the exceptions one by one."""
    n = a.shape[1]
    k = int(idx[n // 2]) - n // 2
    base = np.clip(np.arange(n) + k, 0, n - 1)
    odd = np.flatnonzero(base != idx)
    if abs(k) >= n or odd.size > 8:
        return np.take(a, idx, axis=1)
    out = np.empty_like(a)
    if k >= 0:
        out[:, :n - k] = a[:, k:]
        out[:, n - k:] = a[:, -1:]
    else:
        out[:, -k:] = a[:, :n + k]
        out[:, :-k] = a[:, :1]
    if odd.size:
        out[:, odd] = a[:, idx[odd]]
    return out


def _shift_linear(a: np.ndarray, shift_px: float) -> np.ndarray:
    """Linear interpolation of a smooth map (uncertainties) at ``x + shift_px``."""
    nx = a.shape[1]
    src = np.clip(np.arange(nx) + shift_px, 0, nx - 1)
    lo = np.clip(np.floor(src).astype(int), 0, nx - 1)
    hi = np.clip(lo + 1, 0, nx - 1)
    frac = src - lo
    return _take_columns(a, lo) * (1 - frac) + _take_columns(a, hi) * frac


# --------------------------------------------------------------------------------------------
# one trace → height
# --------------------------------------------------------------------------------------------


@dataclass
class _Trace:
    height: np.ndarray  # m, NaN where the pixel is bad
    sigma: np.ndarray  # noise σ of height, m
    phi_part: np.ndarray  # the part of height that scales as 1/√φ (for the φ uncertainty)
    flags: np.ndarray  # uint8, bad bits only


@dataclass(frozen=True)
class _CurrentCheck:
    signed: np.ndarray  # current × polarity (positive when physical)
    flags: np.ndarray
    noise: NoiseEstimate
    floor_A: float
    n_saturated: int
    n_floor: int


def _saturated(signed: np.ndarray, finite: np.ndarray, limit_A: float | None) -> np.ndarray:
    """Pixels at the preamplifier limit, or on a clipped plateau at the maximum."""
    if limit_A is not None and limit_A > 0:
        return finite & (np.abs(np.where(finite, signed, 0.0)) >= _SATURATION_FRACTION * limit_A)
    vals = signed[finite]
    none = np.zeros(signed.shape, dtype=bool)
    if vals.size < 3:
        return none
    top = vals.max()
    n_top = int((vals == top).sum())
    below = vals[vals < top]
    if n_top < 3 or below.size == 0:
        return none
    n_next = int((below == below.max()).sum())
    return finite & (np.where(finite, signed, -np.inf) >= top) if n_top > n_next else none


def _shared(noise: NoiseEstimate | None, level: np.ndarray | None,
            shape: tuple[int, ...]) -> NoiseEstimate | None:
    """The noise model of the other trace evaluated at this trace's levels (None if that
    model is unusable). Same model, same pixel handling as :func:`_fit_noise`."""
    if noise is None or not math.isfinite(noise.constant):
        return None
    if level is None or noise.relative == 0:
        return NoiseEstimate(np.full(shape, noise.constant), noise.constant, noise.relative)
    lev = np.where(np.isfinite(level), level, 0.0)
    return NoiseEstimate(np.sqrt(noise.constant**2 + (noise.relative * lev) ** 2),
                         noise.constant, noise.relative)


def _check_current(current: np.ndarray, *, polarity: float, limit_A: float | None,
                   noise_floor_A: float | None, current_noise_A: float | None,
                   shared_noise: NoiseEstimate | None = None) -> _CurrentCheck:
    signed = np.asarray(current, dtype=np.float64) * polarity
    finite = np.isfinite(signed)
    flags = np.where(finite, 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    sat = _saturated(signed, finite, limit_A)
    flags[sat] |= np.uint8(Flag.SATURATED)
    usable = finite & ~sat
    shared = None if current_noise_A is not None else _shared(shared_noise, np.abs(signed),
                                                               signed.shape)
    if shared is not None:
        noise = shared
    elif current_noise_A is None:
        noise = estimate_white_noise(signed, valid=usable, level=np.abs(signed))
    else:
        noise = NoiseEstimate(np.full(signed.shape, float(current_noise_A)),
                              float(current_noise_A), 0.0)
    if noise_floor_A is not None:
        floor = float(noise_floor_A)
    else:
        floor = _NOISE_FLOOR_SIGMA * noise.constant if math.isfinite(noise.constant) else 0.0
    low = usable & (np.where(usable, signed, 0.0) <= floor)
    flags[low] |= np.uint8(Flag.NOISE_FLOOR)
    return _CurrentCheck(signed, flags, noise, floor, int(sat.sum()), int(low.sum()))


def _constant_height_trace(chk: _CurrentCheck, *, reference_A: float, phi_eV: float,
                           two_kappa: float) -> _Trace:
    good = chk.flags == 0
    s = np.where(good, chk.signed, reference_A)
    h = np.where(good, physics.height_from_current(s, reference_A, phi_eV), np.nan)
    sigma = np.where(good, chk.noise.sigma / (two_kappa * s), np.nan)
    return _Trace(h, sigma, h, chk.flags)


def _constant_current_trace(z: np.ndarray, chk: _CurrentCheck | None, *, setpoint_A: float,
                            phi_eV: float, shared_noise: NoiseEstimate | None = None
                            ) -> tuple[_Trace, NoiseEstimate]:
    zz = np.asarray(z, dtype=np.float64)
    flags = np.where(np.isfinite(zz), 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    if chk is None:
        err = np.zeros_like(zz)
    else:
        flags |= chk.flags
        good_i = chk.flags == 0
        s = np.where(good_i, chk.signed, setpoint_A)
        err = physics.height_from_current(s, setpoint_A, phi_eV)
    good = flags == 0
    h = np.where(good, zz + err, np.nan)
    noise = _shared(shared_noise, None, h.shape) or estimate_white_noise(h, valid=good)
    sigma = np.where(good, noise.sigma, np.nan)
    return _Trace(h, sigma, np.where(good, err, np.nan), flags), noise


def _shift_trace(t: _Trace, shift_px: float) -> _Trace:
    if shift_px == 0:
        return t
    lo, hi = _bracket(t.height.shape[1], shift_px)
    flags = _take_columns(t.flags, lo) | _take_columns(t.flags, hi)
    bad = (flags & np.uint8(BAD_PIXELS)) != 0
    h, p = _shift_rows([t.height, t.phi_part], shift_px)
    sig = _shift_linear(np.where(np.isfinite(t.sigma), t.sigma, 0.0), shift_px)
    h[bad] = np.nan
    p[bad] = np.nan
    sig[bad] = np.nan
    return _Trace(h, sig, p, flags)


def _combine(fw: _Trace, bw: _Trace, *, lag_px: float, mismatch_sigma: float
             ) -> tuple[_Trace, int]:
    """Align both traces by half the lag each, average where they agree."""
    u = 0.0 if not math.isfinite(lag_px) else 0.5 * lag_px
    f, b = _shift_trace(fw, u), _shift_trace(bw, -u)
    fg, bg = np.isfinite(f.height), np.isfinite(b.height)
    if fg.all() and bg.all():  # every pixel in both traces: the same result, fewer passes
        diff = f.height - b.height
        sd = np.sqrt(f.sigma * f.sigma + b.sigma * b.sigma)
        mism = np.abs(diff) > mismatch_sigma * sd
        if mism.any():
            h = np.where(mism, f.height, 0.5 * (f.height + b.height))
            p = np.where(mism, f.phi_part, 0.5 * (f.phi_part + b.phi_part))
            sig = np.where(mism, f.sigma, 0.5 * sd)
        else:
            h, p, sig = 0.5 * (f.height + b.height), 0.5 * (f.phi_part + b.phi_part), 0.5 * sd
        flags = np.zeros(h.shape, np.uint8)
        flags[mism] |= np.uint8(Flag.TRACE_MISMATCH)
        return _Trace(h, sig, p, flags), int(mism.sum())
    both = fg & bg
    diff = np.where(both, f.height - b.height, 0.0)
    fs, bs = np.where(both, f.sigma, 0.0), np.where(both, b.sigma, 0.0)
    sd = np.sqrt(fs * fs + bs * bs)  # hypot(fs, bs) to within an ulp, several times faster
    mism = both & (np.abs(diff) > mismatch_sigma * sd)
    agree = both & ~mism
    h = np.where(agree, 0.5 * (f.height + b.height), np.where(fg, f.height, b.height))
    p = np.where(agree, 0.5 * (f.phi_part + b.phi_part), np.where(fg, f.phi_part, b.phi_part))
    sig = np.where(agree, 0.5 * sd, np.where(fg, f.sigma, b.sigma))
    flags = np.where(fg | bg, 0, f.flags | b.flags).astype(np.uint8)
    flags[mism] |= np.uint8(Flag.TRACE_MISMATCH)
    return _Trace(h, sig, p, flags), int(mism.sum())


# --------------------------------------------------------------------------------------------
# the stage
# --------------------------------------------------------------------------------------------


def _check_units(raw: xr.Dataset, frame: str) -> None:
    for name, unit in (("z", "m"), ("z_backward", "m"), ("current", "A"),
                       ("current_backward", "A")):
        if name in raw.data_vars and str(raw[name].attrs.get("units", unit)) != unit:
            raise ProcessingError(
                f"frame {frame}: variable '{name}' is in {raw[name].attrs.get('units')!r}, "
                f"expected '{unit}' (pass the frame through model.validate_raw_frame first)")


def _polarity(bias_V: float, current: np.ndarray | None) -> float:
    if bias_V != 0:
        return math.copysign(1.0, bias_V)
    if current is not None:
        vals = current[np.isfinite(current)]
        if vals.size and np.median(vals) < 0:
            return -1.0
    return 1.0


def _opt_limit(raw: xr.Dataset) -> float | None:
    lim = raw.attrs.get("current_limit_A")
    if lim is None:
        return None
    val = float(np.asarray(lim).item())
    return val if math.isfinite(val) and val > 0 else None


@stage(version="1")
def reconstruct_height(
    raw: xr.Dataset,
    *,
    work_function_eV: float,
    work_function_uncertainty_eV: float = 0.0,
    combine_traces: bool = True,
    trace_mismatch_sigma: float = 5.0,
    noise_floor_A: float | None = None,
    current_noise_A: float | None = None,
) -> xr.Dataset:
    """Turn a validated raw frame into a height map with uncertainty and quality flags.

    Parameters
    ----------
    raw : xarray.Dataset
        Output of :func:`pipeline.model.validate_raw_frame` (z in m, currents in A).
    work_function_eV : float
        Barrier height φ of the decay law, eV (2κ = 1.0246 Å⁻¹·√(φ/eV)).
    work_function_uncertainty_eV : float
        Standard uncertainty of φ, eV; added to ``height_uncertainty`` as ``|∂h/∂φ|·σ_φ``.
    combine_traces : bool
        Align and average forward and backward traces where both exist. When false, the
        forward trace alone is converted (the lag is still measured and reported).
    trace_mismatch_sigma : float
        Pixels whose aligned traces differ by more than this many combined noise standard
        deviations are flagged ``TRACE_MISMATCH`` and take the forward trace's value.
    noise_floor_A : float, optional
        Current magnitude below which a pixel carries no usable height (default: three times
        the additive current noise measured on the frame).
    current_noise_A : float, optional
        Standard deviation of the current noise (default: measured on the frame with
        :func:`estimate_white_noise`).

    Returns
    -------
    xarray.Dataset
        Processed frame (:func:`pipeline.model.make_height_frame`): ``height`` (m),
        ``height_uncertainty`` (m), ``flags``; attrs of ``raw`` plus ``work_function_eV``,
        ``work_function_uncertainty_eV``, ``height_reference`` (what zero means),
        ``height_noise_m`` (median noise σ), ``noise_floor_A``, ``current_noise_A``,
        ``reference_current_A`` (constant-height) and ``trace_lag_px`` (when both traces exist).
        ``status`` is left to :func:`pipeline.stages.quality.assess_quality`.

    Raises
    ------
    ProcessingError
        Bad parameters, an unvalidated frame, or no pixel left to convert.

    Notes
    -----
    *Constant-height*: ``h = ln(I/I_ref)/(2κ)`` (:func:`pipeline.physics.height_from_current`)
    with ``I_ref`` the median of the usable currents, so ``h = 0`` at the frame's median
    current and heights are relative to that level (the plane is removed later). Currents are
    multiplied by the sign of ``bias_V`` first, so either polarity works. Noise:
    ``σ_h = σ_I/(2κ|I|)`` with ``σ_I² = a² + (b|I|)²`` measured on the frame
    (:func:`estimate_white_noise`), i.e. an additive preamplifier floor and a multiplicative
    part, or ``σ_I = current_noise_A`` when given.

    *Constant-current*: ``h = z + ln(I/I_set)/(2κ)`` when the residual current is recorded
    (feedback-error correction, exact for any feedback lag), else ``h = z``. The noise is
    measured on the reconstructed map itself, because the piezo and current noise are
    correlated through the feedback loop; ``current_noise_A`` there only sets the default
    noise floor.

    *Pixels*: non-finite → ``NOT_RECORDED``; ``|I| ≥ 0.999·current_limit_A`` (or, without that
    attribute, a plateau of ≥ 3 identical pixels at the maximum that outnumbers the next value
    below) → ``SATURATED``; current ≤ the noise floor, including currents of the wrong sign →
    ``NOISE_FLOOR``. All three leave ``height`` NaN (decision: no interpolation here, a
    number that was never measured is not invented; the flags say why).

    *Traces*: the lag ``L`` (:func:`estimate_trace_lag`) is removed by shifting the forward
    trace by ``+L/2`` and the backward one by ``−L/2`` (mirror-extended Fourier shift, which
    keeps the noise variance), so the average sits at the true position for a symmetric lag.
    A pixel bad in one trace takes the other. Both traces come from one preamplifier and one
    feedback loop, recorded line by line: the noise model is measured on the forward trace
    and evaluated at the backward trace's own levels (measured on the backward trace only if
    the forward one gives none), which halves the cost of the noise estimates.

    *Work function*: ``∂h/∂φ = −h_φ/(2φ)`` where ``h_φ`` is the current-derived part (all of
    ``h`` relative to the reference in constant-height mode, the feedback-error term in
    constant-current mode); ``|h_φ|·σ_φ/(2φ)`` is added in quadrature. It is a scale error
    common to the whole frame, so it does not average down.

    References
    ----------
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805;
    C. J. Chen, *Introduction to Scanning Tunneling Microscopy*, 2nd ed. (Oxford, 2008),
    doi:10.1093/acprof:oso/9780199211500.001.0001.
    """
    frame = str(raw.attrs.get("frame_id", "<frame>"))
    phi = float(work_function_eV)
    sphi = float(work_function_uncertainty_eV)
    if not (math.isfinite(phi) and phi > 0):
        raise ProcessingError(f"frame {frame}: work_function_eV = {work_function_eV!r} must be "
                              "a positive finite number of eV")
    if not (math.isfinite(sphi) and sphi >= 0):
        raise ProcessingError(f"frame {frame}: work_function_uncertainty_eV = "
                              f"{work_function_uncertainty_eV!r} must be finite and >= 0")
    if not (math.isfinite(trace_mismatch_sigma) and trace_mismatch_sigma > 0):
        raise ProcessingError(f"frame {frame}: trace_mismatch_sigma = {trace_mismatch_sigma!r} "
                              "must be > 0")
    for name, val in (("noise_floor_A", noise_floor_A), ("current_noise_A", current_noise_A)):
        if val is not None and not (math.isfinite(val) and val >= 0):
            raise ProcessingError(f"frame {frame}: {name} = {val!r} must be >= 0 A or unset")
    if "height" in raw.data_vars:
        raise ProcessingError(f"frame {frame}: already has a 'height' variable; "
                              "reconstruct_height expects a raw frame")
    mode = raw.attrs.get("mode")
    if mode not in ("constant-height", "constant-current"):
        raise ProcessingError(f"frame {frame}: attribute 'mode' = {mode!r}; expected "
                              "'constant-height' or 'constant-current'")
    _check_units(raw, frame)

    two_kappa = 2.0 * float(physics.decay_constant(phi))
    cur = raw["current"].values if "current" in raw.data_vars else None
    cur_b = raw["current_backward"].values if "current_backward" in raw.data_vars else None
    polarity = _polarity(float(raw.attrs.get("bias_V", 0.0)), cur)
    limit = _opt_limit(raw)
    opts = {"polarity": polarity, "limit_A": limit, "noise_floor_A": noise_floor_A,
            "current_noise_A": current_noise_A}
    new_attrs: dict[str, object] = {"work_function_eV": phi,
                                    "work_function_uncertainty_eV": sphi}
    notes: list[str] = []

    # one preamplifier and one feedback loop record both traces, line by line: the backward
    # trace shares the noise model measured on the forward one
    chk_f = _check_current(cur, **opts) if cur is not None else None
    chk_b = (_check_current(cur_b, **opts, shared_noise=chk_f.noise if chk_f else None)
             if cur_b is not None else None)
    backward: _Trace | None = None
    if mode == "constant-height":
        if chk_f is None:
            raise ProcessingError(f"frame {frame}: constant-height frame has no 'current'")
        good = chk_f.flags == 0
        if not good.any():
            raise ProcessingError(_nothing_left(frame, chk_f))
        i_ref = float(np.median(chk_f.signed[good]))
        forward = _constant_height_trace(chk_f, reference_A=i_ref, phi_eV=phi,
                                         two_kappa=two_kappa)
        if chk_b is not None:
            backward = _constant_height_trace(chk_b, reference_A=i_ref, phi_eV=phi,
                                              two_kappa=two_kappa)
        new_attrs["reference_current_A"] = i_ref * polarity
        new_attrs["height_reference"] = (
            f"h = ln(I/I_ref)/(2 kappa) with I_ref = {i_ref * polarity:.6g} A, the median "
            "current of the frame: zero is the surface level under the median current; no "
            "plane removed")
        if np.ptp(chk_f.signed[good]) == 0:
            notes.append("current is the same at every usable pixel: no contrast, the height "
                         "map is flat")
    else:
        setpoint = abs(float(raw.attrs["setpoint_A"]))
        forward, h_noise = _constant_current_trace(raw["z"].values, chk_f,
                                                   setpoint_A=setpoint, phi_eV=phi)
        if "z_backward" in raw.data_vars:
            backward, _ = _constant_current_trace(raw["z_backward"].values, chk_b,
                                                  setpoint_A=setpoint, phi_eV=phi,
                                                  shared_noise=h_noise)
        corrected = chk_f is not None
        new_attrs["height_reference"] = (
            "h = z" + (" + ln(I/I_set)/(2 kappa) (feedback-error correction)" if corrected
                       else " (no residual current recorded: no feedback-error correction)")
            + "; z is the piezo height (+ = retract); no plane removed")
        if chk_f is not None:
            good_i = chk_f.flags == 0
            if good_i.any():
                ratio = float(np.median(chk_f.signed[good_i])) / setpoint
                if not 0.5 <= ratio <= 2.0:
                    notes.append(f"residual current: median {ratio:.3g} x the setpoint "
                                 f"{setpoint:.4g} A; check the current's units or gain")
        if not np.isfinite(forward.height).any():
            if chk_f is not None:
                raise ProcessingError(_nothing_left(frame, chk_f))
            raise ProcessingError(f"frame {frame}: no finite z pixel to convert")

    if chk_f is not None:
        new_attrs["noise_floor_A"] = chk_f.floor_A
        new_attrs["current_noise_A"] = float(np.nanmedian(chk_f.noise.sigma)) \
            if np.isfinite(chk_f.noise.sigma).any() else math.nan

    result = forward
    if backward is not None:
        lag, rcoef = estimate_trace_lag(forward.height, backward.height)
        new_attrs["trace_lag_px"] = lag
        new_attrs["trace_correlation"] = rcoef
        if not math.isfinite(lag) or abs(lag) > _MAX_LAG_FRACTION * forward.height.shape[1]:
            notes.append(f"forward and backward traces do not match (correlation {rcoef:.2f}); "
                         "combined without lag correction")
            lag = 0.0
        if combine_traces:
            result, n_mism = _combine(forward, backward, lag_px=lag,
                                      mismatch_sigma=trace_mismatch_sigma)
            if n_mism:
                frac = n_mism / result.height.size
                notes.append(f"traces: {n_mism} pixel(s) ({100 * frac:.2f}%) differ by more "
                             f"than {trace_mismatch_sigma:g} sigma between forward and backward; "
                             "flagged, forward trace used there")

    n_sat = int(((result.flags & np.uint8(Flag.SATURATED)) != 0).sum())
    n_floor = int(((result.flags & np.uint8(Flag.NOISE_FLOOR)) != 0).sum())
    if n_sat:
        lim_txt = (f">= {_SATURATION_FRACTION * limit:.4g} A" if limit is not None
                   else "a clipped plateau at the maximum")
        notes.append(f"current: {n_sat} pixel(s) saturated ({lim_txt}); flagged, height "
                     "left undefined")
    if n_floor:
        floor = chk_f.floor_A if chk_f is not None else 0.0
        notes.append(f"current: {n_floor} pixel(s) below the noise floor ({floor:.3g} A) or "
                     f"of the wrong sign for bias_V = {raw.attrs.get('bias_V')}; flagged, "
                     "height left undefined")

    sigma_phi = np.abs(result.phi_part) * sphi / (2.0 * phi)
    unc = np.sqrt(result.sigma**2 + sigma_phi**2)
    finite_sigma = result.sigma[np.isfinite(result.sigma)]
    new_attrs["height_noise_m"] = float(np.median(finite_sigma)) if finite_sigma.size \
        else math.nan
    out = make_height_frame(raw, result.height, uncertainty=unc, flags=result.flags,
                            attrs=new_attrs)
    for msg in notes:
        add_warning(out, msg)
    return out


def _nothing_left(frame: str, chk: _CurrentCheck) -> str:
    nrec = int(((chk.flags & np.uint8(Flag.NOT_RECORDED)) != 0).sum())
    return (f"frame {frame}: no pixel left to convert into a height: {nrec} not recorded, "
            f"{chk.n_saturated} saturated, {chk.n_floor} at or below the noise floor "
            f"({chk.floor_A:.3g} A)")
