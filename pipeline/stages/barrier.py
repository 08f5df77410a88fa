"""Approach-curve fitting: apparent barrier height, decay constant and the run's work function.

The chain is: :func:`fit_approach_curve` (one curve: usable range found automatically, robust
fit of ln|I| against z, honest uncertainty, accept/reject with a reason) → :func:`fit_curves`
(a curve dataset → a table with dim ``curve``) → :func:`estimate_work_function` (the run's
weighted mean with outlier rejection). :func:`two_setpoint_work_function` and
:func:`apparent_barrier_map` are the alternatives for runs without curves and for maps.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr
from scipy import optimize, signal

from pipeline import physics
from pipeline.errors import ProcessingError, ShapeError
from pipeline.model import stage

__all__ = [
    "FIT_CURVES_CONFIG_KEYS",
    "BarrierModelFit",
    "CurveFit",
    "WorkFunctionEstimate",
    "apparent_barrier_map",
    "combine_fit_tables",
    "estimate_work_function",
    "fit_approach_curve",
    "fit_barrier_model",
    "fit_curves",
    "two_setpoint_work_function",
]

#: Huber's tuning constant: 95 % efficiency for Gaussian residuals (Huber, Robust Statistics).
HUBER_C = 1.345
#: Consistency factor turning a median absolute deviation into a Gaussian standard deviation.
MAD_TO_SIGMA = 1.482602218505602
#: Samples per sliding window of the local-slope test (range selection, contact detection).
SLOPE_WINDOW = 7
#: A local slope flatter than this fraction of the curve's median slope is not tunnelling.
FLAT_SLOPE_FRACTION = 0.5
#: Samples whose fitted current exceeds this fraction of the preamplifier limit are left out,
#: so that noise clipped at the limit cannot bias the retained samples.
SATURATION_MARGIN = 0.8
#: Past a contact plateau the fit keeps currents below this fraction of the plateau level I_c,
#: where the series-contact correction I·I_c/(I_c − I) is insensitive to the error of I_c.
CONTACT_MARGIN = 0.05
#: Plausible range of a fitted apparent barrier; outside it the fit is called bad, eV.
PLAUSIBLE_PHI_EV = (0.2, 20.0)
#: Largest relative standard uncertainty of an accepted φ_ap.
MAX_RELATIVE_UNCERTAINTY = 0.25


#: Keys of :class:`pipeline.config.BarrierConfig` that are keyword arguments of
#: :func:`fit_curves` under the same names: ``fit_curves(ds, **cfg.barrier.model_dump(
#: include=set(FIT_CURVES_CONFIG_KEYS)))``.
FIT_CURVES_CONFIG_KEYS = (
    "min_points", "noise_floor_A", "current_limit_A", "floor_threshold_sigma",
    "tip_change_threshold_sigma", "reject_contact_curves", "bias_correction", "barrier_profile",
)


# --------------------------------------------------------------------------------------------
# one curve
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class CurveFit:
    """Result of fitting one approach curve (see :func:`fit_approach_curve`).

    Attributes
    ----------
    phi_ap_eV, phi_ap_uncertainty_eV : float
        Apparent barrier height φ_ap = (ħ²/8mₑ)(d ln I/dz)² and its standard uncertainty, eV.
    decay_constant_per_m : float
        κ = −½ d ln|I|/dz, 1/m.
    slope_per_m : float
        d ln|I|/dz over the fit range (negative for a tunnelling curve), 1/m.
    slope_uncertainty_per_m : float
        Standard uncertainty of the slope, 1/m.
    log_current_at_zero : float
        Fitted ln(|I|/A) at z = 0.
    z_min_m, z_max_m : float
        Limits of the fit range, m.
    n_points : int
        Samples in the fit range.
    rms_residual : float
        RMS of the ln|I| residuals in the fit range (dimensionless: 0.03 = 3 %).
    accepted : bool
        Whether the curve may enter the run's estimate.
    reason : str
        Why not ("" when accepted).
    noise_floor_A : float
        Additive noise standard deviation used (given, or estimated from the second differences
        of the most retracted fifth of the curve), A.
    offset_A : float
        Current offset subtracted (median of the samples whose fitted signal is below the
        floor, with that signal taken out), A.
    relative_noise : float
        Estimated relative (multiplicative) noise f of the current, e.g. 0.03.
    residual_correlation : float
        Estimated lag-one correlation of the relative noise (inflates the uncertainty).
    tip_change_statistic : float
        √ΔRSS/σ of the best two-segment model against one line (≈ significance in σ).
    contact_samples : int
        Samples at the close end where the curve levels off below saturation.
    usable : numpy.ndarray
        Boolean mask of the fit range, in the input's sample order.
    """

    phi_ap_eV: float
    phi_ap_uncertainty_eV: float
    decay_constant_per_m: float
    slope_per_m: float
    slope_uncertainty_per_m: float
    log_current_at_zero: float
    z_min_m: float
    z_max_m: float
    n_points: int
    rms_residual: float
    accepted: bool
    reason: str
    noise_floor_A: float = 0.0
    offset_A: float = 0.0
    relative_noise: float = 0.0
    residual_correlation: float = 0.0
    tip_change_statistic: float = 0.0
    contact_samples: int = 0
    usable: np.ndarray = field(default_factory=lambda: np.zeros(0, bool), repr=False)


def _rejected(reason: str, n: int, *, usable: np.ndarray | None = None, **known: Any) -> CurveFit:
    nan = math.nan
    values: dict[str, Any] = dict(
        phi_ap_eV=nan, phi_ap_uncertainty_eV=nan, decay_constant_per_m=nan, slope_per_m=nan,
        slope_uncertainty_per_m=nan, log_current_at_zero=nan, z_min_m=nan, z_max_m=nan,
        n_points=0, rms_residual=nan, accepted=False, reason=reason)
    values.update(known)
    return CurveFit(**values, usable=np.zeros(n, bool) if usable is None else usable)


def _mad_sigma(values: np.ndarray) -> float:
    v = values[np.isfinite(values)]
    if v.size == 0:
        return math.nan
    return MAD_TO_SIGMA * float(np.median(np.abs(v - np.median(v))))


def _tail_noise(y: np.ndarray) -> tuple[bool, float, float]:
    """Noise of the retracted tail.  Returns (flat, median, sigma).

    The tail is the most retracted fifth of the curve (at least 10 samples). ``sigma`` comes from
    its second differences (σ = MAD-σ(Δ²y)/√6), which a smooth remaining signal barely affects;
    the tail is ``flat`` (noise-dominated, so its median is the channel's offset) when the spread
    of its values is no larger than twice that.
    """
    n_tail = max(10, y.size // 5)
    tail = y[-n_tail:]
    sigma = _mad_sigma(np.diff(tail, 2)) / math.sqrt(6.0)
    flat = bool(sigma > 0 and _mad_sigma(tail) <= 2.0 * sigma)
    return flat, float(np.median(tail)), float(sigma)


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Start/stop (exclusive) indices of the runs of True in a 1-D mask."""
    padded = np.concatenate([[False], mask, [False]])
    edges = np.flatnonzero(np.diff(padded.astype(np.int8)))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True))


def _local_slopes(z: np.ndarray, logy: np.ndarray, good: np.ndarray, w: int) -> np.ndarray:
    """Least-squares slope of ``logy`` against ``z`` in centred windows of ``w`` samples.

    NaN where the window leaves the array or contains a sample that is not ``good``.
    """
    n = z.size
    out = np.full(n, np.nan)
    if n < w:
        return out
    lz = np.where(good, logy, 0.0)
    zz = np.where(good, z, 0.0)

    def wsum(a: np.ndarray) -> np.ndarray:
        c = np.concatenate([[0.0], np.cumsum(a)])
        return c[w:] - c[:-w]

    s1 = float(w)
    sz, szz = wsum(zz), wsum(zz * zz)
    sy, szy = wsum(lz), wsum(zz * lz)
    nbad = wsum((~good).astype(float))
    den = s1 * szz - sz * sz
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (s1 * szy - sz * sy) / den
    slope[(nbad > 0) | ~(den > 0)] = np.nan
    half = w // 2
    out[half:half + slope.size] = slope
    return out


@dataclass
class _LineFit:
    a: float
    b: float
    scale: float
    u: np.ndarray  # standardised residuals
    weights: np.ndarray  # final robust weights (noise model × Huber)


