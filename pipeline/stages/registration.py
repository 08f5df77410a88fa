"""Sub-pixel registration of two images: upsampled-DFT cross-correlation, then a template match.

Our own implementation built on the single-step discrete-Fourier-transform method of
Guizar-Sicairos, Thurman & Fienup (2008): a coarse peak of the cross-correlation from one inverse
FFT, then a matrix-multiply DFT that evaluates the correlation only on a small
``1/upsample_factor``-pixel grid around that peak. Real transforms (``scipy.fft.rfft2``) halve the
work; windows and kernels are cached per image shape, so a run of frames of one size pays for them
once. By default a coarse pass on binned images is followed by a windowed normalised template
match on the overlapping parts (unbiased by the window, which matters for terraced frames), and
atomic-lattice Fourier peaks are removed before either, so that a lattice cannot make every
lattice translation look like the answer.

Sign convention (used everywhere in the drift code): the returned shift is the displacement of
image features *from the reference to the moving image*, ``moving(r) ≈ reference(r − shift)``.
``skimage.registration.phase_cross_correlation`` returns the opposite sign (the shift that moves
the moving image back onto the reference).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import scipy.fft as sfft
from scipy import ndimage as ndi

from pipeline.errors import ProcessingError

__all__ = ["Registration", "register_images"]

#: Half-width (pixels) of the neighbourhood around the main correlation peak that is excluded
#: when looking for the strongest competing peak (the confidence figure).
PEAK_EXCLUSION_PX = 3

#: A registration whose shift uncertainty is this much smaller across than along its worst
#: direction (ratio of the principal standard deviations) keeps its full confidence; more
#: one-directional ones (the ridge of straight step edges) lose confidence in proportion.
ISOTROPY_REFERENCE = 0.3

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
def _template_window(shape: tuple[int, int], margin: int, kind: str) -> np.ndarray:
    """The window of :func:`_window` shrunk to the interior inside a border of ``margin``."""
    inner = (shape[0] - 2 * margin, shape[1] - 2 * margin)
    w = np.zeros(shape)
    w[margin:shape[0] - margin, margin:shape[1] - margin] = _window(inner, kind)
    w.setflags(write=False)
    return w


@functools.lru_cache(maxsize=16)
def _flat_window(shape: tuple[int, int], margin: int) -> np.ndarray:
    """1 inside a border of ``margin`` pixels, a raised-cosine taper across the border."""
    def taper(n: int) -> np.ndarray:
        t = np.ones(n)
        ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(margin) + 0.5) / margin)
        t[:margin] = ramp
        t[n - margin:] = ramp[::-1]
        return t

    w = taper(shape[0])[:, None] * taper(shape[1])[None, :]
    w.setflags(write=False)
    return w


@functools.lru_cache(maxsize=16)
def _window_sums(shape: tuple[int, int], kind: str) -> tuple[float, float]:
    """``Σw²`` and ``Σw⁴`` of a cached window."""
    w2 = _window(shape, kind) ** 2
    return float(w2.sum()), float((w2 * w2).sum())


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

    ``spectrum`` is a half spectrum (``rfft2`` layout), or a stack of them (leading axis); the
    result is ``Re(E_y · spectrum · E_x) / N`` with the kernels of :func:`_frequencies`, i.e.
    the inverse transform evaluated off the pixel grid (Guizar-Sicairos et al. 2008,
    matrix-multiply DFT). A stack shares the kernels.
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
) -> tuple[np.ndarray, np.ndarray, float]:
    """Zero-weight unusable pixels, remove the weighted best-fit plane, apply the window.

    Returns the prepared image, the weight map (window × usable) and the usable fraction.
    Filling unusable pixels with the plane before windowing and giving them zero weight are the
    same thing here, because the plane is removed. Removing the plane (not only the mean)
    matters for terraced frames: a staircase keeps its mean slope after levelling, and a
    windowed slope correlates best at zero shift.
    """
    valid = np.isfinite(image)
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != image.shape:
            raise ProcessingError(
                f"register_images: {name}_mask has shape {m.shape}, expected {image.shape} like "
                f"the {name} image")
        valid &= m
    if valid.all():
        weight, filled, frac = window, image, 1.0
    else:
        frac = float(valid.mean())
        weight = np.where(valid, window, 0.0)
        filled = np.where(valid, image, 0.0)
    if not float(weight.sum()) > 0:
        return np.zeros(image.shape), weight, 0.0
    yv = np.arange(image.shape[0]) - 0.5 * (image.shape[0] - 1)
    xv = np.arange(image.shape[1]) - 0.5 * (image.shape[1] - 1)
    wy, wx = weight.sum(axis=1), weight.sum(axis=0)
    wf = weight * filled
    fy, fx = wf.sum(axis=1), wf.sum(axis=0)
    normal = np.array([[wy.sum(), wy @ yv, wx @ xv],
                       [wy @ yv, wy @ yv**2, yv @ weight @ xv],
                       [wx @ xv, yv @ weight @ xv, wx @ xv**2]])
    rhs = np.array([fy.sum(), fy @ yv, fx @ xv])
    try:
        c0, cy, cx = np.linalg.solve(normal, rhs)
    except np.linalg.LinAlgError:
        c0, cy, cx = rhs[0] / normal[0, 0], 0.0, 0.0
    out = filled - c0
    out -= cy * yv[:, None]
    out -= cx * xv[None, :]
    out *= weight
    return out, weight, frac


def _raw_hessian(cross: np.ndarray, shape: tuple[int, int], ty: float, tx: float) -> np.ndarray:
    """Negative Hessian of the raw correlation ``irfft2(cross)`` at ``(ty, tx)`` (per pixel²)."""
    ny, nx = shape
    ky, kx, wk = _frequencies(shape)
    gy = 2 * np.pi * ky / ny
    gx = 2 * np.pi * kx / nx
    phase = cross * np.exp(2j * np.pi * (np.outer(ky * ty / ny, np.ones(kx.size))
                                         + np.outer(np.ones(ky.size), kx * tx / nx)))
    re = (phase * wk).real
    n = ny * nx
    hyy = float(gy**2 @ re.sum(axis=1)) / n
    hxx = float(re.sum(axis=0) @ gx**2) / n
    hyx = float(gy @ re @ gx) / n
    return np.array([[hyy, hyx], [hyx, hxx]])


def _energy(spec: np.ndarray, shape: tuple[int, int]) -> float:
    """``Σ f²`` of a real image from its half spectrum (Parseval)."""
    _, _, wk = _frequencies(shape)
    return float(((spec.real**2 + spec.imag**2) @ wk).sum()) / (shape[0] * shape[1])


#: A cross-power bin this many times above its neighbourhood (geometric mean over
#: :data:`PERIODIC_BACKGROUND_BINS` bins) counts as a lattice (Bragg) peak.
PERIODIC_PEAK_RATIO = 50.0
PERIODIC_BACKGROUND_BINS = 9
#: More flagged bins than this fraction means a continuous spectrum, not a lattice.
PERIODIC_MAX_FRACTION = 0.02
#: Largest extent (bins) of one flagged spot for it to count as a lattice peak.
PERIODIC_MAX_SPOT_BINS = 5
#: A lattice peak also exceeds the highest bin on a ring 4-6 bins around it this many times.
PERIODIC_RING_RATIO = 10.0
_ring = [(dy, dx) for dy in range(-6, 7) for dx in range(-6, 7) if 16 <= dy * dy + dx * dx <= 36]
_RING_OFFSETS = (np.array([r[0] for r in _ring]), np.array([r[1] for r in _ring]))


def _periodic_notch(spec_a: np.ndarray, spec_b: np.ndarray,
                    shape: tuple[int, int]) -> np.ndarray | None:
    """Keep-mask that removes isolated strong peaks (a lattice) from two half spectra.

    A bin of the cross-power magnitude ``|F|·|G|`` more than :data:`PERIODIC_PEAK_RATIO` times
    above the geometric mean of its neighbourhood, in a compact spot, counts as a Bragg peak;
    the spots and two bins around them (window leakage) are removed. ``None`` when there are
    none.
    """
    ny, nx = shape
    ky, kx, _ = _frequencies(shape)
    logm = np.log(np.abs(spec_a) * np.abs(spec_b) + 1e-300)
    # rows of the half spectrum are periodic, its columns are not (0 … Nyquist)
    background = ndi.uniform_filter(logm, size=PERIODIC_BACKGROUND_BINS,
                                    mode=("wrap", "reflect"))
    peaks = logm - background > math.log(PERIODIC_PEAK_RATIO)
    kr = np.hypot((ky / ny)[:, None], (kx / nx)[None, :])
    peaks &= kr > 6.0 / min(ny, nx)
    count = int(peaks.sum())
    if count == 0 or count > PERIODIC_MAX_FRACTION * peaks.size:
        return None
    # an isolated spot stands above everything on a ring around it; a streak (the Fourier
    # line of a straight step edge, dashed by window ripples) runs through its ring
    iy, ix = np.nonzero(peaks)
    ring_y, ring_x = _RING_OFFSETS
    ry = iy[:, None] + ring_y[None, :]
    rx = ix[:, None] + ring_x[None, :]
    # columns outside the half spectrum are the conjugates of (−ky, −kx) and (−ky, nx − kx)
    low, high = rx < 0, rx > logm.shape[1] - 1
    ry = np.where(low | high, -ry, ry) % ny
    rx = np.where(low, -rx, np.where(high, nx - rx, rx))
    ring_max = logm[ry, rx].max(axis=1)
    isolated = logm[iy, ix] - ring_max > math.log(PERIODIC_RING_RATIO)
    peaks[iy[~isolated], ix[~isolated]] = False
    if not peaks.any():
        return None
    # Bragg peaks are compact spots; streaks of straight steps and the edge of a band limit
    # are extended, and carry real (aperiodic) information: keep those
    labels, _ = ndi.label(peaks)
    for k, box in enumerate(ndi.find_objects(labels), start=1):
        if box is not None and max(sl.stop - sl.start for sl in box) > PERIODIC_MAX_SPOT_BINS:
            peaks[box] &= labels[box] != k
    if not peaks.any():
        return None
    return ~ndi.binary_dilation(peaks, iterations=2)


def _local_maxima(c: np.ndarray) -> np.ndarray:
    """Boolean map of (periodic) 4-neighbour local maxima."""
    m = c > np.roll(c, 1, 0)
    m &= c >= np.roll(c, -1, 0)
    m &= c > np.roll(c, 1, 1)
    m &= c >= np.roll(c, -1, 1)
    return m


@dataclass(frozen=True)
class _Pass:
    shift_y: float
    shift_x: float
    confidence: float
    error: float
    cov: tuple[float, float, float]  # (yy, yx, xx), px²
    peak: float


_FAILED = _Pass(0.0, 0.0, 0.0, 1.0, (math.inf, 0.0, math.inf), 0.0)


def _register_once(
    a: np.ndarray,
    b: np.ndarray,
    mask_a: np.ndarray | None,
    mask_b: np.ndarray | None,
    u: int,
    window: str,
    normalization: str | None,
    workers: int | None,
) -> _Pass:
    """One registration pass over the whole search range, both images windowed."""
    shape = (int(a.shape[0]), int(a.shape[1]))
    ny, nx = shape
    w = _window(shape, window)
    fa, wa, frac_a = _prepare(a, mask_a, w, "reference")
    fb, wb, frac_b = _prepare(b, mask_b, w, "moving")
    ea = float(np.vdot(fa.ravel(), fa.ravel()))
    eb = float(np.vdot(fb.ravel(), fb.ravel()))
    energy = ea * eb
    if min(frac_a, frac_b) < MIN_VALID_FRACTION or not energy > 0:
        return _FAILED

    spec_a = sfft.rfft2(fa, workers=workers)
    spec_b = sfft.rfft2(fb, workers=workers)
    # a lattice makes every lattice translation a near-perfect match (and an under-sampled one
    # moves inconsistently): register the aperiodic content only
    keep = _periodic_notch(spec_a, spec_b, shape)
    if keep is not None:
        spec_a = spec_a * keep
        spec_b = spec_b * keep
        ea_n, eb_n = _energy(spec_a, shape), _energy(spec_b, shape)
        energy *= (ea_n / ea) * (eb_n / eb)
        ea, eb = ea_n, eb_n
        if not energy > 0:
            return _FAILED
    cross = np.conj(spec_a)
    cross *= spec_b  # conj(F)·G: the correlation peaks at +shift
    if normalization == "phase":
        mag = np.abs(cross)
        mag[mag < 1e-15 * max(float(mag.max()), 1e-300)] = np.inf
        spectrum = cross / mag
        scale = 1.0
    else:
        spectrum = cross
        scale = 1.0 / math.sqrt(energy)  # correlation coefficient
    corr = sfft.irfft2(spectrum, s=shape, workers=workers)
    corr *= scale
    py, px = divmod(int(np.argmax(corr)), nx)
    peak = float(corr[py, px])
    if not peak > 0:
        return _FAILED
    confidence = _lobe_uniqueness(corr, py, px, peak)
    sy = float(py - ny if py > ny // 2 else py)
    sx = float(px - nx if px > nx // 2 else px)
    shift_y, shift_x, hessian, _ = _upsample_peak(
        lambda ty, tx: _dft_block(spectrum, shape, ty, tx) * scale, sy, sx, u)
    step = 1.0 / u if u > 1 else 1.0

    # normalised RMS error from the un-normalised cross-power at the found shift (Eq. 1)
    cc = float(_dft_block(cross, shape, np.array([shift_y]), np.array([shift_x]))[0, 0])
    error = math.sqrt(max(0.0, 1.0 - cc * cc / energy)) if cc > 0 else 1.0
    # uniqueness of the peak times the correlation coefficient of the match
    confidence *= max(cc, 0.0) / math.sqrt(energy)

    # least-squares covariance: residual noise over the gradient structure of the images.
    # Per-pixel variance of the difference image: two images of variances σa², σb² that
    # correlate with coefficient ρ differ by σa² + σb² − 2ρσaσb.
    rho = max(cc, 0.0) / math.sqrt(energy)
    if wa is w and wb is w:
        w2, w4 = _window_sums(shape, window)
    else:
        wab = wa * wb
        w2, w4 = float(np.sum(wab)), float(np.sum(wab * wab))
    va, vb = ea / max(float(np.sum(wa * wa)), 1e-300), eb / max(float(np.sum(wb * wb)), 1e-300)
    var_d = max(va + vb - 2.0 * rho * math.sqrt(va * vb), 0.0)
    grid = step / math.sqrt(12.0) / (4.0 if u > 1 else 1.0)
    if normalization is None and hessian is not None:
        tensor = hessian * math.sqrt(energy)  # Hessian of the raw correlation: Σ ∇(wA)·∇(wB)
        nn = 0.5 * var_d * math.sqrt(w4) / math.sqrt(energy)
    else:  # phase correlation: no such identity; use the hessian of the raw cross-power
        hraw = _raw_hessian(cross, shape, shift_y, shift_x)
        tensor, nn = hraw, 0.0
    cov = _ls_covariance(tensor, var_d, w4 / w2, hessian, nn, grid)
    return _Pass(shift_y, shift_x, confidence, float(min(error, 1.0)),
                 (float(cov[0, 0]), float(cov[0, 1]), float(cov[1, 1])), peak)


def _ls_covariance(signal_tensor: np.ndarray | None, var_d: float, factor: float,
                   hessian: np.ndarray | None, nn_std: float, grid: float) -> np.ndarray:
    """Shift covariance (px²) of a (weighted) least-squares registration.

    ``var_d · factor · J⁻¹`` with ``J`` the gradient cross-tensor ``Σ w ∇A ∇Bᵀ`` of the two
    images at the found shift. ``J`` is measured as the Hessian of the raw correlation at its
    peak, so the images' noise, being independent, does not inflate it (an auto-tensor
    ``Σ w ∇A ∇Aᵀ`` would count the noise's own gradients as information). Along the ridge of a
    straight step edge ``J`` is small and the uncertainty large, as it should be. Added: the
    noise × noise part of the correlation (std ``nn_std``, slope ``π/√3`` per pixel for white
    noise band-limited to the pixel grid, through the peak's Hessian) and the grid resolution.
    """
    inf = np.array([[math.inf, 0.0], [0.0, math.inf]])
    if signal_tensor is None or not (math.isfinite(var_d) and np.all(np.isfinite(signal_tensor))):
        return inf
    if not np.all(np.linalg.eigvalsh(signal_tensor) > 0):
        return inf
    cov = var_d * factor * np.linalg.inv(signal_tensor)
    if hessian is not None and nn_std > 0:
        hinv = np.linalg.inv(hessian)
        cov = cov + (nn_std * math.pi / math.sqrt(3.0)) ** 2 * hinv @ hinv
    return cov + np.eye(2) * grid**2


def _lobe_uniqueness(surface: np.ndarray, py: int, px: int, peak: float) -> float:
    """``1 − second/peak`` with ``second`` the highest local maximum outside the peak's lobe.

    The lobe is the ellipse of 2.5 peak widths along the principal axes of the peak's curvature
    (coarse 3 × 3 Hessian), at least :data:`PEAK_EXCLUSION_PX` pixels: bumps along the ridge of
    a step edge belong to the main peak (their spread is in the covariance), separate peaks
    (a lattice translation, a chance match) compete.
    """
    ny, nx = surface.shape
    c = surface[np.ix_(np.arange(py - 1, py + 2) % ny, np.arange(px - 1, px + 2) % nx)]
    hyy = 2 * c[1, 1] - c[0, 1] - c[2, 1]
    hxx = 2 * c[1, 1] - c[1, 0] - c[1, 2]
    hyx = -(c[2, 2] - c[2, 0] - c[0, 2] + c[0, 0]) / 4
    curv = np.array([[hyy, hyx], [hyx, hxx]]) / peak  # 1/σ² along the principal axes
    cap = 1.0 / (0.25 * min(ny, nx)) ** 2  # lobes no longer than a quarter of the image
    lam, vec = np.linalg.eigh(curv)
    curv = vec @ np.diag(np.maximum(lam, cap)) @ vec.T
    lm = np.flatnonzero(_local_maxima(surface))
    ly, lx = np.divmod(lm, nx)
    dyl = ((ly - py + ny // 2) % ny - ny // 2).astype(float)
    dxl = ((lx - px + nx // 2) % nx - nx // 2).astype(float)
    maha = curv[0, 0] * dyl**2 + 2 * curv[0, 1] * dyl * dxl + curv[1, 1] * dxl**2
    far = (maha > 2.5**2) & (dyl**2 + dxl**2 > PEAK_EXCLUSION_PX**2)
    second = float(surface.ravel()[lm[far]].max()) if np.any(far) else 0.0
    return float(np.clip(1.0 - max(second, 0.0) / peak, 0.0, 1.0))


def _upsample_peak(
    blocks: Callable[[np.ndarray, np.ndarray], np.ndarray], sy: float, sx: float, u: int
) -> tuple[float, float, np.ndarray | None, float]:
    """Locate the maximum of ``blocks(ty, tx)`` on a 1/u grid around ``(sy, sx)``.

    Two small matrix-DFT blocks instead of one of ``1.5u × 1.5u`` points: 7 × 7 points at
    0.25 px spacing (±0.75 px around the whole-pixel peak), then about ±0.2 px at ``1/u``
    (recentred if the maximum lands on its edge), and a three-point parabola through the
    final maximum. Returns the refined shift, the negative Hessian at the peak (per pixel²,
    or None at a block edge) and the peak value.
    """
    if u <= 1:
        stages = [(1.0, 1)]
    elif u <= 4:
        stages = [(1.0 / u, math.ceil(0.75 * u))]
    else:
        stages = [(0.25, 3), (1.0 / u, math.ceil(0.125 * u) + 1)]
    cy, cx = sy, sx
    block = ty = tx = None
    jy = jx = 0
    step = 1.0
    for k, (step, half) in enumerate(stages):
        for _ in range(3):  # recentre when the maximum lands on the edge of the block
            if k == len(stages) - 1 and u > 1:
                cy, cx = round(cy * u) / u, round(cx * u) / u
            offs = np.arange(-half, half + 1) * step
            ty, tx = cy + offs, cx + offs
            block = blocks(ty, tx)
            jy, jx = np.unravel_index(int(np.argmax(block)), block.shape)
            cy, cx = float(ty[jy]), float(tx[jx])
            if 0 < jy < 2 * half and 0 < jx < 2 * half:
                break
    assert block is not None and ty is not None and tx is not None
    m = block.shape[0]
    dy = dx = 0.0
    hessian = None
    if 0 < jy < m - 1 and 0 < jx < m - 1:
        dy = _parabolic_offset(block[jy - 1, jx], block[jy, jx], block[jy + 1, jx])
        dx = _parabolic_offset(block[jy, jx - 1], block[jy, jx], block[jy, jx + 1])
        hyy = (block[jy - 1, jx] - 2 * block[jy, jx] + block[jy + 1, jx]) / step**2
        hxx = (block[jy, jx - 1] - 2 * block[jy, jx] + block[jy, jx + 1]) / step**2
        hyx = (block[jy + 1, jx + 1] - block[jy + 1, jx - 1] - block[jy - 1, jx + 1]
               + block[jy - 1, jx - 1]) / (4 * step**2)
        hessian = -np.array([[hyy, hyx], [hyx, hxx]])
    return float(ty[jy] + dy * step), float(tx[jx] + dx * step), hessian, float(block[jy, jx])


def _plane_weights(weight: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``w``, ``w·y``, ``w·x`` with coordinates centred on the template's weighted centre."""
    ny, nx = weight.shape
    sw = float(weight.sum())
    yc = float(weight.sum(axis=1) @ np.arange(ny)) / sw
    xc = float(weight.sum(axis=0) @ np.arange(nx)) / sw
    return (weight, weight * (np.arange(ny) - yc)[:, None], weight * (np.arange(nx) - xc)[None, :])


@functools.lru_cache(maxsize=16)
def _template_spectrum(shape: tuple[int, int], margin: int, kind: str) -> np.ndarray:
    spec = sfft.rfft2(_template_window(shape, margin, kind))
    spec.setflags(write=False)
    return spec


def _register_template(
    a: np.ndarray,
    b: np.ndarray,
    mask_a: np.ndarray | None,
    mask_b: np.ndarray | None,
    u: int,
    window: str,
    margin: int,
    workers: int | None,
) -> _Pass:
    """A refinement pass for small shifts (``|τ| ≤ margin``): windowed normalised template match.

    The reference is windowed inside a border of ``2·margin`` pixels (the template ``w``); the
    moving image is flat (weight 1) wherever the template can reach and tapers only in its
    outer ``margin`` (which keeps a lattice's Fourier peaks compact enough to remove), and the
    correlation at each trial shift is normalised by
    the moving image's own weighted energy under the template there,
    ``ρ(τ) = Σ w·A'·B'(·+τ) / sqrt(Σ w·A'² · (Σ w·B'(·+τ)² − (Σ w·B'(·+τ))²/Σw))``,
    three FFT correlations (Lewis 1995). So the window weights the same surface at every trial
    shift and the coefficient is at most 1, with equality at the true shift (Cauchy–Schwarz):
    windowing both images instead favours the shift at which the windows coincide, which on the
    long correlation ridge of a straight step edge outweighs the features that pin the match.
    """
    shape = (int(a.shape[0]), int(a.shape[1]))
    ny, nx = shape
    w = _template_window(shape, 2 * margin, window)
    flat = _flat_window(shape, margin)
    fb, _, frac_b = _prepare(b, mask_b, flat, "moving")
    fa, wa, frac_a = _prepare(a, mask_a, w, "reference")
    if min(frac_a, frac_b) < MIN_VALID_FRACTION:
        return _FAILED
    spec_a = sfft.rfft2(fa, workers=workers)
    spec_b = sfft.rfft2(fb, workers=workers)
    keep = _periodic_notch(spec_a, spec_b, shape)
    if keep is not None:  # lattice peaks go from both images alike (same flat window)
        fa0, _, _ = _prepare(a, mask_a, flat, "reference")
        fa0 = sfft.irfft2(sfft.rfft2(fa0, workers=workers) * keep, s=shape, workers=workers)
        spec_b = spec_b * keep
        fb = sfft.irfft2(spec_b, s=shape, workers=workers)
        # flat = 1 wherever w > 0, so fa0 there is the detrended, filtered reference
        fa, wa, _ = _prepare(fa0, mask_a, w, "reference")
        spec_a = sfft.rfft2(fa, workers=workers)
    if wa is w:
        sw, w2, gy, gx, wy_, wx_ = _template_sums(shape, 2 * margin, window)
        wspec = _template_spectrum(shape, 2 * margin, window)
    else:
        _, wy_, wx_ = _plane_weights(wa)
        inside = np.where(wa > 0, wa, 1.0)
        sw, w2 = float(wa.sum()), float(np.sum(wa * wa))
        gy, gx = float(np.sum(wy_ * wy_ / inside)), float(np.sum(wx_ * wx_ / inside))
        wspec = sfft.rfft2(wa, workers=workers)
    ea = float(np.sum(fa * fa / np.where(wa > 0, wa, 1.0)))  # Σ w·A'²
    if not (ea > 0 and sw > 0):
        return _FAILED
    spec_b2 = sfft.rfft2(fb * fb, workers=workers)
    # the local plane of B' under the template at every trial shift: projections on the
    # (orthogonal, for a symmetric window) basis w, w·y, w·x
    if wa is w:
        wyspec, wxspec = _template_plane_spectra(shape, 2 * margin, window)
    else:
        wyspec, wxspec = sfft.rfft2(wy_, workers=workers), sfft.rfft2(wx_, workers=workers)
    stack = np.empty((5, *spec_b.shape), dtype=complex)
    np.multiply(np.conj(spec_a), spec_b, out=stack[0])
    np.multiply(np.conj(wspec), spec_b2, out=stack[1])
    for row, ws in ((2, wspec), (3, wyspec), (4, wxspec)):
        np.multiply(np.conj(ws), spec_b, out=stack[row])

    def ncc(num: np.ndarray, s2: np.ndarray, s1: np.ndarray, sy_: np.ndarray,
            sx_: np.ndarray) -> np.ndarray:
        plane = s1 * s1 / sw + (sy_ * sy_ / gy if gy > 0 else 0.0) + \
            (sx_ * sx_ / gx if gx > 0 else 0.0)
        eb_local = np.maximum(s2 - plane, 1e-300)
        return num / np.sqrt(ea * eb_local)

    # only shifts within the margin are free of wrap-around: evaluate those
    lags = np.arange(-margin, margin + 1)
    sub = np.ix_(lags % ny, lags % nx)
    surface = ncc(*sfft.irfft2(stack, s=shape, axes=(-2, -1), workers=workers)[(slice(None),
                                                                               *sub)])
    jy, jx = divmod(int(np.argmax(surface)), surface.shape[1])
    peak = float(surface[jy, jx])
    if not peak > 0:
        return _FAILED
    padded = np.pad(surface, 1, constant_values=-1.0)  # no wrap-around for the local maxima
    uniqueness = _lobe_uniqueness(padded, jy + 1, jx + 1, peak)
    shift_y, shift_x, hessian, rho = _upsample_peak(
        lambda ty, tx: ncc(*_dft_block(stack, shape, ty, tx)), float(lags[jy]),
        float(lags[jx]), u)
    rho = float(np.clip(rho, 0.0, 1.0))
    # covariance of the weighted least-squares shift: cov = σd² J_w⁻¹ J_w² J_w⁻¹ with
    # J_w ≈ (Σw/Σw²) J_w²; J_w is the numerator's Hessian Σ w ∇A'∇B'ᵀ = ρ's Hessian × ea
    var_d = 2.0 * (ea / sw) * (1.0 - rho)
    grid = (1.0 / u if u > 1 else 1.0) / math.sqrt(12.0) / (4.0 if u > 1 else 1.0)
    tensor = None if hessian is None else hessian * ea
    cov = _ls_covariance(tensor, var_d, w2 / sw, hessian, 0.5 * var_d * math.sqrt(w2) / ea,
                         grid)
    return _Pass(shift_y, shift_x, uniqueness * rho, math.sqrt(max(0.0, 1.0 - rho * rho)),
                 (float(cov[0, 0]), float(cov[0, 1]), float(cov[1, 1])), rho)


@functools.lru_cache(maxsize=16)
def _template_plane_spectra(shape: tuple[int, int], margin: int,
                            kind: str) -> tuple[np.ndarray, np.ndarray]:
    """Spectra of ``w·y`` and ``w·x`` of an unmasked template."""
    _, _, _, _, wy_, wx_ = _template_sums(shape, margin, kind)
    out = (sfft.rfft2(wy_), sfft.rfft2(wx_))
    for arr in out:
        arr.setflags(write=False)
    return out


@functools.lru_cache(maxsize=16)
def _template_sums(shape: tuple[int, int], margin: int, kind: str) -> tuple[Any, ...]:
    """``Σw, Σw², Σw·y², Σw·x²`` and the maps ``w·y``, ``w·x`` of an unmasked template."""
    w, wy_, wx_ = _plane_weights(_template_window(shape, margin, kind))
    inside = np.where(w > 0, w, 1.0)
    for arr in (wy_, wx_):
        arr.setflags(write=False)
    return (float(w.sum()), float(np.sum(w * w)), float(np.sum(wy_ * wy_ / inside)),
            float(np.sum(wx_ * wx_ / inside)), wy_, wx_)


def _binned(image: np.ndarray, mask: np.ndarray | None,
            f: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Mean of ``f × f`` blocks of the usable pixels; a block is usable if half of it is."""
    if f == 1:
        return image, mask
    ny, nx = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    if mask is None and np.isfinite(image).all():
        return image[:ny, :nx].reshape(ny // f, f, nx // f, f).mean(axis=(1, 3)), None
    valid = np.isfinite(image[:ny, :nx])
    if mask is not None:
        valid &= np.asarray(mask, dtype=bool)[:ny, :nx]
    vals = np.where(valid, image[:ny, :nx], 0.0)
    count = valid.reshape(ny // f, f, nx // f, f).sum(axis=(1, 3))
    total = vals.reshape(ny // f, f, nx // f, f).sum(axis=(1, 3))
    out = np.divide(total, count, out=np.zeros(total.shape), where=count > 0)
    usable = count >= 0.5 * f * f
    return out, (None if usable.all() else usable)


def _fast_length_below(n: int) -> int:
    """Largest length ``<= n`` that :func:`scipy.fft.next_fast_len` accepts as fast."""
    m = n
    while m > 1 and sfft.next_fast_len(m, real=True) != m:
        m -= 1
    return m


def _overlap(n: int, k: int) -> tuple[slice, slice]:
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


#: Smallest overlap (pixels per axis) for the refinement pass on the overlapping crops.
MIN_REFINE_OVERLAP_PX = 16

#: Template-match passes at most (each on the overlapping crops at the current whole-pixel
#: estimate; a pass whose result rounds to the same whole pixels ends the refinement).
MAX_REFINE_PASSES = 4
#: The coarse pass of a refined registration runs on images binned to about this size.
COARSE_SIZE_PX = 64
#: Search margin of a refinement pass: 1/REFINE_MARGIN_DIVISOR of the crop, at least
#: REFINE_MIN_MARGIN_PX pixels.
REFINE_MARGIN_DIVISOR = 16
REFINE_MIN_MARGIN_PX = 4


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
        pixels, then windowed normalised template matches on the overlapping parts until the
        whole-pixel estimate stops changing (at most :data:`MAX_REFINE_PASSES`). ``False``: one
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
    slope), a windowed normalised cross-correlation computed with three FFT correlations
    [2]_. Its coefficient is at most 1, with equality at the true shift whatever the window.

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
        result = _register_once(a, b, reference_mask, moving_mask, u, win, normalization,
                                workers)
    else:
        # coarse pass over the whole search range on binned images, then template matches
        f = max(1, min(ny, nx) // COARSE_SIZE_PX)
        ab, mab = _binned(a, reference_mask, f)
        bb, mbb = _binned(b, moving_mask, f)
        coarse = _register_once(ab, bb, mab, mbb, min(u, 4), win, normalization, workers)
        result = _Pass(coarse.shift_y * f, coarse.shift_x * f, coarse.confidence,
                       coarse.error, tuple(c * f * f for c in coarse.cov), coarse.peak)
        est = (result.shift_y, result.shift_x)
        for _ in range(MAX_REFINE_PASSES if coarse.confidence > 0 else 0):
            ky, kx = round(est[0]), round(est[1])
            if min(ny - abs(ky), nx - abs(kx)) < MIN_REFINE_OVERLAP_PX:
                break
            ra, rb = _overlap(ny, ky)
            ca, cb = _overlap(nx, kx)
            ma = None if reference_mask is None else np.asarray(reference_mask, bool)[ra, ca]
            mb = None if moving_mask is None else np.asarray(moving_mask, bool)[rb, cb]
            crop = (ra.stop - ra.start, ca.stop - ca.start)
            margin = max(REFINE_MIN_MARGIN_PX, min(crop) // REFINE_MARGIN_DIVISOR, 2 * f)
            if min(crop) - 4 * margin < MIN_REFINE_OVERLAP_PX:
                break
            p = _register_template(a[ra, ca], b[rb, cb], ma, mb, u, win, margin, workers)
            if not p.confidence > 0:
                break
            est = (p.shift_y + ky, p.shift_x + kx)
            # a global ambiguity seen by the coarse pass stays: the smaller confidence wins
            result = _Pass(est[0], est[1], min(p.confidence, coarse.confidence), p.error, p.cov,
                           p.peak)
            if (round(est[0]), round(est[1])) == (ky, kx):
                break  # the template match is unbiased within its margin: done
    cyy, cyx, cxx = result.cov
    confidence = result.confidence
    lam = np.linalg.eigvalsh(np.array([[cyy, cyx], [cyx, cxx]])) if math.isfinite(cyy + cxx) \
        else np.array([0.0, 1.0])
    isotropy = math.sqrt(max(lam[0], 0.0) / lam[1]) if lam[1] > 0 else 0.0
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
