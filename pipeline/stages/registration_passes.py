"""The two registration passes (private; public API in :mod:`pipeline.stages.registration`).

:func:`register_once` correlates two windowed images over the whole search range;
:func:`register_template` refines a small shift by a windowed normalised template match. Both
return a :class:`Pass`; :func:`pipeline.stages.registration.register_images` chains them.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from pipeline.stages.registration_core import (
    dft_block,
    irfft2_at,
    parabolic_peak,
    peak_value,
    prepare,
    upsample_peak,
    window,
    window_sums,
)
from pipeline.stages.registration_lattice import periodic_notch
from pipeline.stages.registration_quality import (
    energy,
    lobe_rivals,
    ls_covariance,
    raw_hessian,
    rival_gap_sd,
    uniqueness,
)
from pipeline.stages.registration_template import template_channels, template_data

#: Fewest usable pixels (fraction of the image) for a registration to be attempted at all.
MIN_VALID_FRACTION = 0.05

#: Rivals of a template match's peak within its shortfall ``1 − ρ`` that are screened at
#: sub-pixel resolution besides the peak (strongest first; see :func:`_best_site`).
SITE_CANDIDATES = 4
#: Grid (1/this pixel) of the screening of near-equal maxima.
SCREEN_GRID = 4

#: A screened rival this many standard deviations (white-noise model, :func:`rival_gap_sd`)
#: below the best match is told apart. Thirty: ten standard deviations for a mismatch whose
#: samples are correlated over up to 3 × 3 pixels (the gap's z scales as the square root of
#: the independent sample count). What two frames differ by is not white: line noise, and
#: between frames scanned up and down the opposite shear. Measured: the bands of the sample
#: run's up/down frame pairs reached z = 11-19 at wrong sites (a cut of 10 made two of them
#: confident, and the up/down drift 6.5 standard deviations off in x); the neighbouring
#: lattice sites told apart in the Au(111) pairs of the tests have z = 44-99.
TELL_APART_SIGMA = 30.0

#: Rivals are told apart only in matches whose shortfall ``1 − ρ`` is at most this: images
#: that agree to within a tenth of their energy, so that what they differ by can be taken
#: for noise. (Unrelated images differ by structure, not noise; their near-equal maxima
#: must all stay rivals.)
NOISE_LIKE_SHORTFALL = 0.1


@dataclass(frozen=True)
class Pass:
    """Result of one pass: shift (px), confidence, error, covariance ``(yy, yx, xx)`` (px²)."""

    shift_y: float
    shift_x: float
    confidence: float
    error: float
    cov: tuple[float, float, float]
    peak: float
    #: the competing correlation maxima ``(dy, dx, value)`` relative to the peak, and the factor
    #: the uniqueness was multiplied by (whole-image passes)
    rivals: np.ndarray | None = None
    match: float = 1.0


FAILED = Pass(0.0, 0.0, 0.0, 1.0, (math.inf, 0.0, math.inf), 0.0)


def register_once(
    a: np.ndarray,
    b: np.ndarray,
    mask_a: np.ndarray | None,
    mask_b: np.ndarray | None,
    u: int,
    kind: str,
    normalization: str | None,
    workers: int | None,
) -> Pass:
    """One registration pass over the whole search range, both images windowed."""
    shape = (int(a.shape[0]), int(a.shape[1]))
    ny, nx = shape
    weights = window(shape, kind)
    w = weights.w
    fa, wa, frac_a = prepare(a, mask_a, weights, "reference")
    fb, wb, frac_b = prepare(b, mask_b, weights, "moving")
    ea = float(np.vdot(fa.ravel(), fa.ravel()))
    eb = float(np.vdot(fb.ravel(), fb.ravel()))
    total = ea * eb
    if min(frac_a, frac_b) < MIN_VALID_FRACTION or not total > 0:
        return FAILED

    spec_a = sfft.rfft2(fa, workers=workers)
    spec_b = sfft.rfft2(fb, workers=workers)
    # a lattice makes every lattice translation a near-perfect match (and an under-sampled one
    # moves inconsistently): register the aperiodic content only
    keep = periodic_notch(spec_a, spec_b, shape)
    if keep is not None:
        spec_a = spec_a * keep
        spec_b = spec_b * keep
        ea_n, eb_n = energy(spec_a, shape), energy(spec_b, shape)
        total *= (ea_n / ea) * (eb_n / eb)
        ea, eb = ea_n, eb_n
        if not total > 0:
            return FAILED
    cross = np.conj(spec_a)
    cross *= spec_b  # conj(F)·G: the correlation peaks at +shift
    if normalization == "phase":
        mag = np.abs(cross)
        mag[mag < 1e-15 * max(float(mag.max()), 1e-300)] = np.inf
        spectrum = cross / mag
        scale = 1.0
    else:
        spectrum = cross
        scale = 1.0 / math.sqrt(total)  # correlation coefficient
    corr = sfft.irfft2(spectrum, s=shape, workers=workers)
    corr *= scale
    py, px = divmod(int(np.argmax(corr)), nx)
    peak = float(corr[py, px])
    if not peak > 0:
        return FAILED
    rivals = lobe_rivals(corr, py, px, peak)
    sy = float(py - ny if py > ny // 2 else py)
    sx = float(px - nx if px > nx // 2 else px)
    dy, dx = parabolic_peak(corr, py, px, wrap=True)
    shift_y, shift_x, hessian, _ = upsample_peak(
        lambda ty, tx, q: dft_block(spectrum, shape, ty, tx, q) * scale, sy, sx, u,
        start=(sy + dy, sx + dx))
    step = 1.0 / u if u > 1 else 1.0

    # normalised RMS error from the un-normalised cross-power at the found shift (Eq. 1)
    cc = float(dft_block(cross, shape, np.array([shift_y]), np.array([shift_x]))[0, 0])
    error = math.sqrt(max(0.0, 1.0 - cc * cc / total)) if cc > 0 else 1.0
    # uniqueness of the peak times the correlation coefficient of the match
    match = max(cc, 0.0) / math.sqrt(total)
    confidence = uniqueness(rivals, peak) * match

    # least-squares covariance: residual noise over the gradient structure of the images.
    # Per-pixel variance of the difference image: two images of variances σa², σb² that
    # correlate with coefficient ρ differ by σa² + σb² − 2ρσaσb.
    rho = max(cc, 0.0) / math.sqrt(total)
    if wa is w and wb is w:
        w2, w4 = window_sums(shape, kind)
    else:
        wab = wa * wb
        w2, w4 = float(np.sum(wab)), float(np.sum(wab * wab))
    va, vb = ea / max(float(np.sum(wa * wa)), 1e-300), eb / max(float(np.sum(wb * wb)), 1e-300)
    var_d = max(va + vb - 2.0 * rho * math.sqrt(va * vb), 0.0)
    grid = step / math.sqrt(12.0) / (4.0 if u > 1 else 1.0)
    if normalization is None and hessian is not None:
        tensor = hessian * math.sqrt(total)  # Hessian of the raw correlation: Σ ∇(wA)·∇(wB)
        nn = 0.5 * var_d * math.sqrt(w4) / math.sqrt(total)
    else:  # phase correlation: no such identity; use the hessian of the raw cross-power
        hraw = raw_hessian(cross, shape, shift_y, shift_x)
        tensor, nn = hraw, 0.0
    cov = ls_covariance(tensor, var_d, w4 / w2, hessian, nn, grid)
    return Pass(shift_y, shift_x, confidence, float(min(error, 1.0)),
                (float(cov[0, 0]), float(cov[0, 1]), float(cov[1, 1])), peak, rivals, match)


def register_template(
    a: np.ndarray,
    b: np.ndarray,
    mask_a: np.ndarray | None,
    mask_b: np.ndarray | None,
    u: int,
    kind: str,
    margin: int,
    workers: int | None,
) -> Pass:
    """A refinement pass for small shifts (``|τ| ≤ margin``): windowed normalised template match.

    The reference is windowed inside a border of ``2·margin`` pixels (the template ``w``); the
    moving image is flat (weight 1) wherever the template can reach and tapers only in its
    outer ``margin`` (which keeps a lattice's Fourier peaks compact enough to remove), and the
    correlation at each trial shift is normalised by the moving image's own weighted energy
    under the template there,
    ``ρ(τ) = Σ w·A'·B'(·+τ) / sqrt(Σ w·A'² · (Σ w·B'(·+τ)² − (Σ w·B'(·+τ))²/Σw))``,
    three correlations (Lewis 1995; the plane of ``B'`` under the template is removed too). So
    the window weights the same surface at every trial shift and the coefficient is at most 1,
    with equality at the true shift (Cauchy–Schwarz): windowing both images instead favours the
    shift at which the windows coincide, which on the long correlation ridge of a straight step
    edge outweighs the features that pin the match.
    """
    shape = (int(a.shape[0]), int(a.shape[1]))
    ny, nx = shape
    tpl = template_data(shape, margin, kind)
    fb, _, frac_b = prepare(b, mask_b, tpl.flat, "moving")
    fa, wa, frac_a = prepare(a, mask_a, tpl.weights, "reference")
    if min(frac_a, frac_b) < MIN_VALID_FRACTION:
        return FAILED
    spec_a = sfft.rfft2(fa, workers=workers)
    spec_b = sfft.rfft2(fb, workers=workers)
    keep = periodic_notch(spec_a, spec_b, shape)
    if keep is not None:  # lattice peaks go from both images alike (same flat window)
        fa0, _, _ = prepare(a, mask_a, tpl.flat, "reference")
        fa0 = sfft.irfft2(sfft.rfft2(fa0, workers=workers) * keep, s=shape, workers=workers)
        spec_b = spec_b * keep
        fb = sfft.irfft2(spec_b, s=shape, workers=workers)
        # flat = 1 wherever w > 0, so fa0 there is the detrended, filtered reference
        fa, wa, _ = prepare(fa0, mask_a, tpl.weights, "reference")
        spec_a = sfft.rfft2(fa, workers=workers)
    channels = template_channels(tpl, wa, fb, spec_b, workers)
    sw, w2, gy, gx = channels.sums
    ea = float(np.vdot(fa * channels.inverse_weight, fa))  # Σ w·A'²
    if not (ea > 0 and sw > 0):
        return FAILED
    cross = np.conj(spec_a)
    cross *= spec_b

    def ncc(num: np.ndarray, s2: np.ndarray, s1: np.ndarray, sy_: np.ndarray,
            sx_: np.ndarray) -> np.ndarray:
        plane = s1 * s1 / sw + (sy_ * sy_ / gy if gy > 0 else 0.0) + \
            (sx_ * sx_ / gx if gx > 0 else 0.0)
        eb_local = np.maximum(s2 - plane, 1e-300)
        return num / np.sqrt(ea * eb_local)

    # only shifts within the margin are free of wrap-around: evaluate those
    lags = tpl.lags
    surface = ncc(irfft2_at(cross, shape, lags % ny, lags % nx, workers), *channels.grid())
    jy, jx = divmod(int(np.argmax(surface)), surface.shape[1])
    peak = float(surface[jy, jx])
    if not peak > 0:
        return FAILED
    padded = np.full((surface.shape[0] + 2, surface.shape[1] + 2), -1.0)
    padded[1:-1, 1:-1] = surface  # no wrap-around for the local maxima

    def block(ty: np.ndarray, tx: np.ndarray, q: int) -> np.ndarray:
        return ncc(dft_block(cross, shape, ty, tx, q), *channels.block(ty, tx, q))

    def refine(iy: int, ix: int) -> tuple[float, float, np.ndarray | None, float]:
        sy, sx = float(lags[iy]), float(lags[ix])
        dy, dx = parabolic_peak(surface, iy, ix, wrap=False)
        return upsample_peak(block, sy, sx, u, start=(sy + dy, sx + dx))

    def screen(iy: int, ix: int) -> float:  # the maximum near a whole-pixel one, to 1/4 px
        dy, dx = parabolic_peak(surface, iy, ix, wrap=False)
        return peak_value(block, float(lags[iy]) + dy, float(lags[ix]) + dx, SCREEN_GRID)

    (jy, jx), (shift_y, shift_x, hessian, rho), uniqueness = _best_site(
        padded, jy, jx, peak, screen, refine, sw * sw / w2)
    rho = float(np.clip(rho, 0.0, 1.0))
    # covariance of the weighted least-squares shift: cov = σd² J_w⁻¹ J_w² J_w⁻¹ with
    # J_w ≈ (Σw/Σw²) J_w²; J_w is the numerator's Hessian Σ w ∇A'∇B'ᵀ = ρ's Hessian × ea
    var_d = 2.0 * (ea / sw) * (1.0 - rho)
    grid = (1.0 / u if u > 1 else 1.0) / math.sqrt(12.0) / (4.0 if u > 1 else 1.0)
    tensor = None if hessian is None else hessian * ea
    cov = ls_covariance(tensor, var_d, w2 / sw, hessian, 0.5 * var_d * math.sqrt(w2) / ea,
                        grid)
    return Pass(shift_y, shift_x, uniqueness * rho, math.sqrt(max(0.0, 1.0 - rho * rho)),
                (float(cov[0, 0]), float(cov[0, 1]), float(cov[1, 1])), rho)


def _best_site(padded: np.ndarray, jy: int, jx: int, peak: float,
               screen: Callable[[int, int], float],
               refine: Callable[[int, int], tuple[float, float, np.ndarray | None, float]],
               n_eff: float) -> tuple[tuple[int, int], tuple[float, float, np.ndarray | None,
                                                           float], float]:
    """The best of the near-equal maxima of a template surface, and its uniqueness.

    ``padded`` is the whole-pixel surface with a border of −1, ``(jy, jx)`` its highest point
    (unpadded indices); ``screen(iy, ix)`` is the value of the sub-pixel maximum near a
    whole-pixel one (on a 1/4-pixel grid, parabola vertex) and ``refine(iy, ix)`` that maximum
    at full resolution. The coefficient's shortfall ``1 − peak`` is what the images differ by,
    and maxima closer to the peak than that count as indistinguishable from it
    (:func:`lobe_rivals`). On an atomic
    lattice (what the Fourier notch leaves of one) those are neighbouring lattice sites, and
    the whole-pixel grid can sample the true site's sharp maximum up to half a pixel off its
    top, below a wrong site that happens to lie on the grid. So the highest point and up to
    :data:`SITE_CANDIDATES` of its indistinguishable rivals are each screened, and the best one
    wins and is refined.

    A screened rival is then told apart when it falls short of the winner by more than
    :data:`TELL_APART_SIGMA` standard deviations of the images' noise in the gap
    (:func:`rival_gap_sd`, with ``n_eff = (Σw)²/Σw²`` the effective pixel count of the
    template weights), provided the match is good enough for its shortfall to be taken for
    noise (``1 − ρ ≤`` :data:`NOISE_LIKE_SHORTFALL`). Told-apart rivals leave the uniqueness:
    ``1 − second/peak`` on the whole-pixel surface, ``second`` the highest rival left.

    Returns
    -------
    tuple
        The winner's whole-pixel indices, its refinement ``(shift_y, shift_x, hessian, ρ)``
        and the uniqueness.
    """
    py, px = padded.shape

    def site(iy: int, ix: int, r: np.ndarray) -> tuple[int, int]:  # lobe_rivals wraps offsets
        return (iy + 1 + int(r[0])) % py - 1, (ix + 1 + int(r[1])) % px - 1

    rivals = lobe_rivals(padded, jy + 1, jx + 1, peak, indistinct=1.0 - peak)
    close = rivals[rivals[:, 2] >= 2.0 * peak - 1.0] if rivals.size else rivals
    close = close[np.argsort(-close[:, 2], kind="stable")][:SITE_CANDIDATES]
    sites = [(jy, jx)] + [site(jy, jx, r) for r in close]
    values = [screen(*s) for s in sites] if len(sites) > 1 else [peak]
    # a site without a maximum nearby (NaN) neither wins nor is told apart
    best = int(np.nanargmax(values)) if not np.all(np.isnan(values)) else 0
    found = refine(*sites[best])
    rho = found[3]
    if best:  # a rival's screened maximum beat the whole-pixel peak's: rivals around it
        jy, jx = sites[best]
        peak = float(padded[jy + 1, jx + 1])
        rivals = lobe_rivals(padded, jy + 1, jx + 1, peak, indistinct=1.0 - peak)
    screened = {s: v for k, (s, v) in enumerate(zip(sites, values, strict=True)) if k != best}
    left = []
    noise_like = 1.0 - rho <= NOISE_LIKE_SHORTFALL
    for r in rivals:
        value = screened.get(site(jy, jx, r), math.nan)
        gap = rho - value if math.isfinite(value) else 0.0
        if noise_like and gap > 0 and \
                gap >= TELL_APART_SIGMA * rival_gap_sd(1.0 - rho, gap, n_eff):
            continue  # told apart
        left.append(r)
    return (jy, jx), found, uniqueness(np.reshape(left, (-1, 3)), peak)


# --------------------------------------------------------------------------------------------
# helpers of the refined registration: binning and overlapping crops
# --------------------------------------------------------------------------------------------


def _block_sums(a: np.ndarray, f: int) -> np.ndarray:
    """Sums of ``f × f`` blocks (shape a multiple of ``f``), from strided slices."""
    rows = a[0::f].astype(np.float64)
    for k in range(1, f):
        rows += a[k::f]
    out = rows[:, 0::f].copy()
    for k in range(1, f):
        out += rows[:, k::f]
    return out


def binned(image: np.ndarray, mask: np.ndarray | None,
           f: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Mean of ``f × f`` blocks of the usable pixels; a block is usable if half of it is."""
    if f == 1:
        return image, mask
    if mask is not None and np.all(mask):
        mask = None  # the same blocks, and the same result, as without a mask
    ny, nx = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    crop = image[:ny, :nx]
    if mask is None and math.isfinite(float(np.sum(crop))):
        return _block_sums(crop, f) / (f * f), None
    valid = np.isfinite(crop)
    if mask is not None:
        valid &= np.asarray(mask, dtype=bool)[:ny, :nx]
    count = _block_sums(valid, f)
    total = _block_sums(np.where(valid, crop, 0.0), f)
    out = np.divide(total, count, out=np.zeros(total.shape), where=count > 0)
    usable = count >= 0.5 * f * f
    return out, (None if usable.all() else usable)


@functools.lru_cache(maxsize=64)
def _fast_length_below(n: int) -> int:
    """Largest length ``<= n`` that :func:`scipy.fft.next_fast_len` accepts as fast."""
    m = n
    while m > 1 and sfft.next_fast_len(m, real=True) != m:
        m -= 1
    return m


def overlap(n: int, k: int) -> tuple[slice, slice]:
    """Index ranges of reference and moving that overlap when moving = reference shifted by k.

    The common length is trimmed (centrally) to a fast FFT length: a crop of prime length
    would cost several times the full-frame transform.
    """
    length = n - abs(k)
    fast = _fast_length_below(length)
    lo = (length - fast) // 2
    a0 = max(0, -k) + lo
    b0 = max(0, k) + lo
    return slice(a0, a0 + fast), slice(b0, b0 + fast)