def _robust_line(z: np.ndarray, y: np.ndarray, w: np.ndarray, *, n_iter: int = 30) -> _LineFit:
    """Huber M-estimate of y = a + b z with known relative variances 1/w (IRLS).

    Scale from the MAD of the standardised residuals (Huber, Robust Statistics, 1981, §7).
    The uncertainty is not taken from here but from the noise model (:func:`_slope_variance`).
    """
    sw = np.sqrt(w)
    x = np.column_stack([sw, sw * z])
    yt = sw * y

    def solve(h: np.ndarray) -> np.ndarray:
        xh = x * h[:, None]
        return np.linalg.solve(xh.T @ x, xh.T @ yt)

    h = np.ones_like(y)
    beta = solve(h)
    scale = 1.0
    for _ in range(n_iter):
        r = yt - x @ beta
        scale = MAD_TO_SIGMA * float(np.median(np.abs(r)))
        if not scale > 0:
            scale = float(np.sqrt(np.mean(r**2))) or 1e-300
        h = np.minimum(1.0, HUBER_C / np.maximum(np.abs(r / scale), 1e-300))
        beta_new = solve(h)
        step = float(np.max(np.abs(beta_new - beta) / (np.abs(beta) + 1e-300)))
        beta = beta_new
        if step < 1e-9:
            break
    u = (yt - x @ beta) / scale
    return _LineFit(float(beta[0]), float(beta[1]), scale, u, w * h)


def _ar1_apply(v: np.ndarray, rho: float) -> np.ndarray:
    """R·v for the AR(1) correlation matrix R_ij = ρ^|i−j| (two recursive passes, O(n))."""
    if rho == 0.0:
        return v.copy()
    fwd = signal.lfilter([1.0], [1.0, -rho], v, axis=0)
    bwd = signal.lfilter([1.0], [1.0, -rho], v[::-1], axis=0)[::-1]
    return fwd + bwd - v


def _slope_variance(z: np.ndarray, weights: np.ndarray, mult_var: float, floor_var: np.ndarray,
                    rho: float) -> float:
    """Variance of the weighted-least-squares slope under the noise model of ln|I|.

    Noise covariance C = f²·R(ρ) + diag(σ_floor²/I²): relative noise correlated AR(1)-like
    between successive samples, additive floor noise white. Sandwich A⁻¹(XᵀWCWX)A⁻¹ with
    A = XᵀWX.
    """
    x = np.column_stack([np.ones_like(z), z])
    wx = x * weights[:, None]
    a_inv = np.linalg.inv(x.T @ wx)
    cwx = mult_var * _ar1_apply(wx, rho) + floor_var[:, None] * wx
    cov = a_inv @ (wx.T @ cwx) @ a_inv
    return float(cov[1, 1])


