"""Sub-pixel registration of two images by upsampled-DFT phase correlation.

Our own implementation of the single-step discrete-Fourier-transform method of Guizar-Sicairos,
Thurman & Fienup (2008): a coarse peak of the (phase-normalised) cross-correlation from one
inverse FFT, then a matrix-multiply DFT that evaluates the correlation only on a small
``1/upsample_factor``-pixel grid around that peak. Real transforms (``scipy.fft.rfft2``) halve the
work of both steps; windows and frequency tables are cached per image shape, so a run of frames of
one size pays for them once.

Sign convention (used everywhere in the drift code): the returned shift is the displacement of
image features *from the reference to the moving image*, ``moving(r) ≈ reference(r − shift)``.
``skimage.registration.phase_cross_correlation`` returns the opposite sign (the shift that moves
the moving image back onto the reference).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.fft as sfft

from pipeline.errors import ProcessingError

__all__ = ["Registration", "register_images"]

#: Half-width (pixels) of the neighbourhood around the main correlation peak that is excluded
#: when looking for the strongest competing peak (the confidence figure).
PEAK_EXCLUSION_PX = 3

#: Fewest usable pixels (fraction of the image) for a registration to be attempted at all.
MIN_VALID_FRACTION = 0.05


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
        Peak sharpness in [0, 1]: ``1 − second/peak``, where ``peak`` is the height of the
        correlation maximum and ``second`` the highest value of the correlation surface more than
        :data:`PEAK_EXCLUSION_PX` pixels away from it. About 0 for unrelated images or featureless
        noise (the maximum is just the largest noise excursion) and for perfectly periodic
        images (every lattice translation is an equally good match); near 1 for a clean match.
    error : float
        Normalised root-mean-square mismatch of the two prepared images at the found shift,
        ``sqrt(1 − |r_fg(shift)|² / (Σ|f|² Σ|g|²))`` (Guizar-Sicairos et al. 2008, Eq. 1),
        computed from the *un-normalised* cross-power so that it is meaningful (0 = identical
        up to the shift, 1 = unrelated).
    uncertainty_y_px, uncertainty_x_px : float
        Standard uncertainty of the shift (pixels) from the peak curvature and the noise level of
        the correlation surface, combined with the ``1/upsample_factor`` grid resolution.
    peak_height : float
        Height of the correlation peak (1 for identical, noise-free phase-normalised images).
    """

    shift_y_px: float
    shift_x_px: float
    confidence: float
    error: float
    uncertainty_y_px: float
    uncertainty_x_px: float
    peak_height: float

    @property
    def shift_px(self) -> tuple[float, float]:
        """``(shift_y_px, shift_x_px)``."""
        return (self.shift_y_px, self.shift_x_px)


@functools.lru_cache(maxsize=16)
def _window(shape: tuple[int, int], kind: str) -> np.ndarray:
    """Separable 2-D window, cached per shape; returned read-only so the cache stays intact."""
    if kind == "none":
        w = np.ones(shape)
    else:  # hann, sampled at pixel centres so that no row or column is zeroed entirely
        wy = 0.5 - 0.5 * np.cos(2 * np.pi * (np.arange(shape[0]) + 0.5) / shape[0])
        wx = 0.5 - 0.5 * np.cos(2 * np.pi * (np.arange(shape[1]) + 0.5) / shape[1])
        w = wy[:, None] * wx[None, :]
    w.setflags(write=False)
    return w


