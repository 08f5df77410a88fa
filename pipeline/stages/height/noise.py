"""White noise of a channel measured on the frame itself, constant and level-proportional parts."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.errors import ProcessingError
from pipeline.stages.height.spectrum import (
    _FFT2,
    _dilate,
    _fill_invalid,
    _GapFill,
    _peak_bins,
    _remove_plane,
    _spectral_grid,
)
from pipeline.stages.stats import median as _median

#: Bins whose power exceeds this multiple of the expected noise power are signal peaks
#: (lattice, step streaks); an exponentially distributed noise bin exceeds it with
#: probability e^-10 ≈ 5e-5.
_PEAK_FACTOR = 10.0


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