def _residual_moments(x: np.ndarray, b: np.ndarray, c_diag: np.ndarray, c_off: np.ndarray,
                      g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal and first off-diagonal of M C Mᵀ, M = I − X B (the residual-maker).

    ``g`` = B C (2 × n), ``c_diag``/``c_off`` the diagonal and first off-diagonal of C.
    """
    q = g @ b.T  # B C Bᵀ, 2 × 2
    xg = np.einsum("ik,ki->i", x, g)
    diag = c_diag - 2.0 * xg + np.einsum("ik,kl,il->i", x, q, x)
    off = (c_off - np.einsum("ik,ki->i", x[:-1], g[:, 1:])
           - np.einsum("ik,ki->i", x[1:], g[:, :-1])
           + np.einsum("ik,kl,il->i", x[:-1], q, x[1:]))
    return diag, off


def _noise_model(x: np.ndarray, resid: np.ndarray, weights: np.ndarray, floor_var: np.ndarray,
                 mult_var: float) -> tuple[float, float]:
    """Relative-noise variance f² and its lag-one correlation ρ from the ln|I| residuals.

    Moment matching that is unbiased for the fitted model (design matrix ``x``, n × p): the
    expected weighted sums S₀ = Σuᵢrᵢ² and S₁ = Σvᵢrᵢrᵢ₊₁ under C = f²R(ρ) + D are computed
    exactly through the residual-maker M = I − X(XᵀWX)⁻¹XᵀW (E[rrᵀ] = MCMᵀ, O(n) with the
    AR(1) recursion), and (f², ρ) solve E[S₀] = S₀, E[S₁] = S₁. Residuals are winsorised at 3σ
    against outliers.
    """
    n = x.shape[0]
    xw = x * weights[:, None]
    b = np.linalg.solve(x.T @ xw, xw.T)  # p × n
    fl_diag, fl_off = _residual_moments(x, b, floor_var, np.zeros(n - 1), b * floor_var)
    rho = 0.0
    for _ in range(2):
        var = mult_var + floor_var
        sd = np.sqrt(var)
        r = np.clip(resid, -3.0 * sd, 3.0 * sd)
        u = 1.0 / var**2
        v = 1.0 / (var[1:] * var[:-1])
        s0 = float(np.sum(u * r * r))
        s1 = float(np.sum(v * r[1:] * r[:-1]))
        e0_floor = float(np.sum(u * fl_diag))
        e1_floor = float(np.sum(v * fl_off))
        rho, e0 = _match_moments(x, b, u, v, s0, s1, e0_floor, e1_floor)
        mult_var = max((s0 - e0_floor) / e0, 1e-10)
    return mult_var, rho


def _match_moments(x: np.ndarray, b: np.ndarray, u: np.ndarray, v: np.ndarray, s0: float,
                   s1: float, e0_floor: float, e1_floor: float) -> tuple[float, float]:
    """Solve for ρ in the moment equations of :func:`_noise_model`; returns (ρ, E₀ per f²)."""
    n = x.shape[0]

    def parts(rh: float) -> tuple[float, float]:
        g = _ar1_apply(b.T, rh).T
        d, o = _residual_moments(x, b, np.ones(n), np.full(n - 1, rh), g)
        return float(np.sum(u * d)), float(np.sum(v * o))

    def mismatch(rh: float) -> float:
        e0, e1 = parts(rh)
        return max((s0 - e0_floor) / e0, 0.0) * e1 + e1_floor - s1

    lo, hi = -0.5, 0.95
    m_lo, m_hi = mismatch(lo), mismatch(hi)
    if m_lo * m_hi < 0:
        rho = float(optimize.brentq(mismatch, lo, hi, xtol=1e-4))
    else:
        rho = lo if abs(m_lo) < abs(m_hi) else hi
    return rho, parts(rho)[0]


def _line_design(z: np.ndarray) -> np.ndarray:
    return np.column_stack([np.ones_like(z), z])


def _wls(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    xw = x * w[:, None]
    return np.linalg.solve(x.T @ xw, xw.T @ y)


def _two_segment_statistic(z: np.ndarray, y: np.ndarray, w: np.ndarray, m: int
                           ) -> tuple[float, int]:
    """Largest drop in weighted RSS from one line to two independent lines split at one sample.

    Returns (ΔRSS_max, index of the first sample of the right segment). Vectorised over split
    points with prefix sums; both segments keep at least ``m`` samples.
    """
    n = z.size
    if n < 2 * m:
        return 0.0, -1

    def prefix(a: np.ndarray) -> np.ndarray:
        return np.concatenate([[0.0], np.cumsum(a)])

    sums = [prefix(v) for v in (w, w * z, w * z * z, w * y, w * z * y, w * y * y)]

    def rss(lo: np.ndarray | int, hi: np.ndarray | int) -> np.ndarray:
        s0, sz, szz, sy, szy, syy = (c[hi] - c[lo] for c in sums)
        det = s0 * szz - sz * sz
        with np.errstate(divide="ignore", invalid="ignore"):
            a = (szz * sy - sz * szy) / det
            b = (s0 * szy - sz * sy) / det
        return np.asarray(syy - a * sy - b * szy)

    total = float(rss(0, n))
    splits = np.arange(m, n - m + 1)
    two = rss(0, splits) + rss(splits, n)
    best = int(np.nanargmin(two))
    return max(0.0, total - float(two[best])), int(splits[best])


def fit_approach_curve(
    z_m: np.ndarray,
    current_A: np.ndarray,
    *,
    bias_V: float,
    current_limit_A: float | None = None,
    noise_floor_A: float | None = None,
    min_points: int = 8,
    floor_threshold_sigma: float = 5.0,
    tip_change_threshold_sigma: float = 8.0,
    reject_contact_curves: bool = True,
) -> CurveFit:
    """Fit one approach curve: apparent barrier height from a robust line through ln|I|(z).

    Parameters
    ----------
    z_m : numpy.ndarray
        Tip displacement, m (+ = retract), 1-D; any order (samples are sorted by z).
    current_A : numpy.ndarray
        Current, A, same shape; its sign follows the bias, samples near zero scatter around it.
    bias_V : float
        Sample bias, V (non-zero, finite).
    current_limit_A : float, optional
        Preamplifier saturation level. Unset: samples repeating the curve's largest magnitude
        (at least three) are taken as saturated.
    noise_floor_A : float, optional
        Standard deviation of the additive current noise. Unset: estimated from the most
        retracted fifth of the curve when that tail is noise-dominated.
    min_points : int
        Fewest samples in the fit range for a curve to be accepted.
    floor_threshold_sigma : float
        The fit range keeps samples whose fitted current is at least this many noise-floor
        standard deviations.
    tip_change_threshold_sigma : float
        A two-segment model (a jump or change of slope at one sample) that improves the fit by
        more than this many standard deviations (√ΔRSS/σ) marks a tip change.
    reject_contact_curves : bool
        Reject curves that touch the surface (the current levels off below saturation at the
        close end); the fit range excludes that part either way.

    Returns
    -------
    CurveFit
        Fitted values and ``accepted``/``reason``. Data problems (too few points, everything
        below the noise floor, current increasing on retract, NaN) give a rejection with a
        reason, not an exception.

    Raises
    ------
    ShapeError
        If ``z_m`` and ``current_A`` are not 1-D arrays of one length.
    ProcessingError
        If ``bias_V`` is zero or not finite, or ``min_points`` < 4.

    Notes
    -----
    Usable range. After removing non-finite samples and sorting by z: (1) the noise floor σ
    comes from the second differences of the most retracted fifth (unless given); (2) samples
    at the preamplifier limit are saturated; (3) candidates lie above ``floor_threshold_sigma``
    floor σ and below saturation; their longest run is the span; (4) a sliding-window slope
    (7 samples) trims a close end that levels off below saturation (a contact plateau) and a far
    end that levels off; anomalies inside the span stay for the tip-change test; the median
    local slope must be negative ("current increases on retract" otherwise). A first robust fit
    then re-estimates the offset (median of the samples whose fitted signal is below σ, signal
    subtracted) and fixes the final range *from the fitted line* (fitted current above the
    floor threshold and below 80 % of the limit), so the range never selects on the noise.

    Fit. ln|I| = a + b z by iteratively reweighted least squares with Huber's loss
    (c = 1.345), with the second-order bias of ln(I + noise), +σ²/(2I²), added back. Noise model
    of ln|I|: var = f²·R(ρ) + σ²/I², relative noise f correlated between successive samples
    (AR(1), preamplifier bandwidth) plus white floor noise. f and ρ are found by moment
    matching on the residuals with the exact residual-maker of the fit, so they are unbiased
    for short curves; the slope variance is the sandwich of the weighted fit under that
    covariance, times ν/(ν − 2) for the ν effective degrees of freedom of the estimated noise
    model (the normalised error is then Student-t like), plus the propagated error of the
    offset. Calibration checked by simulation: over
    ≥ 200 seeds the normalised error (φ̂ − φ)/σ has a standard deviation within 0.8–1.25
    (tests/stages/test_barrier.py).

    Tip changes. The best split of the fit range into two independent lines (vectorised over
    split points) is compared with one line, with the noise re-estimated from the two-line
    residuals (a jump would inflate the one-line estimate); an improvement beyond
    ``tip_change_threshold_sigma`` rejects the curve. φ_ap and its uncertainty follow from
    φ = (ħ²/8mₑ) b², σ_φ = 2φ σ_b/|b|.

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57; P. J. Huber, *Robust Statistics* (Wiley, 1981),
    doi:10.1002/0471725250.
    """
    z_in = np.asarray(z_m, dtype=float)
    i_in = np.asarray(current_A, dtype=float)
    if z_in.ndim != 1 or z_in.shape != i_in.shape:
        raise ShapeError(f"fit_approach_curve: z {z_in.shape} and current {i_in.shape} must be "
                         "1-D arrays of the same length")
    if not (math.isfinite(bias_V) and bias_V != 0):
        raise ProcessingError(f"fit_approach_curve: bias_V = {bias_V!r}; a tunnelling curve "
                              "needs a finite non-zero bias")
    if min_points < 4:
        raise ProcessingError(f"fit_approach_curve: min_points = {min_points}; at least 4")
    n_in = z_in.size
    finite = np.isfinite(z_in) & np.isfinite(i_in)
    if not finite.any():
        return _rejected("no finite samples", n_in)
    if finite.sum() < min_points:
        return _rejected("too few points", n_in)
    idx = np.flatnonzero(finite)
    idx = idx[np.argsort(z_in[idx], kind="stable")]
    z, raw = z_in[idx], i_in[idx]
    sign = math.copysign(1.0, bias_V)
    y = sign * raw

    # (1) offset and noise floor from the retracted tail (a flat tail far above its noise is
    # not an offset but a current that never decayed)
    flat, tail_median, tail_sigma = _tail_noise(y)
    offset = tail_median if flat and abs(tail_median) <= 10.0 * tail_sigma else 0.0
    sigma_floor = float(noise_floor_A) if noise_floor_A is not None else tail_sigma
    strong = np.abs(y) > 5.0 * sigma_floor
    if strong.sum() >= min_points and np.mean(y[strong] < 0) > 0.9:
        return _rejected("current sign contradicts the bias", n_in, noise_floor_A=sigma_floor)
    y = y - offset

    # (2) saturation
    mag = np.abs(raw)
    if current_limit_A is not None and current_limit_A > 0:
        limit = float(current_limit_A)
        saturated = mag >= 0.999 * limit
    else:
        top = float(mag.max())
        at_top = mag >= top * (1.0 - 1e-9)
        limit = top if at_top.sum() >= 3 else math.inf
        saturated = at_top if at_top.sum() >= 3 else np.zeros_like(at_top)

    # (3) candidates above the floor
    threshold = floor_threshold_sigma * sigma_floor
    above = (y > threshold) & (y > 0)
    known = dict(noise_floor_A=sigma_floor, offset_A=offset * sign)
    if (above & ~saturated).sum() < min_points:
        reason = "below noise floor" if (~saturated).sum() >= min_points else "saturated"
        return _rejected(reason, n_in, **known)
    good = above & ~saturated
    logy = np.log(np.where(y > 0, y, 1.0))

    # does the current decay at all?  (a plain line through the candidates, white-noise error)
    zg, lg = z[good], logy[good]
    xg = _line_design(zg)
    coef = np.linalg.lstsq(xg, lg, rcond=None)[0]
    dof = max(zg.size - 2, 1)
    se_slope = math.sqrt(float(np.sum((lg - xg @ coef) ** 2)) / dof
                         / max(float(np.sum((zg - zg.mean()) ** 2)), 1e-300))
    if coef[1] > 5.0 * se_slope:
        return _rejected("current increases on retract", n_in, **known)
    if coef[1] > -5.0 * se_slope:
        return _rejected("current does not decay on retract", n_in, **known)

    # (4) the span: the longest run of candidates (gaps of up to two samples bridged, so that a
    # noise dip at the far end does not cut it); then local slopes trim a levelled-off close end
    # (contact) and far end. Anomalies inside the span stay: the tip-change test judges them.
    bridged = good.copy()
    for lo, hi in _runs(~good):
        if hi - lo <= 2 and lo > 0 and hi < good.size:
            bridged[lo:hi] = True
    start, stop = max(_runs(bridged), key=lambda r: (r[1] - r[0], -r[0]))
    w = min(SLOPE_WINDOW, max(3, (stop - start) // 3))
    slopes = _local_slopes(z, logy, good, w)
    valid = np.isfinite(slopes)
    valid[:start] = False
    valid[stop:] = False
    if valid.sum() == 0:
        return _rejected("too few points", n_in, **known)
    med = float(np.median(slopes[valid]))
    if med >= 0:
        return _rejected("current increases on retract", n_in, **known)
    flattened = valid & (slopes > FLAT_SLOPE_FRACTION * med)
    # steady = inside a run of at least one window of tunnelling-like slopes (one lucky window
    # inside a noisy plateau does not count)
    steady_runs = [r for r in _runs(valid & ~flattened) if r[1] - r[0] >= w]
    if not steady_runs:
        return _rejected("bad fit", n_in, **known)
    first_steady, last_steady = steady_runs[0][0], steady_runs[-1][1] - 1
    contact_samples = int(flattened[start:first_steady].sum())
    far_trimmed = bool(flattened[last_steady + 1:stop].any())
    block_start = first_steady if contact_samples else start
    block_stop = last_steady + 1 if far_trimmed else stop
    block = np.zeros(z.size, bool)
    block[block_start:block_stop] = True
    block &= good
    # past a contact the junction is in series with the contact conductance (plateau I_c), so
    # I = I_t·I_c/(I_t + I_c): keep currents below CONTACT_MARGIN·I_c and undo the series
    # resistance there, I_t = I·I_c/(I_c − I)
    contact_limit = math.inf
    contact_current = math.inf
    if contact_samples:
        contact_current = float(np.median(y[start:start + 5]))
        contact_limit = CONTACT_MARGIN * contact_current
        block &= y < contact_limit

    def junction_log(yv: np.ndarray) -> np.ndarray:
        yv = np.where(yv > 0, yv, 1.0)
        if math.isfinite(contact_current):
            yv = yv * contact_current / np.maximum(contact_current - yv, 1e-300)
        return np.log(yv)

    logy = junction_log(y)
    if block.sum() < max(min_points, 3):
        return _rejected("too few points", n_in, contact_samples=contact_samples, **known)

    # first fit on the block, relative noise from its high-current part
    def noise_weights(fitted_mag: np.ndarray, frac: float) -> np.ndarray:
        return 1.0 / (frac**2 + (sigma_floor / fitted_mag) ** 2)

    first = _robust_line(z[block], logy[block], np.ones(int(block.sum())))
    fitted = np.exp(first.a + first.b * z)
    # offset again, from every sample whose fitted signal is below the floor σ, with that signal
    # taken out (a decaying signal left in the tail would pass for an offset and steepen the far
    # end); its standard error is carried into the slope's uncertainty below
    quiet = fitted < max(sigma_floor, 1e-300)
    if quiet.sum() >= 10:
        offset = float(np.median(sign * raw[quiet] - fitted[quiet]))
        sigma_offset = math.sqrt(math.pi / 2.0) * sigma_floor / math.sqrt(int(quiet.sum()))
    else:
        offset, sigma_offset = 0.0, 0.0
    y = sign * raw - offset
    logy = junction_log(y)
    known["offset_A"] = offset * sign
    # final range from the fitted line, not from the noisy samples
    index = np.arange(z.size)
    in_model = ((fitted > threshold) & (fitted < SATURATION_MARGIN * limit)
                & (fitted < contact_limit))
    usable_sorted = in_model & (index >= block_start) & ~saturated & (y > 0)
    if far_trimmed:  # never extend past a levelled-off stretch on the retracted side
        usable_sorted &= index < block_stop
    n_use = int(usable_sorted.sum())
    usable = np.zeros(n_in, bool)
    usable[idx[usable_sorted]] = True
    if n_use < min_points:
        return _rejected("too few points", n_in, usable=usable, contact_samples=contact_samples,
                         **known)

    zu = z[usable_sorted]

    def fit_range() -> tuple[_LineFit, np.ndarray, float, float]:
        yy = y[usable_sorted]
        # ln of (signal + floor noise) is biased by −σ²/(2I²): add it back (second-order delta)
        lu = junction_log(yy) + 0.5 * (sigma_floor / fitted[usable_sorted]) ** 2
        fit = _robust_line(zu, lu, np.ones(n_use))
        model_mag = np.exp(fit.a + fit.b * zu)
        floor_part = (sigma_floor / model_mag) ** 2
        top = model_mag >= np.quantile(model_mag, 0.75)  # start: f from the strongest quarter
        r = lu - np.log(model_mag)
        frac2 = max(float(np.median(r[top] ** 2 - floor_part[top])) / 0.4549, 1e-8)
        rho = 0.0
        for _ in range(2):  # weighted refit, then the noise model from its residuals
            fit = _robust_line(zu, lu, noise_weights(model_mag, math.sqrt(frac2)))
            model_mag = np.exp(fit.a + fit.b * zu)
            floor_part = (sigma_floor / model_mag) ** 2
            r = lu - np.log(model_mag)
            frac2, rho = _noise_model(_line_design(zu), r, fit.weights, floor_part, frac2)
        frac = math.sqrt(frac2)
        return fit, lu, frac, rho

    fit, lu, frac, rho = fit_range()
    if sigma_offset > 0:  # slope's sensitivity to the offset, times the offset's error
        yy = np.maximum(y[usable_sorted] - sigma_offset, 1e-300)
        shifted = junction_log(yy) + 0.5 * (sigma_floor / fitted[usable_sorted]) ** 2
        offset_var_b = float(_wls(_line_design(zu), shifted, fit.weights)[1] - fit.b) ** 2
    else:
        offset_var_b = 0.0
    floor_var = (sigma_floor / np.exp(fit.a + fit.b * zu)) ** 2
    resid = lu - (fit.a + fit.b * zu)
    var_corr = _slope_variance(zu, fit.weights, frac**2, floor_var, rho)
    var_white = _slope_variance(zu, fit.weights, frac**2, floor_var, 0.0)
    # the noise model is itself estimated from the residuals: with ν effective degrees of
    # freedom the normalised error is Student-t like, of variance ν/(ν − 2); ν from the Kish
    # effective sample size of the weights, reduced by the correlation's variance inflation
    n_eff = float(np.sum(fit.weights)) ** 2 / float(np.sum(fit.weights**2))
    nu = max(n_eff * var_white / max(var_corr, 1e-300) - 2.0, 3.0)
    var_b = var_corr * nu / (nu - 2.0) + offset_var_b
    sigma_b = math.sqrt(var_b)
    b = fit.b
    phi = float(physics.apparent_barrier_eV(b))
    sigma_phi = 2.0 * phi * sigma_b / abs(b) if b != 0 else math.inf
    rms = float(np.sqrt(np.mean(resid**2)))

    # tip change: one line against two independent lines split at the best sample. The noise is
    # re-estimated from the two-line residuals, since a jump inflates the one-line estimate.
    m_seg = max(4, min_points // 2)
    d_rss, split = _two_segment_statistic(zu, lu, 1.0 / (frac**2 + floor_var), m_seg)
    tip_stat = 0.0
    if split > 0:
        x2 = np.zeros((n_use, 4))
        x2[:split, :2] = _line_design(zu[:split])
        x2[split:, 2:] = _line_design(zu[split:])
        w2 = 1.0 / (frac**2 + floor_var)
        r2 = lu - x2 @ _wls(x2, lu, w2)
        f2_two, rho_two = _noise_model(x2, r2, w2, floor_var, frac**2)
        w_two = 1.0 / (f2_two + floor_var)
        d_rss, _ = _two_segment_statistic(zu, lu, w_two, m_seg)
        infl_two = (_slope_variance(zu, w_two, f2_two, floor_var, rho_two)
                    / _slope_variance(zu, w_two, f2_two, floor_var, 0.0))
        tip_stat = math.sqrt(d_rss / max(infl_two, 1.0))

    reason = ""
    if b >= 0:
        reason = "current increases on retract"
    elif reject_contact_curves and contact_samples >= 3:
        reason = "contact"
    elif tip_stat > tip_change_threshold_sigma:
        reason = "tip change"
    elif not (PLAUSIBLE_PHI_EV[0] <= phi <= PLAUSIBLE_PHI_EV[1]) or not (
            sigma_phi <= MAX_RELATIVE_UNCERTAINTY * phi):
        reason = "bad fit"
    return CurveFit(
        phi_ap_eV=phi,
        phi_ap_uncertainty_eV=float(sigma_phi),
        decay_constant_per_m=-0.5 * b,
        slope_per_m=b,
        slope_uncertainty_per_m=sigma_b,
        log_current_at_zero=fit.a,
        z_min_m=float(zu[0]),
        z_max_m=float(zu[-1]),
        n_points=n_use,
        rms_residual=rms,
        accepted=reason == "",
        reason=reason,
        noise_floor_A=sigma_floor,
        offset_A=offset * sign,
        relative_noise=frac,
        residual_correlation=rho,
        tip_change_statistic=tip_stat,
        contact_samples=contact_samples,
        usable=usable,
    )


# --------------------------------------------------------------------------------------------
# bias correction with the numerical WKB model
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BarrierModelFit:
    """Barrier height from fitting the numerical WKB model to a curve's fit range.

    Attributes
    ----------
    phi_eV, phi_uncertainty_eV : float
        Model barrier height φ (the electrodes' work function in the model) and its standard
        uncertainty, eV.
    phi_ap_eV : float
        The curve's apparent barrier height, eV.
    correction_eV : float
        φ − φ_ap: how much bias (and image force, for that profile) lowered the apparent value.
    profile : str
        Barrier profile of the model.
    bias_V : float
        Bias of the curve.
    gap_at_zero_m : float
        Absolute gap assumed at z = 0, m.
    """

    phi_eV: float
    phi_uncertainty_eV: float
    phi_ap_eV: float
    correction_eV: float
    profile: str
    bias_V: float
    gap_at_zero_m: float


def fit_barrier_model(
    z_m: np.ndarray,
    current_A: np.ndarray,
    *,
    bias_V: float,
    fit: CurveFit | None = None,
    profile: str = "trapezoid",
    gap_at_zero_m: float | None = None,
    temperature_K: float = 0.0,
    eps_r: float = 1.0,
    **fit_options: Any,
) -> BarrierModelFit:
    """Bias-corrected barrier height: the WKB model whose apparent barrier matches the curve's.

    Parameters
    ----------
    z_m, current_A : numpy.ndarray
        The curve (as for :func:`fit_approach_curve`).
    bias_V : float
        Its bias, V.
    fit : CurveFit, optional
        The curve's fit (computed with ``fit_options`` when not given).
    profile : {"trapezoid", "image-force"}
        Barrier shape of the model (:func:`pipeline.physics.wkb_current`).
    gap_at_zero_m : float, optional
        Absolute gap at z = 0. Unset: the gap at which one conductance channel carries the
        fitted current at z = 0 (:func:`pipeline.physics.gap_for_current`), recomputed for each
        trial φ.
    temperature_K, eps_r : float
        Passed to the model.
    **fit_options
        Passed to :func:`fit_approach_curve` when ``fit`` is not given.

    Returns
    -------
    BarrierModelFit

    Raises
    ------
    ProcessingError
        If the curve has no fitted slope or no model barrier reproduces it.

    Notes
    -----
    The model current through a trapezoidal (optionally image-force-lowered) barrier is
    evaluated at the fit range's gaps and its ln is fitted by a line with the same noise weights
    as the data; φ is the root of φ_ap,model(φ) = φ_ap,data (Brent's method). As ln I_model is
    almost exactly linear in z over a fit range, this is the least-squares fit of the model's
    decay. The uncertainty is σ_φ = σ_φap / (dφ_ap,model/dφ). At low bias (trapezoid) the
    correction vanishes, as the model reduces to the exponential law.

    References
    ----------
    J. G. Simmons, J. Appl. Phys. 34, 1793 (1963), doi:10.1063/1.1702682.
    """
    z = np.asarray(z_m, dtype=float)
    if fit is None:
        fit = fit_approach_curve(z, current_A, bias_V=bias_V, **fit_options)
    if not (math.isfinite(fit.phi_ap_eV) and fit.n_points >= 2):
        raise ProcessingError(f"fit_barrier_model: the curve has no fitted slope ({fit.reason})")
    zu = z[fit.usable]
    mag = np.exp(fit.log_current_at_zero + fit.slope_per_m * zu)
    weights = 1.0 / (max(fit.relative_noise, 1e-4) ** 2 + (fit.noise_floor_A / mag) ** 2)
    i_zero = math.exp(fit.log_current_at_zero)

    def gap0(phi: float) -> float:
        if gap_at_zero_m is not None:
            return float(gap_at_zero_m)
        return physics.gap_for_current(i_zero, bias_V, phi, profile=profile)

    def model_phi_ap(phi: float) -> float:
        gaps = np.maximum(gap0(phi) + zu, 0.02e-9)
        cur = np.abs(physics.wkb_current(gaps, bias_V, phi_eV=phi, profile=profile,
                                         eps_r=eps_r, temperature_K=temperature_K))
        slope = _wls(_line_design(zu), np.log(cur), weights)[1]
        return float(physics.apparent_barrier_eV(slope))

    target = fit.phi_ap_eV
    lo = max(0.3, 0.8 * target)
    hi = target + 1.0
    try:
        while model_phi_ap(lo) > target and lo > 0.3:
            lo = max(0.3, 0.7 * lo)
        while model_phi_ap(hi) < target:
            hi += 2.0
            if hi > 40.0:
                raise ProcessingError(
                    f"fit_barrier_model: no barrier up to 40 eV gives phi_ap = {target:.3g} eV "
                    f"at {bias_V:g} V with profile {profile!r}")
        phi = float(optimize.brentq(lambda p: model_phi_ap(p) - target, lo, hi, xtol=1e-5))
    except ProcessingError as exc:
        raise ProcessingError(f"fit_barrier_model: {exc}") from None
    h = 0.01
    slope = (model_phi_ap(phi + h) - model_phi_ap(phi - h)) / (2 * h)
    sigma = fit.phi_ap_uncertainty_eV / slope if slope > 0 else math.inf
    return BarrierModelFit(phi_eV=phi, phi_uncertainty_eV=float(sigma), phi_ap_eV=target,
                           correction_eV=phi - target, profile=profile, bias_V=float(bias_V),
                           gap_at_zero_m=gap0(phi))


# --------------------------------------------------------------------------------------------
# a curve set -> a table
# --------------------------------------------------------------------------------------------

_TABLE_VARS: dict[str, tuple[str, str]] = {
    "phi_ap_eV": ("eV", "apparent barrier height"),
    "phi_ap_uncertainty_eV": ("eV", "standard uncertainty of the apparent barrier height"),
    "decay_constant_per_m": ("1/m", "decay constant kappa = -(1/2) dln|I|/dz"),
    "slope_per_m": ("1/m", "slope dln|I|/dz over the fit range"),
    "slope_uncertainty_per_m": ("1/m", "standard uncertainty of the slope"),
    "log_current_at_zero": ("1", "fitted ln(|I|/A) at z = 0"),
    "z_min_m": ("m", "closest tip displacement of the fit range"),
    "z_max_m": ("m", "farthest tip displacement of the fit range"),
    "n_points": ("1", "samples in the fit range"),
    "rms_residual": ("1", "RMS residual of ln|I| in the fit range"),
    "noise_floor_A": ("A", "additive current noise (standard deviation) used"),
    "relative_noise": ("1", "estimated relative noise of the current"),
    "bias_V": ("V", "sample bias"),
}


def _curve_ids(curves: xr.Dataset) -> list[str]:
    base = str(curves.attrs.get("curve_set_id") or curves.attrs.get("source_stem") or "curves")
    return [f"{base}#{k}" for k in range(curves.sizes["curve"])]


@stage(version="1")
def fit_curves(
    curves: xr.Dataset,
    *,
    min_points: int = 8,
    noise_floor_A: float | None = None,
    current_limit_A: float | None = None,
    floor_threshold_sigma: float = 5.0,
    tip_change_threshold_sigma: float = 8.0,
    reject_contact_curves: bool = True,
    bias_correction: bool = False,
    barrier_profile: str = "trapezoid",
) -> xr.Dataset:
    """Fit every curve of a curve dataset; return the table of fits (dim ``curve``).

    Parameters
    ----------
    curves : xarray.Dataset
        Validated curves (dims ``curve, sample``; :func:`pipeline.model.validate_curves`).
    min_points, noise_floor_A, floor_threshold_sigma : optional
        As for :func:`fit_approach_curve`.
    tip_change_threshold_sigma, reject_contact_curves : optional
        As for :func:`fit_approach_curve`.
    current_limit_A : float, optional
        Preamplifier limit; unset = the dataset's ``current_limit_A`` attribute, else detected.
    bias_correction : bool
        Also fit the WKB model (:func:`fit_barrier_model`) to accepted curves and add
        ``phi_model_eV``, ``phi_model_uncertainty_eV``.
    barrier_profile : {"trapezoid", "image-force"}
        Profile of that model.

    Returns
    -------
    xarray.Dataset
        Variables ``phi_ap_eV``, ``phi_ap_uncertainty_eV``, ``decay_constant_per_m``,
        ``slope_per_m``, ``slope_uncertainty_per_m``, ``log_current_at_zero``, ``z_min_m``,
        ``z_max_m``, ``n_points`` (int32), ``rms_residual``,
        ``noise_floor_A``, ``relative_noise``, ``bias_V``, ``accepted`` (uint8), ``reason``,
        ``curve_id``, ``source_file``, ``time`` (strings), and ``position_x_m``/``position_y_m``
        when the curves carry positions; attrs ``kind = "curve_fits"`` and the provenance.
        Writable with ``to_netcdf(engine="h5netcdf")``.

    Notes
    -----
    One :func:`fit_approach_curve` per curve (a loop over curves, each fit vectorised over its
    samples). The input is not modified.
    """
    if "curve" not in curves.dims or "sample" not in curves.dims:
        raise ShapeError(f"fit_curves: {curves.attrs.get('source_file', '<curves>')}: expected "
                         f"dims (curve, sample), got {tuple(curves.dims)}")
    src = str(curves.attrs.get("source_file", ""))
    bias = float(curves.attrs["bias_V"])
    limit = current_limit_A if current_limit_A is not None else curves.attrs.get(
        "current_limit_A")
    limit = float(limit) if limit is not None else None
    z = np.asarray(curves["z"].values, dtype=float)
    cur = np.asarray(curves["current"].values, dtype=float)
    n = z.shape[0]
    fits = [fit_approach_curve(z[k], cur[k], bias_V=bias, current_limit_A=limit,
                               noise_floor_A=noise_floor_A, min_points=min_points,
                               floor_threshold_sigma=floor_threshold_sigma,
                               tip_change_threshold_sigma=tip_change_threshold_sigma,
                               reject_contact_curves=reject_contact_curves) for k in range(n)]
    data: dict[str, Any] = {}
    for name, (units, long) in _TABLE_VARS.items():
        if name == "bias_V":
            values = np.full(n, bias)
        else:
            values = np.array([getattr(f, name) for f in fits], dtype=float)
        if name == "n_points":
            values = values.astype(np.int32)
        data[name] = ("curve", values, {"units": units, "long_name": long})
    data["accepted"] = ("curve", np.array([f.accepted for f in fits], dtype=np.uint8),
                        {"long_name": "curve used for the run estimate (1) or not (0)"})
    data["reason"] = ("curve", np.array([f.reason for f in fits], dtype=str),
                      {"long_name": "why the curve was not used (empty when used)"})
    data["curve_id"] = ("curve", np.array(_curve_ids(curves), dtype=str),
                        {"long_name": "curve identifier (curve set # index)"})
    data["source_file"] = ("curve", np.array([src] * n, dtype=str), {"long_name": "source file"})
    data["time"] = ("curve", np.array([str(curves.attrs.get("start_time", ""))] * n, dtype=str),
                    {"long_name": "start time of the curve set (ISO 8601)"})
    for axis in ("x", "y"):
        key = f"position_{axis}_m"
        if key in curves.attrs:
            pos = np.broadcast_to(np.asarray(curves.attrs[key], dtype=float), (n,)).copy()
            data[key] = ("curve", pos, {"units": "m", "long_name": f"tip position {axis}"})
    if bias_correction:
        phi_m = np.full(n, np.nan)
        sig_m = np.full(n, np.nan)
        for k, f in enumerate(fits):
            if f.accepted:
                try:
                    m = fit_barrier_model(z[k], cur[k], bias_V=bias, fit=f,
                                          profile=barrier_profile)
                except ProcessingError:
                    continue
                phi_m[k], sig_m[k] = m.phi_eV, m.phi_uncertainty_eV
        data["phi_model_eV"] = ("curve", phi_m, {
            "units": "eV", "long_name": f"bias-corrected barrier height ({barrier_profile} WKB)"})
        data["phi_model_uncertainty_eV"] = ("curve", sig_m, {
            "units": "eV", "long_name": "standard uncertainty of phi_model_eV"})
    attrs = {"kind": "curve_fits", "source_file": src,
             "curve_set_id": str(curves.attrs.get("curve_set_id", ""))}
    if bias_correction:
        attrs["barrier_profile"] = barrier_profile
    return xr.Dataset(data, attrs=attrs)


def combine_fit_tables(tables: Sequence[xr.Dataset]) -> xr.Dataset:
    """Concatenate the fit tables of several curve files along ``curve`` (one run table)."""
    if not tables:
        raise ProcessingError("combine_fit_tables: no tables to combine")
    return xr.concat(list(tables), dim="curve", data_vars="all", coords="minimal",
                     compat="override", combine_attrs="drop_conflicts", join="outer",
                     fill_value={"accepted": 0})


# --------------------------------------------------------------------------------------------
# the run's estimate
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class WorkFunctionEstimate:
    """The barrier height a run's height conversion uses, with its provenance.

    Attributes
    ----------
    work_function_eV, work_function_uncertainty_eV : float
        φ in 2κ = 1.0246 Å⁻¹·√(φ/eV) at the run's bias (the apparent barrier height), and its
        standard uncertainty, eV.
    method : str
        ``"approach-curves"``, ``"fixed"`` or ``"two-setpoint"``.
    n_curves_used : int
        Curves in the estimate.
    rejected : list of (str, str)
        (curve id, reason) of every curve left out, by the fit or as an outlier.
    birge_ratio : float
        √(χ²/(k − 1)) of the accepted curves about their weighted mean (≈ 1 when the curves
        agree within their uncertainties; NaN for fewer than two curves).
    scatter_eV : float
        Between-curve standard deviation τ beyond the fit uncertainties (DerSimonian–Laird).
    model_work_function_eV, model_work_function_uncertainty_eV : float or None
        Bias-corrected barrier from the WKB model (when the table has ``phi_model_eV``).
    note : str
        Why a fixed value was used, or other remarks.
    """

    work_function_eV: float
    work_function_uncertainty_eV: float
    method: str
    n_curves_used: int = 0
    rejected: list[tuple[str, str]] = field(default_factory=list)
    birge_ratio: float = math.nan
    scatter_eV: float = 0.0
    model_work_function_eV: float | None = None
    model_work_function_uncertainty_eV: float | None = None
    note: str = ""

    @classmethod
    def fixed(cls, work_function_eV: float, work_function_uncertainty_eV: float, *,
              note: str = "", rejected: Sequence[tuple[str, str]] = ()) -> WorkFunctionEstimate:
        """A configured value (``[barrier] source = "fixed"``, or a run without usable curves)."""
        return cls(float(work_function_eV), float(work_function_uncertainty_eV), "fixed",
                   rejected=list(rejected), note=note)

    def updated_table(self, table: xr.Dataset) -> xr.Dataset:
        """A copy of ``table`` with ``accepted``/``reason`` updated for the outlier rejections."""
        out = table.copy(deep=True)
        ids = [str(c) for c in out["curve_id"].values]
        accepted = out["accepted"].values.copy()
        reason = out["reason"].values.astype(object)
        for cid, why in self.rejected:
            if cid in ids:
                k = ids.index(cid)
                accepted[k] = 0
                reason[k] = why
        out["accepted"] = (("curve",), accepted.astype(np.uint8), dict(out["accepted"].attrs))
        out["reason"] = (("curve",), np.array(reason.tolist(), dtype=str),
                         dict(out["reason"].attrs))
        return out

    def to_attrs(self) -> dict[str, Any]:
        """Attributes of the store's ``run`` group (DESIGN.md §4)."""
        attrs: dict[str, Any] = {
            "work_function_eV": self.work_function_eV,
            "work_function_uncertainty_eV": self.work_function_uncertainty_eV,
            "barrier_method": self.method,
            "barrier_curves_used": self.n_curves_used,
            "barrier_curves_rejected": len(self.rejected),
        }
        if math.isfinite(self.birge_ratio):
            attrs["barrier_birge_ratio"] = self.birge_ratio
        attrs["barrier_scatter_eV"] = self.scatter_eV
        if self.model_work_function_eV is not None:
            attrs["work_function_model_eV"] = self.model_work_function_eV
            attrs["work_function_model_uncertainty_eV"] = self.model_work_function_uncertainty_eV
        if self.note:
            attrs["barrier_note"] = self.note
        return attrs


def _dl_tau2(phi: np.ndarray, var: np.ndarray) -> float:
    """DerSimonian–Laird between-study variance τ² (0 when the scatter is within errors)."""
    k = phi.size
    if k < 2:
        return 0.0
    w = 1.0 / var
    mu = np.sum(w * phi) / np.sum(w)
    q = float(np.sum(w * (phi - mu) ** 2))
    denom = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    return max(0.0, (q - (k - 1)) / denom) if denom > 0 else 0.0


def _random_effects(phi: np.ndarray, var: np.ndarray) -> tuple[float, float, float, float]:
    """(mean, standard error, τ, Birge ratio) of a random-effects weighted mean.

    The standard error uses the Knapp–Hartung factor max(1, √(Q*/(k − 1))), so a scatter that
    τ does not fully capture still widens it.
    """
    k = phi.size
    tau2 = _dl_tau2(phi, var)
    w = 1.0 / (var + tau2)
    mu = float(np.sum(w * phi) / np.sum(w))
    se = math.sqrt(1.0 / float(np.sum(w)))
    if k >= 2:
        q_star = float(np.sum(w * (phi - mu) ** 2))
        se *= max(1.0, math.sqrt(q_star / (k - 1)))
        w0 = 1.0 / var
        mu0 = np.sum(w0 * phi) / np.sum(w0)
        birge = math.sqrt(float(np.sum(w0 * (phi - mu0) ** 2)) / (k - 1))
    else:
        birge = math.nan
    return mu, se, math.sqrt(tau2), birge


def _leave_one_out_z(phi: np.ndarray, var: np.ndarray) -> np.ndarray:
    """Deviation of each curve from the random-effects mean of all the others, in σ.

    σ combines the curve's own variance, the others' τ² and the uncertainty of their mean,
    so a single outlier cannot hide by inflating the scatter it is judged against.
    """
    k = phi.size
    w = 1.0 / var
    sw, swp, swp2, sw2 = w.sum(), (w * phi).sum(), (w * phi**2).sum(), (w**2).sum()
    s_i, sp_i, sp2_i, s2_i = sw - w, swp - w * phi, swp2 - w * phi**2, sw2 - w**2
    q_i = sp2_i - sp_i**2 / s_i
    denom = s_i - s2_i / s_i
    with np.errstate(divide="ignore", invalid="ignore"):
        tau2_i = np.where(denom > 0, np.maximum(0.0, (q_i - (k - 2)) / denom), 0.0)
    others = ~np.eye(k, dtype=bool)
    w_star = np.where(others, 1.0 / (var[None, :] + tau2_i[:, None]), 0.0)  # (i, j)
    mu_i = (w_star * phi[None, :]).sum(axis=1) / w_star.sum(axis=1)
    var_mu_i = 1.0 / w_star.sum(axis=1)
    return (phi - mu_i) / np.sqrt(var + tau2_i + var_mu_i)


def estimate_work_function(
    table: xr.Dataset,
    *,
    outlier_threshold_sigma: float = 3.0,
) -> WorkFunctionEstimate:
    """Combine a run's curve fits into one barrier height, rejecting outliers by name.

    Parameters
    ----------
    table : xarray.Dataset
        A fit table (:func:`fit_curves`, or several combined with :func:`combine_fit_tables`).
    outlier_threshold_sigma : float
        A curve deviating from the mean of the others by more than this many σ is rejected;
        repeated, worst first, while at least three curves remain.

    Returns
    -------
    WorkFunctionEstimate
        ``method = "approach-curves"``; ``rejected`` names every left-out curve and why.

    Raises
    ------
    ProcessingError
        If no curve is usable (the caller then falls back to the configured fixed value,
        :meth:`WorkFunctionEstimate.fixed`, listing the reasons).

    Notes
    -----
    Outliers: each curve is compared with the random-effects mean of all the others
    (leave-one-out, vectorised), with σ² = σᵢ² + τ² + var(mean); the worst beyond the threshold
    is rejected and the test repeated. Estimate: random-effects weighted mean with weights
    1/(σᵢ² + τ²), τ² by DerSimonian–Laird; its standard error carries the Knapp–Hartung factor,
    so it is honest both when the curves agree within their fit uncertainties (τ = 0, Birge
    ratio ≈ 1) and when tips or sites genuinely differ (τ > 0).

    References
    ----------
    R. T. Birge, Phys. Rev. 40, 207 (1932), doi:10.1103/PhysRev.40.207;
    R. DerSimonian and N. Laird, Control. Clin. Trials 7, 177 (1986),
    doi:10.1016/0197-2456(86)90046-2; G. Knapp and J. Hartung, Stat. Med. 22, 2693 (2003),
    doi:10.1002/sim.1482.
    """
    ids = [str(c) for c in table["curve_id"].values]
    phi_all = np.asarray(table["phi_ap_eV"].values, dtype=float)
    sig_all = np.asarray(table["phi_ap_uncertainty_eV"].values, dtype=float)
    reasons = [str(r) for r in table["reason"].values]
    ok = (np.asarray(table["accepted"].values).astype(bool) & np.isfinite(phi_all)
          & np.isfinite(sig_all) & (sig_all > 0))
    rejected = [(ids[k], reasons[k] or "no valid fit") for k in np.flatnonzero(~ok)]
    if not ok.any():
        summary = ", ".join(sorted({r for _, r in rejected})) or "no curves"
        raise ProcessingError(
            f"estimate_work_function: none of {len(ids)} curve(s) is usable ({summary})")
    kept = np.flatnonzero(ok)
    while kept.size >= 3:
        zs = _leave_one_out_z(phi_all[kept], sig_all[kept] ** 2)
        worst = int(np.argmax(np.abs(zs)))
        if abs(zs[worst]) <= outlier_threshold_sigma:
            break
        k = int(kept[worst])
        rejected.append((ids[k], f"outlier: {zs[worst]:+.1f} sigma from the other curves' mean"))
        kept = np.delete(kept, worst)
    mu, se, tau, birge = _random_effects(phi_all[kept], sig_all[kept] ** 2)
    model_mu = model_se = None
    if "phi_model_eV" in table:
        pm = np.asarray(table["phi_model_eV"].values, dtype=float)[kept]
        sm = np.asarray(table["phi_model_uncertainty_eV"].values, dtype=float)[kept]
        good = np.isfinite(pm) & np.isfinite(sm) & (sm > 0)
        if good.any():
            model_mu, model_se, _, _ = _random_effects(pm[good], sm[good] ** 2)
    return WorkFunctionEstimate(
        work_function_eV=mu, work_function_uncertainty_eV=se, method="approach-curves",
        n_curves_used=int(kept.size), rejected=rejected, birge_ratio=birge, scatter_eV=tau,
        model_work_function_eV=model_mu, model_work_function_uncertainty_eV=model_se)


# --------------------------------------------------------------------------------------------
# two setpoints, maps
# --------------------------------------------------------------------------------------------


def _frame_name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def two_setpoint_work_function(frame_a: xr.Dataset, frame_b: xr.Dataset) -> WorkFunctionEstimate:
    """Barrier height from two constant-current frames of one area at different setpoints.

    Parameters
    ----------
    frame_a, frame_b : xarray.Dataset
        Validated raw constant-current frames (``z`` in m) of the same area, shape and bias,
        recorded one after the other at setpoints I₁ and I₂.

    Returns
    -------
    WorkFunctionEstimate
        ``method = "two-setpoint"``.

    Raises
    ------
    ProcessingError
        If the frames are not constant-current, differ in bias, shape or area, have (nearly)
        equal setpoints, or the tip did not approach at the larger setpoint.

    Notes
    -----
    The feedback holds I = I_set, so the tip height changes by Δz = z₂ − z₁ = −ln(I₂/I₁)/(2κ)
    between the frames, whatever the surface: 2κ = −ln(I₂/I₁)/Δz and φ = (2κ/1.0246 Å⁻¹)² eV.
    Δz is the median of the per-line medians of z₂ − z₁ (robust to adsorbates and line
    glitches); its standard error is taken from the spread of those line medians, which also
    absorbs slow z drift during the frames. z creep between the two frames biases Δz directly:
    record them back to back.

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57; C. J. Chen, *Introduction to Scanning Tunneling
    Microscopy*, 2nd ed. (Oxford, 2008), §1.
    """
    na, nb = _frame_name(frame_a), _frame_name(frame_b)
    for ds, name in ((frame_a, na), (frame_b, nb)):
        if ds.attrs.get("mode") != "constant-current" or "z" not in ds:
            raise ProcessingError(f"two-setpoint: frame {name} is not a constant-current frame "
                                  "with a 'z' channel")
        if str(ds["z"].attrs.get("units", "m")) != "m":
            raise ProcessingError(f"two-setpoint: frame {name}: z must be in m (validate it)")
    va, vb = float(frame_a.attrs["bias_V"]), float(frame_b.attrs["bias_V"])
    if not math.isclose(va, vb, rel_tol=0.01):
        raise ProcessingError(f"two-setpoint: frames {na} ({va:g} V) and {nb} ({vb:g} V) must "
                              "share one bias")
    ia, ib = float(frame_a.attrs["setpoint_A"]), float(frame_b.attrs["setpoint_A"])
    if ia * ib <= 0 or abs(math.log(ib / ia)) < 0.1:
        raise ProcessingError(
            f"two-setpoint: setpoints {ia:.3g} A ({na}) and {ib:.3g} A ({nb}) must have one sign "
            "and differ by more than 10 %")
    if frame_a["z"].shape != frame_b["z"].shape:
        raise ProcessingError(f"two-setpoint: frames {na} {frame_a['z'].shape} and {nb} "
                              f"{frame_b['z'].shape} must have the same shape")
    for key in ("scan_size_x_m", "scan_size_y_m", "scan_center_x_m", "scan_center_y_m"):
        a, b = float(frame_a.attrs.get(key, 0.0)), float(frame_b.attrs.get(key, 0.0))
        size = float(frame_a.attrs["scan_size_x_m"])
        if abs(a - b) > 0.01 * size:
            raise ProcessingError(f"two-setpoint: frames {na} and {nb} differ in {key} "
                                  f"({a:.4g} vs {b:.4g} m): not the same area")
    dz = np.asarray(frame_b["z"].values, float) - np.asarray(frame_a["z"].values, float)
    with np.errstate(all="ignore"):
        rows = np.nanmedian(np.where(np.isfinite(dz), dz, np.nan), axis=1)
    rows = rows[np.isfinite(rows)]
    if rows.size < 2:
        raise ProcessingError(f"two-setpoint: frames {na} and {nb} share fewer than 2 lines")
    delta = float(np.median(rows))
    se = math.sqrt(math.pi / 2.0) * _mad_sigma(rows) / math.sqrt(rows.size)
    two_kappa = -math.log(ib / ia) / delta if delta != 0 else -math.inf
    if not two_kappa > 0:
        raise ProcessingError(
            f"two-setpoint: z changed by {delta * 1e12:+.1f} pm from {na} to {nb} while the "
            f"setpoint went from {ia:.3g} to {ib:.3g} A; the tip must approach at the larger "
            "setpoint")
    phi = float(physics.work_function_from_decay(two_kappa / 2.0))
    sigma = 2.0 * phi * se / abs(delta)
    return WorkFunctionEstimate(phi, sigma, "two-setpoint",
                                note=f"frames {na} and {nb}: dz = {delta * 1e12:.2f} pm")


@stage(version="1")
def apparent_barrier_map(
    data: xr.Dataset,
    *,
    grid_tolerance_m: float = 1e-12,
    **fit_options: Any,
) -> xr.Dataset:
    """Per-pixel apparent barrier height φ_ap(y, x) with its uncertainty.

    Parameters
    ----------
    data : xarray.Dataset
        Either a frame (``kind = "frame"``) with a ``dlnI_dz_per_m`` channel, or with
        ``dI_dz_A_per_m`` and ``current`` (a z-modulation lock-in signal); or a grid of curves
        (``kind = "curve"``) with ``position_x_m``/``position_y_m`` attributes (one value per
        curve).
    grid_tolerance_m : float
        Curve positions closer than this are the same grid node.
    **fit_options
        Passed to :func:`fit_curves` for a grid of curves.

    Returns
    -------
    xarray.Dataset
        ``phi_ap_eV`` and ``phi_ap_uncertainty_eV`` (float32, dims ``y, x``, eV) with ``x``/``y``
        coordinates in m; for curves also ``accepted`` (uint8) and ``n_points``.

    Raises
    ------
    ProcessingError
        If the dataset has neither kind of input.

    Notes
    -----
    Frames: φ_ap = (ħ²/8mₑ)(d ln I/dz)² per pixel; the slope's noise σ_s is estimated once
    from pixel-to-pixel differences along the fast axis (MAD of first differences / √2, which
    assumes that the barrier varies slowly on the pixel scale) and propagated as
    σ_φ = 2(ħ²/8mₑ)|s|σ_s. Curves: one :func:`fit_approach_curve` per curve, placed on the grid
    of their distinct positions; rejected curves give NaN.

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57.
    """
    kind = data.attrs.get("kind")
    name = str(data.attrs.get("frame_id") or data.attrs.get("curve_set_id")
               or data.attrs.get("source_file") or "<data>")
    if kind == "frame":
        if "dlnI_dz_per_m" in data:
            s = np.asarray(data["dlnI_dz_per_m"].values, dtype=float)
        elif "dI_dz_A_per_m" in data and "current" in data:
            with np.errstate(divide="ignore", invalid="ignore"):
                s = (np.asarray(data["dI_dz_A_per_m"].values, float)
                     / np.asarray(data["current"].values, float))
        else:
            raise ProcessingError(
                f"apparent_barrier_map: frame {name} has no 'dlnI_dz_per_m' channel (nor "
                "'dI_dz_A_per_m' with 'current')")
        sigma_s = _mad_sigma(np.diff(s, axis=1).ravel()) / math.sqrt(2.0)
        phi = physics.apparent_barrier_eV(s)
        sig = 2.0 * physics.BARRIER_PREFACTOR_EV_M2 * np.abs(s) * sigma_s
        coords = {k: data.coords[k] for k in ("x", "y") if k in data.coords}
        out = xr.Dataset(
            {"phi_ap_eV": (("y", "x"), phi.astype(np.float32),
                           {"units": "eV", "long_name": "apparent barrier height"}),
             "phi_ap_uncertainty_eV": (("y", "x"), sig.astype(np.float32),
                                       {"units": "eV", "long_name": "standard uncertainty"})},
            coords=coords)
        out.attrs = {"kind": "barrier_map", "source": name,
                     "phi_ap_median_eV": float(np.nanmedian(phi))}
        return out
    if kind == "curve":
        if "position_x_m" not in data.attrs or "position_y_m" not in data.attrs:
            raise ProcessingError(f"apparent_barrier_map: curves {name} have no "
                                  "'position_x_m'/'position_y_m' attributes")
        n = data.sizes["curve"]
        px = np.broadcast_to(np.asarray(data.attrs["position_x_m"], float), (n,))
        py = np.broadcast_to(np.asarray(data.attrs["position_y_m"], float), (n,))
        table = fit_curves(data, **fit_options)

        def nodes(p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            order = np.sort(p)
            keep = np.concatenate([[True], np.diff(order) > grid_tolerance_m])
            levels = order[keep]
            return levels, np.searchsorted(levels, p - grid_tolerance_m)

        xs, ix = nodes(px)
        ys, iy = nodes(py)
        shape = (ys.size, xs.size)
        acc = np.asarray(table["accepted"].values).astype(bool)

        def grid(values: np.ndarray, fill: float, dtype: type) -> np.ndarray:
            g = np.full(shape, fill, dtype=dtype)
            g[iy, ix] = values
            return g

        phi = np.where(acc, table["phi_ap_eV"].values, np.nan)
        sig = np.where(acc, table["phi_ap_uncertainty_eV"].values, np.nan)
        out = xr.Dataset(
            {"phi_ap_eV": (("y", "x"), grid(phi, np.nan, np.float32),
                           {"units": "eV", "long_name": "apparent barrier height"}),
             "phi_ap_uncertainty_eV": (("y", "x"), grid(sig, np.nan, np.float32),
                                       {"units": "eV", "long_name": "standard uncertainty"}),
             "accepted": (("y", "x"), grid(acc.astype(np.uint8), 0, np.uint8),
                          {"long_name": "curve fit accepted (1) or not (0)"}),
             "n_points": (("y", "x"), grid(table["n_points"].values, 0, np.int32),
                          {"long_name": "samples in the fit range"})},
            coords={"x": ("x", xs, {"units": "m"}), "y": ("y", ys, {"units": "m"})})
        out.attrs = {"kind": "barrier_map", "source": name,
                     "phi_ap_median_eV": float(np.nanmedian(phi)) if acc.any() else math.nan}
        return out
    raise ProcessingError(f"apparent_barrier_map: {name}: kind {kind!r}; expected a frame with "
                          "a d ln I/dz channel or a grid of curves")