@functools.lru_cache(maxsize=16)
def _frequencies(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Signed row frequencies, half-spectrum column frequencies and their Hermitian weights.

    A real image's correlation is ``c(τ) = Re Σ_ky Σ_{kx ≥ 0} w(kx) P(k) exp(2πi k·τ/N)``:
    columns 1 … nx/2−1 stand for themselves and their conjugate partners (weight 2); the zero
    column and the Nyquist column of an even width are their own partners (weight 1).
    """
    ny, nx = shape
    ky = sfft.fftfreq(ny) * ny
    kx = np.arange(nx // 2 + 1, dtype=float)
    wk = np.full(kx.shape, 2.0)
    wk[0] = 1.0
    if nx % 2 == 0:
        wk[-1] = 1.0
    for a in (ky, kx, wk):
        a.setflags(write=False)
    return ky, kx, wk


def _dft_block(
    spectrum: np.ndarray, shape: tuple[int, int], ty: np.ndarray, tx: np.ndarray
) -> np.ndarray:
    """Real correlation at the positions ``ty`` (rows) × ``tx`` (columns) by matrix DFT.

    ``spectrum`` is a half spectrum (``rfft2`` layout); the result is
    ``Re(E_y · spectrum · E_x) / N`` with the kernels of :func:`_frequencies`, i.e. the inverse
    transform evaluated off the pixel grid (Guizar-Sicairos et al. 2008, matrix-multiply DFT).
    """
    ny, nx = shape
    ky, kx, wk = _frequencies(shape)
    ey = np.exp((2j * np.pi / ny) * np.outer(ty, ky))  # (my, ny)
    ex = wk[:, None] * np.exp((2j * np.pi / nx) * np.outer(kx, tx))  # (nkx, mx)
    return (ey @ (spectrum @ ex)).real / (ny * nx)


def _parabolic_offset(cm: float, c0: float, cp: float) -> float:
    """Vertex offset (in samples, within ±0.5) of the parabola through three samples."""
    den = cm - 2.0 * c0 + cp
    if den >= 0 or not math.isfinite(den):
        return 0.0
    return float(np.clip(0.5 * (cm - cp) / den, -0.5, 0.5))


def _prepare(
    image: np.ndarray, mask: np.ndarray | None, window: np.ndarray, name: str
) -> tuple[np.ndarray, float]:
    """Mean-fill and zero-weight unusable pixels, remove the mean, apply the window."""
    valid = np.isfinite(image)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != image.shape:
            raise ProcessingError(
                f"register_images: {name}_mask has shape {m.shape}, expected {image.shape} like "
                f"the {name} image")
        valid &= m
    frac = float(valid.mean())
    if not valid.any():
        return np.zeros(image.shape), 0.0
    mean = float(image[valid].mean())
    out = np.where(valid, image - mean, 0.0)
    out *= window
    return out, frac


def register_images(
    reference: np.ndarray,
    moving: np.ndarray,
    *,
    upsample_factor: int = 20,
    reference_mask: np.ndarray | None = None,
    moving_mask: np.ndarray | None = None,
    window: Literal["hann"] | None = "hann",
    normalization: Literal["phase"] | None = "phase",
    workers: int | None = None,
) -> Registration:
    """Measure the sub-pixel translation between two images of the same shape.

    Parameters
    ----------
    reference, moving : ndarray, shape (ny, nx)
        The two images (any real dtype; computed in float64). Non-finite pixels are treated as
        masked.
    upsample_factor : int
        Images are registered to within ``1/upsample_factor`` of a pixel before a final
        three-point parabolic refinement of the peak; 1 gives whole-pixel shifts.
    reference_mask, moving_mask : ndarray of bool, optional
        ``True`` where a pixel is usable (the scikit-image convention). Unusable pixels are filled
        with the image mean and given zero weight.
    window : {"hann", None}
        Apodisation against the edge discontinuity of the periodic DFT (a Hann window sampled at
        pixel centres). ``None`` for images that are already periodic.
    normalization : {"phase", None}
        ``"phase"`` whitens the cross-power spectrum (phase correlation: a sharp peak, insensitive
        to contrast); ``None`` uses the plain cross-correlation.
    workers : int, optional
        Threads for :mod:`scipy.fft` (default 1).

    Returns
    -------
    Registration
        ``shift_y_px, shift_x_px``: the displacement of features from ``reference`` to
        ``moving`` (``moving(r) ≈ reference(r − shift)``), plus ``confidence``, ``error`` and the
        shift uncertainties.

    Raises
    ------
    ProcessingError
        If the images are not 2-D, differ in shape, or ``upsample_factor < 1``.

    Notes
    -----
    The cross-power spectrum ``P = conj(F)·G`` of the prepared images (mean removed, masked
    pixels zero, windowed) is phase-normalised and inverse-transformed; its maximum gives the
    shift to one pixel. The correlation is then evaluated on a ``1.5·upsample_factor``-point grid
    of spacing ``1/upsample_factor`` pixel around that peak by two small matrix products of the
    half spectrum with complex-exponential kernels (cost ``O(N·u)`` instead of the ``O(N·u²)`` of
    zero-padding). Shifts are taken modulo the image size into ``(−n/2, n/2]``.

    The uncertainty follows from linearising the peak condition ``c'(τ) = 0``: a noise field of
    standard deviation σ, band-limited to the pixel grid, has a derivative of standard deviation
    ``σ·π/√3`` per pixel, so the peak moves by about ``σ·(π/√3)/κ`` for a peak curvature κ. The
    confidence is a peak-to-competitor ratio, not a statistical probability; periodic images
    (clean atomic lattices) are honestly reported as ambiguous.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
       registration algorithms", Opt. Lett. 33, 156-158 (2008). doi:10.1364/OL.33.000156
    """
    a = np.asarray(reference, dtype=np.float64)
    b = np.asarray(moving, dtype=np.float64)
    if a.ndim != 2 or b.ndim != 2:
        raise ProcessingError(
            f"register_images: images must be 2-D, got shapes {a.shape} and {b.shape}")
    if a.shape != b.shape:
        raise ProcessingError(
            f"register_images: reference shape {a.shape} differs from moving shape {b.shape}")
    if int(upsample_factor) < 1:
        raise ProcessingError(
            f"register_images: upsample_factor = {upsample_factor}; must be an integer >= 1")
    if window not in ("hann", None):
        raise ProcessingError(f"register_images: window = {window!r}; expected 'hann' or None")
    if normalization not in ("phase", None):
        raise ProcessingError(
            f"register_images: normalization = {normalization!r}; expected 'phase' or None")
    u = int(upsample_factor)
    shape = (int(a.shape[0]), int(a.shape[1]))
    ny, nx = shape
    n = ny * nx
    w = _window(shape, window or "none")
    fa, frac_a = _prepare(a, reference_mask, w, "reference")
    fb, frac_b = _prepare(b, moving_mask, w, "moving")
    energy = float(np.sum(fa * fa) * np.sum(fb * fb))
    if min(frac_a, frac_b) < MIN_VALID_FRACTION or energy <= 0:
        return Registration(0.0, 0.0, 0.0, 1.0, math.inf, math.inf, 0.0)

    spec_a = sfft.rfft2(fa, workers=workers)
    spec_b = sfft.rfft2(fb, workers=workers)
    cross = np.conj(spec_a)
    cross *= spec_b  # conj(F)·G: correlation peak at +shift
    if normalization == "phase":
        mag = np.abs(cross)
        mag[mag < 1e-15 * max(float(mag.max()), 1e-300)] = np.inf
        spectrum = cross / mag
        scale = 1.0
    else:
        spectrum = cross
        scale = 1.0 / math.sqrt(energy)
    corr = sfft.irfft2(spectrum, s=shape, workers=workers)
    if scale != 1.0:
        corr *= scale
    flat = int(np.argmax(corr))
    py, px = divmod(flat, nx)
    peak = float(corr[py, px])

    # competing peak: highest value outside a neighbourhood of the main one (periodic)
    r = PEAK_EXCLUSION_PX
    rows = np.arange(py - r, py + r + 1) % ny
    cols = np.arange(px - r, px + r + 1) % nx
    corr[np.ix_(rows, cols)] = -np.inf  # corr is not used afterwards
    background = corr[np.isfinite(corr)]
    second = float(background.max()) if background.size else 0.0
    noise = float(np.std(background)) if background.size > 1 else 0.0
    confidence = float(np.clip(1.0 - max(second, 0.0) / peak, 0.0, 1.0)) if peak > 0 else 0.0

    sy = float(py - ny if py > ny // 2 else py)
    sx = float(px - nx if px > nx // 2 else px)

    # upsampled DFT around the coarse peak
    m = int(math.ceil(1.5 * u)) if u > 1 else 3
    step = 1.0 / u if u > 1 else 1.0
    centre = m // 2
    sy0 = round(sy * u) / u if u > 1 else sy
    sx0 = round(sx * u) / u if u > 1 else sx
    ty = sy0 + (np.arange(m) - centre) * step
    tx = sx0 + (np.arange(m) - centre) * step
    block = _dft_block(spectrum, shape, ty, tx) * scale
    jy, jx = np.unravel_index(int(np.argmax(block)), block.shape)
    peak_up = float(block[jy, jx])
    dy = dx = 0.0
    curv_y = curv_x = math.nan
    if 0 < jy < m - 1:
        dy = _parabolic_offset(block[jy - 1, jx], block[jy, jx], block[jy + 1, jx])
        curv_y = -(block[jy - 1, jx] - 2 * block[jy, jx] + block[jy + 1, jx]) / step**2
    if 0 < jx < m - 1:
        dx = _parabolic_offset(block[jy, jx - 1], block[jy, jx], block[jy, jx + 1])
        curv_x = -(block[jy, jx - 1] - 2 * block[jy, jx] + block[jy, jx + 1]) / step**2
    shift_y = float(ty[jy] + dy * step)
    shift_x = float(tx[jx] + dx * step)

    # normalised RMS error from the un-normalised cross-power at the found shift
    cc = float(_dft_block(cross, shape, np.array([shift_y]), np.array([shift_x]))[0, 0])
    error = math.sqrt(max(0.0, 1.0 - cc * cc / energy)) if cc > 0 else 1.0

    grid = step / math.sqrt(12.0) / (4.0 if u > 1 else 1.0)  # residual after parabolic refinement

    def _unc(curv: float) -> float:
        if not (math.isfinite(curv) and curv > 0):
            return math.sqrt(grid**2 + (step / 2) ** 2)
        return math.sqrt((noise * math.pi / math.sqrt(3.0) / curv) ** 2 + grid**2)

    return Registration(
        shift_y_px=shift_y,
        shift_x_px=shift_x,
        confidence=confidence,
        error=float(min(error, 1.0)),
        uncertainty_y_px=_unc(curv_y),
        uncertainty_x_px=_unc(curv_x),
        peak_height=max(peak_up, peak),
    )
