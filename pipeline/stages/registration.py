"""Sub-pixel registration of two images: upsampled-DFT cross-correlation, then a template match.

Our own implementation built on the single-step discrete-Fourier-transform method of
Guizar-Sicairos, Thurman & Fienup (2008): a coarse peak of the cross-correlation from one inverse
FFT, then a matrix-multiply DFT that evaluates the correlation only on a small
``1/upsample_factor``-pixel grid around that peak. Real transforms (``scipy.fft.rfft2``) halve the
work; windows and kernels are cached per image shape (never per image content), so a run of
frames of one size pays for them once. By default a coarse pass on binned images is followed by a
windowed normalised template match on the overlapping parts (unbiased by the window, which
matters for terraced frames), and atomic-lattice Fourier peaks are removed before either, so that
a lattice cannot make every lattice translation look like the answer.

Sign convention (used everywhere in the drift code): the returned shift is the displacement of
image features *from the reference to the moving image*, ``moving(r) ≈ reference(r − shift)``.
``skimage.registration.phase_cross_correlation`` returns the opposite sign (the shift that moves
the moving image back onto the reference).

Layout: this module holds the public API and the refinement loop; the passes are in
:mod:`pipeline.stages.registration_passes`, the template match's local sums in
:mod:`pipeline.stages.registration_template`, the lattice-peak removal in
:mod:`pipeline.stages.registration_lattice`, the confidence and covariance in
:mod:`pipeline.stages.registration_quality` and the shared kernels (windows, plane removal, matrix
DFT, peak search) in :mod:`pipeline.stages.registration_core`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np

from pipeline.errors import ProcessingError
from pipeline.stages.registration_lattice import (
    PERIODIC_BACKGROUND_BINS as PERIODIC_BACKGROUND_BINS,
)
from pipeline.stages.registration_lattice import PERIODIC_MAX_FRACTION as PERIODIC_MAX_FRACTION
from pipeline.stages.registration_lattice import (
    PERIODIC_MAX_SPOT_BINS as PERIODIC_MAX_SPOT_BINS,
)
from pipeline.stages.registration_lattice import PERIODIC_PEAK_RATIO as PERIODIC_PEAK_RATIO
from pipeline.stages.registration_lattice import PERIODIC_RING_RATIO as PERIODIC_RING_RATIO
from pipeline.stages.registration_passes import MIN_VALID_FRACTION as MIN_VALID_FRACTION
from pipeline.stages.registration_passes import (
    Pass,
    binned,
    overlap,
    register_once,
    register_template,
)
from pipeline.stages.registration_quality import PEAK_EXCLUSION_PX as PEAK_EXCLUSION_PX
from pipeline.stages.registration_quality import sym2_eigenvalues, uniqueness

__all__ = ["Registration", "register_images"]

#: A registration whose shift uncertainty is this much smaller across than along its worst
#: direction (ratio of the principal standard deviations) keeps its full confidence; more
#: one-directional ones (the ridge of straight step edges) lose confidence in proportion.
ISOTROPY_REFERENCE = 0.3


@dataclass(frozen=True)
class Registration:
    """Result of :func:`register_images`.

    Attributes
    ----------
    shift_y_px, shift_x_px : float
        Displacement of image features from the reference to the moving image, in pixels
        (rows, columns): ``moving(r) ≈ reference(r − shift)``. The opposite sign of
        ``skimage.registration.phase_cross_correlation``.
    confidence : float
        In [0, 1]: the uniqueness of the correlation peak (``1 − second/peak``, ``second`` the
        highest separate local maximum) × the correlation coefficient of the match × an
        isotropy factor (information in one direction only, as from straight step edges,
        lowers it). About 0 for unrelated images, featureless noise and perfectly periodic
        images (every lattice translation matches as well); near 1 for a clean, unique match.
    error : float
        Normalised root-mean-square mismatch at the found shift, ``sqrt(1 − ρ²)``
        (Guizar-Sicairos et al. 2008, Eq. 1, with ρ the correlation coefficient of the
        registered content): 0 = identical up to the shift, 1 = unrelated.
    uncertainty_y_px, uncertainty_x_px : float
        Standard uncertainties of the shift (pixels), from the least-squares covariance (see
        :func:`register_images`, Notes); ``inf`` when the match has no curvature.
    peak_height : float
        Height of the correlation peak (the correlation coefficient of the last pass).
    covariance_yx_px2 : float
        Covariance of the two shift components (px²).
    """

    shift_y_px: float
    shift_x_px: float
    confidence: float
    error: float
    uncertainty_y_px: float
    uncertainty_x_px: float
    peak_height: float
    covariance_yx_px2: float = 0.0

    @property
    def covariance_px2(self) -> np.ndarray:
        """2 × 2 covariance of ``(shift_y_px, shift_x_px)``."""
        c = self.covariance_yx_px2
        return np.array([[self.uncertainty_y_px**2, c], [c, self.uncertainty_x_px**2]])

    @property
    def shift_px(self) -> tuple[float, float]:
        """``(shift_y_px, shift_x_px)``."""
        return (self.shift_y_px, self.shift_x_px)


#: Smallest overlap (pixels per axis) for the refinement pass on the overlapping crops.
MIN_REFINE_OVERLAP_PX = 16

#: Template-match passes at most (each on the overlapping crops at the current whole-pixel
#: estimate).
MAX_REFINE_PASSES = 4
#: A template match whose result rounds to within this many pixels of the crops' offset ends
#: the refinement; a larger step re-centres the crops and matches again. The match is exact
#: anywhere within its margin, so re-centring by one pixel only moves the overlap by one row or
#: column (measured on 60 pairs of 256² crops: results change by at most 5e-4 px, the RMS error
#: not at all, and a fifth to a third of the pairs save a second pass).
RECENTRE_PX = 1
#: The coarse pass of a refined registration runs on images binned to about this size.
COARSE_SIZE_PX = 64
#: Search margin of a refinement pass: 1/REFINE_MARGIN_DIVISOR of the crop, at least
#: REFINE_MIN_MARGIN_PX pixels.
REFINE_MARGIN_DIVISOR = 16
REFINE_MIN_MARGIN_PX = 4


#: Rivals of the coarse peak beyond the template's reach that would cut the confidence below
#: this (``1 − rival/peak``) are checked by a full-resolution match at their place (at most
#: :data:`MAX_RIVAL_CHECKS` of them, strongest first).
RIVAL_CHECK_BELOW = 0.5
MAX_RIVAL_CHECKS = 3


def _template_at(a: np.ndarray, b: np.ndarray, mask_a: np.ndarray | None,
                 mask_b: np.ndarray | None, ky: int, kx: int, f: int, u: int, win: str,
                 workers: int | None) -> tuple[Pass, int] | None:
    """A template match on the crops that overlap at the whole-pixel offset ``(ky, kx)``, and
    its search margin; None if the overlap is too small or there is no match at all."""
    ny, nx = a.shape
    if min(ny - abs(ky), nx - abs(kx)) < MIN_REFINE_OVERLAP_PX:
        return None
    ra, rb = overlap(ny, ky)
    ca, cb = overlap(nx, kx)
    ma = None if mask_a is None else np.asarray(mask_a, bool)[ra, ca]
    mb = None if mask_b is None else np.asarray(mask_b, bool)[rb, cb]
    crop = (ra.stop - ra.start, ca.stop - ca.start)
    margin = max(REFINE_MIN_MARGIN_PX, min(crop) // REFINE_MARGIN_DIVISOR, 2 * f)
    if min(crop) - 4 * margin < MIN_REFINE_OVERLAP_PX:
        return None
    p = register_template(a[ra, ca], b[rb, cb], ma, mb, u, win, margin, workers)
    return (p, margin) if p.peak > 0 else None  # a match, if an ambiguous one (confidence 0)


def _coarse_after_checks(coarse: Pass, found: Pass, reach: float, a: np.ndarray,
                         b: np.ndarray, mask_a: np.ndarray | None, mask_b: np.ndarray | None,
                         f: int, u: int, win: str, workers: int | None) -> float:
    """The coarse pass's confidence once its rivals are confronted with the full resolution.

    Rivals within ``reach`` (binned px, either axis) of the coarse peak lay in the first
    template pass's window and were examined there. Of the others, the strongest (those that
    would cut the confidence below :data:`RIVAL_CHECK_BELOW`, at most
    :data:`MAX_RIVAL_CHECKS`) are matched at full resolution at their own place: one whose
    match falls short of ``found`` by more than ``found``'s own shortfall ``1 − ρ`` is told
    apart and dropped; one that comes as close is an ambiguity (the confidence becomes
    ``1 − ρ_rival/ρ``). The rest count as before. Binned and windowed, a long straight step
    gives such far maxima along its ridge, which the adsorbates on its terraces rule out.
    """
    if coarse.rivals is None or not coarse.rivals.size:
        return coarse.confidence
    r = coarse.rivals
    keep = np.maximum(np.abs(r[:, 0]), np.abs(r[:, 1])) > reach
    strong = np.flatnonzero(keep & (r[:, 2] > (1.0 - RIVAL_CHECK_BELOW) * coarse.peak))
    for i in strong[np.argsort(-r[strong, 2])][:MAX_RIVAL_CHECKS]:
        ky, kx = (round((c + d) * f) for c, d in ((coarse.shift_y, r[i, 0]),
                                                  (coarse.shift_x, r[i, 1])))
        matched = _template_at(a, b, mask_a, mask_b, ky, kx, f, u, win, workers)
        rival = None if matched is None else matched[0]
        if rival is not None and rival.peak >= found.peak - (1.0 - found.peak):
            return float(np.clip(1.0 - rival.peak / found.peak, 0.0, 1.0))
        keep[i] = False  # no match there at full resolution, or a clearly worse one
    return uniqueness(r[keep], coarse.peak) * coarse.match


def register_images(
    reference: np.ndarray,
    moving: np.ndarray,
    *,
    upsample_factor: int = 20,
    reference_mask: np.ndarray | None = None,
    moving_mask: np.ndarray | None = None,
    window: Literal["hann"] | None = "hann",
    normalization: Literal["phase"] | None = None,
    refine: bool = True,
    workers: int | None = None,
) -> Registration:
    """Measure the sub-pixel translation between two images of the same shape.

    Parameters
    ----------
    reference, moving : ndarray, shape (ny, nx)
        The two images (any real dtype; computed in float64). Non-finite pixels are treated as
        masked.
    upsample_factor : int
        The correlation peak is located on a grid of ``1/upsample_factor`` pixel, then refined by
        a three-point parabola; 1 gives whole-pixel shifts.
    reference_mask, moving_mask : ndarray of bool, optional
        ``True`` where a pixel is usable (the scikit-image convention). Unusable pixels are
        filled with the image mean and given zero weight.
    window : {"hann", None}
        Apodisation against the edge discontinuity of the periodic DFT (a Hann window sampled at
        pixel centres). ``None`` only for images that are periodic.
    normalization : {None, "phase"}
        ``None`` (default): the plain cross-correlation of the windowed images, the statistic of
        Guizar-Sicairos et al.; ``"phase"``: whitened cross-power spectrum (phase correlation,
        the default of scikit-image).
    refine : bool
        ``True`` (default): a coarse pass on images binned to about :data:`COARSE_SIZE_PX`
        pixels, then windowed normalised template matches on the overlapping parts, re-centred
        while the whole-pixel estimate moves by more than :data:`RECENTRE_PX` (at most
        :data:`MAX_REFINE_PASSES`). ``False``: one
        pass of the windowed correlation at full resolution (the like-for-like counterpart of
        ``skimage.registration.phase_cross_correlation``; biased towards zero shift by the
        window, about 0.4 % of the shift).
    workers : int, optional
        Threads for :mod:`scipy.fft` (default 1).

    Returns
    -------
    Registration
        ``shift_y_px, shift_x_px``: displacement of features from ``reference`` to ``moving``
        (``moving(r) ≈ reference(r − shift)``, the opposite sign of scikit-image), plus
        ``confidence``, ``error`` and the shift uncertainties.

    Raises
    ------
    ProcessingError
        If the images are not 2-D, differ in shape, or an option is out of range.

    Notes
    -----
    *Correlation pass.* The cross-power spectrum ``P = conj(F)·G`` of the prepared images
    (weighted best-fit plane removed, masked pixels zero, Hann-windowed) is inverse-transformed
    with ``irfft2``; its maximum gives the shift to one pixel. The correlation is then evaluated
    on a ``1.5·upsample_factor``-point grid of spacing ``1/upsample_factor`` pixel around that
    peak by two small matrix products of the half spectrum with complex-exponential kernels (cost
    ``O(N·u)`` instead of the ``O(N·u²)`` of zero-padding) [1]_, and the maximum is refined by a
    three-point parabola. Shifts are taken modulo the image size into ``(−n/2, n/2]``.

    *Template pass* (``refine=True``). Windowing both images favours the shift at which the two
    windows coincide (measured: 0.4 % of the shift on smooth random surfaces), and on the long
    correlation ridge of a straight step edge this outweighs the features that pin the match.
    The template pass windows only the reference (inside a border of ``2·margin``), keeps the
    moving image flat wherever the template can reach, and normalises the correlation at each
    trial shift by the moving image's own weighted energy there (minus its local mean and
    slope), a windowed normalised cross-correlation [2]_: the numerator by FFT, the local sums
    of the moving image under the separable template window by thin matrix products with the
    window's shifted 1-D factors (see :mod:`pipeline.stages.registration_template`). Its
    coefficient is at most 1, with equality at the true shift whatever the window.

    *Near-equal maxima.* On an atomic lattice (what the notch leaves of one) the template
    surface holds maxima at neighbouring lattice sites within the coefficient's own shortfall
    ``1 − ρ`` of each other, and the whole-pixel grid can sample the true site's sharp maximum
    below a wrong one. The highest whole-pixel maximum and up to four such rivals are
    compared at 1/4 pixel before one is refined; a rival that then falls short by more than
    30 standard deviations of white noise in the images (10 for noise correlated over 3 × 3
    pixels) is told apart and does not lower the confidence (matches with ``1 − ρ ≤ 0.1``
    only). Over the 80 varied simulated pairs of ``benchmarks/sweep_registration.py`` this
    makes 47 right instead of 42 and 31 right and confident instead of 28; the 4 confident
    pairs off by more than 0.15 px (0.17-0.42 px, 1.3-3.3 of their standard uncertainties)
    are the same before and after.

    *Weighting.* The plain (not phase-normalised) correlation is the default: STM topographs
    have red spectra and are band-limited well below the pixel Nyquist frequency, so phase
    normalisation gives full weight to frequencies that hold only noise and window leakage (on
    256² smooth random surfaces with noise of 0–20 % it erred by 0.4–0.9 px RMS, the plain
    correlation by 0.02–0.05 px). Isolated strong Fourier peaks (a lattice: a bin 50× above its
    neighbourhood and 10× above a ring around it) are removed from both spectra first.

    *Uncertainty.* The least-squares covariance ``var_d · c_w · J⁻¹``: ``var_d`` is the
    per-pixel variance of the difference image implied by the correlation coefficient,
    ``c_w`` the window's efficiency factor, and ``J = Σ w ∇A ∇Bᵀ`` the gradient cross-tensor of
    the two images, measured as the Hessian of the raw correlation at its peak (the images'
    independent noise does not inflate it). A noise × noise term and the grid resolution are
    added. On smooth random surfaces the errors divided by these uncertainties have a standard
    deviation of 0.9–1.3.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
       registration algorithms", Opt. Lett. 33, 156-158 (2008). doi:10.1364/OL.33.000156
    .. [2] J. P. Lewis, "Fast normalized cross-correlation", Vision Interface 1995, 120-123.
    """
    a = np.asarray(reference, dtype=np.float64)
    b = np.asarray(moving, dtype=np.float64)
    if a.ndim != 2 or b.ndim != 2:
        raise ProcessingError(
            f"register_images: images must be 2-D, got shapes {a.shape} and {b.shape}")
    if a.shape != b.shape:
        raise ProcessingError(
            f"register_images: reference shape {a.shape} differs from moving shape {b.shape}")
    if min(a.shape) < 4:
        raise ProcessingError(f"register_images: images of shape {a.shape} are too small "
                              "(at least 4 x 4 pixels)")
    if isinstance(upsample_factor, bool) or int(upsample_factor) != upsample_factor or \
            upsample_factor < 1:
        raise ProcessingError(
            f"register_images: upsample_factor = {upsample_factor!r}; must be an integer >= 1")
    if window not in ("hann", None):
        raise ProcessingError(f"register_images: window = {window!r}; expected 'hann' or None")
    if normalization not in ("phase", None):
        raise ProcessingError(
            f"register_images: normalization = {normalization!r}; expected 'phase' or None")
    u = int(upsample_factor)
    win = window or "none"
    ny, nx = a.shape
    if not refine:
        result = register_once(a, b, reference_mask, moving_mask, u, win, normalization,
                               workers)
    else:
        # coarse pass over the whole search range on binned images, then template matches
        f = max(1, min(ny, nx) // COARSE_SIZE_PX)
        ab, mab = binned(a, reference_mask, f)
        bb, mbb = binned(b, moving_mask, f)
        coarse = register_once(ab, bb, mab, mbb, min(u, 4), win, normalization, workers)
        result = Pass(coarse.shift_y * f, coarse.shift_x * f, coarse.confidence,
                      coarse.error, tuple(c * f * f for c in coarse.cov), coarse.peak)
        est = (result.shift_y, result.shift_x)
        # a global ambiguity seen by the coarse pass stays (a rival beyond the template's
        # search window, unless a full-resolution match there is clearly worse), and so does
        # one seen by a template pass before it was re-centred (a ridge of near-equal maxima
        # moves the window along)
        lowest = math.inf
        for _ in range(MAX_REFINE_PASSES if coarse.confidence > 0 else 0):
            ky, kx = round(est[0]), round(est[1])
            matched = _template_at(a, b, reference_mask, moving_mask, ky, kx, f, u, win, workers)
            if matched is None:
                break
            p, margin = matched
            est = (p.shift_y + ky, p.shift_x + kx)
            if lowest == math.inf:  # the first template pass searched ±margin around the
                lowest = p.confidence  # coarse peak at full resolution
                lowest = min(lowest, _coarse_after_checks(
                    coarse, p, (margin - 1) / f, a, b, reference_mask, moving_mask, f, u, win,
                    workers))
            lowest = min(lowest, p.confidence)
            result = Pass(est[0], est[1], lowest, p.error, p.cov, p.peak)
            if abs(round(est[0]) - ky) <= RECENTRE_PX and abs(round(est[1]) - kx) <= RECENTRE_PX:
                break  # the template match is unbiased within its margin: done
    cyy, cyx, cxx = result.cov
    confidence = result.confidence
    low, high = sym2_eigenvalues(cyy, cyx, cxx) if math.isfinite(cyy + cxx) else (0.0, 1.0)
    isotropy = math.sqrt(max(low, 0.0) / high) if high > 0 else 0.0
    confidence *= min(1.0, isotropy / ISOTROPY_REFERENCE)
    return Registration(
        shift_y_px=result.shift_y,
        shift_x_px=result.shift_x,
        confidence=confidence,
        error=result.error,
        uncertainty_y_px=math.sqrt(cyy),
        uncertainty_x_px=math.sqrt(cxx),
        peak_height=result.peak,
        covariance_yx_px2=cyx,
    )
