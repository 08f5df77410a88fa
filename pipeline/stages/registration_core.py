"""Building blocks of the registration (private; public API in :mod:`pipeline.stages.registration`).

Windows and their cached plane-fit data, the weighted plane removal, the matrix-multiply DFT that
evaluates a correlation off the pixel grid (Guizar-Sicairos, Thurman & Fienup 2008), an inverse
real FFT that computes only the wanted lags, and the sub-pixel peak search. Everything cached is
keyed on shapes and options only, never on image content, so no result depends on what was
registered before.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft

from pipeline.errors import ProcessingError

# --------------------------------------------------------------------------------------------
# windows (all separable: w = u ⊗ v), cached per shape with their plane-fit data
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class Weights:
    """A separable weight map ``w = u ⊗ v`` and what a weighted plane fit under it needs.

    All arrays are read-only (they live in caches). ``yv, xv`` are pixel coordinates centred on
    the image centre; ``normal`` is the 3 × 3 normal matrix of the fit of ``c0 + cy·y + cx·x``
    with weights ``w`` (``normal_inv`` its inverse, None if singular).
    """

    u: np.ndarray
    v: np.ndarray
    w: np.ndarray
    yv: np.ndarray
    xv: np.ndarray
    normal: np.ndarray
    normal_inv: np.ndarray | None

    @property
    def shape(self) -> tuple[int, int]:
        return (self.u.size, self.v.size)


def _make_weights(u: np.ndarray, v: np.ndarray) -> Weights:
    w = u[:, None] * v[None, :]
    yv = np.arange(u.size) - 0.5 * (u.size - 1)
    xv = np.arange(v.size) - 0.5 * (v.size - 1)
    normal = plane_normal(w, yv, xv)
    try:
        normal_inv = np.linalg.inv(normal)
    except np.linalg.LinAlgError:
        normal_inv = None
    for arr in (u, v, w, yv, xv, normal, normal_inv):
        if arr is not None:
            arr.setflags(write=False)
    return Weights(u, v, w, yv, xv, normal, normal_inv)


def _hann_1d(n: int) -> np.ndarray:
    """Hann window sampled at pixel centres, so that no row or column is zeroed entirely."""
    return 0.5 - 0.5 * np.cos(2 * np.pi * (np.arange(n) + 0.5) / n)


@functools.lru_cache(maxsize=16)
def window(shape: tuple[int, int], kind: str) -> Weights:
    """Full-frame apodisation window: ``"hann"`` or ``"none"`` (all ones)."""
    if kind == "none":
        return _make_weights(np.ones(shape[0]), np.ones(shape[1]))
    return _make_weights(_hann_1d(shape[0]), _hann_1d(shape[1]))


@functools.lru_cache(maxsize=16)
def template_window(shape: tuple[int, int], margin: int, kind: str) -> Weights:
    """The window of :func:`window` shrunk to the interior inside a border of ``margin``."""
    inner = window((shape[0] - 2 * margin, shape[1] - 2 * margin), kind)
    u, v = np.zeros(shape[0]), np.zeros(shape[1])
    u[margin:shape[0] - margin] = inner.u
    v[margin:shape[1] - margin] = inner.v
    return _make_weights(u, v)


@functools.lru_cache(maxsize=16)
def flat_window(shape: tuple[int, int], margin: int) -> Weights:
    """1 inside a border of ``margin`` pixels, a raised-cosine taper across the border."""
    ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(margin) + 0.5) / margin)

    def taper(n: int) -> np.ndarray:
        t = np.ones(n)
        t[:margin] = ramp
        t[n - margin:] = ramp[::-1]
        return t

    return _make_weights(taper(shape[0]), taper(shape[1]))


@functools.lru_cache(maxsize=16)
def window_sums(shape: tuple[int, int], kind: str) -> tuple[float, float]:
    """``Σw²`` and ``Σw⁴`` of a cached full-frame window."""
    w2 = window(shape, kind).w ** 2
    return float(w2.sum()), float((w2 * w2).sum())


@functools.lru_cache(maxsize=16)
def frequencies(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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


# --------------------------------------------------------------------------------------------
# preparation: weighted plane removal
# --------------------------------------------------------------------------------------------


def plane_normal(weight: np.ndarray, yv: np.ndarray, xv: np.ndarray) -> np.ndarray:
    """Normal matrix of the weighted least-squares fit of ``c0 + cy·y + cx·x``."""
    wy, wx = weight.sum(axis=1), weight.sum(axis=0)
    return np.array([[wy.sum(), wy @ yv, wx @ xv],
                     [wy @ yv, wy @ yv**2, yv @ weight @ xv],
                     [wx @ xv, yv @ weight @ xv, wx @ xv**2]])


def prepare(
    image: np.ndarray, mask: np.ndarray | None, weights: Weights, name: str
) -> tuple[np.ndarray, np.ndarray, float]:
    """Zero-weight unusable pixels, remove the weighted best-fit plane, apply the window.

    Returns the prepared image, the weight map (window × usable; the cached ``weights.w``
    itself when every pixel is usable, which callers test with ``is``) and the usable
    fraction. Filling unusable pixels with the plane before windowing and giving them zero
    weight are the same thing here, because the plane is removed. Removing the plane (not only
    the mean) matters for terraced frames: a staircase keeps its mean slope after levelling,
    and a windowed slope correlates best at zero shift.
    """
    m = None
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != image.shape:
            raise ProcessingError(
                f"register_images: {name}_mask has shape {m.shape}, expected {image.shape} like "
                f"the {name} image")
    window_map = weights.w
    # one summation decides the common case (all finite); a non-finite sum means a closer look
    if (m is None or m.all()) and math.isfinite(float(np.sum(image))):
        weight, filled, frac, normal = window_map, image, 1.0, weights.normal
    else:
        valid = np.isfinite(image)
        if m is not None:
            valid &= m
        if valid.all():
            weight, filled, frac, normal = window_map, image, 1.0, weights.normal
        else:
            frac = float(valid.mean())
            weight = np.where(valid, window_map, 0.0)
            filled = np.where(valid, image, 0.0)
            normal = plane_normal(weight, weights.yv, weights.xv)
    if not normal[0, 0] > 0:
        return np.zeros(image.shape), weight, 0.0
    yv, xv = weights.yv, weights.xv
    if weight is window_map:  # separable: the weighted row and column sums are two products
        fy = weights.u * (filled @ weights.v)
        fx = weights.v * (weights.u @ filled)
    else:
        wf = weight * filled
        fy, fx = wf.sum(axis=1), wf.sum(axis=0)
    rhs = np.array([fy.sum(), fy @ yv, fx @ xv])
    if normal is weights.normal and weights.normal_inv is not None:
        c0, cy, cx = weights.normal_inv @ rhs
    else:
        try:
            c0, cy, cx = np.linalg.solve(normal, rhs)
        except np.linalg.LinAlgError:
            c0, cy, cx = rhs[0] / normal[0, 0], 0.0, 0.0
    out = filled - (c0 + cy * yv)[:, None]
    out -= (cx * xv)[None, :]
    out *= weight
    return out, weight, frac


# --------------------------------------------------------------------------------------------
# correlation off the pixel grid, and on a few lags only
# --------------------------------------------------------------------------------------------


@functools.lru_cache(maxsize=64)
def _phase_table(n: int, q: int) -> np.ndarray:
    """``exp(2πi j/(q·n))`` for ``j = 0 … q·n − 1``: every DFT kernel value at 1/q-pixel lags."""
    table = np.exp((2j * np.pi / (q * n)) * np.arange(q * n))
    table.setflags(write=False)
    return table


@functools.lru_cache(maxsize=16)
def int_frequencies(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """The frequencies of :func:`frequencies` as integers (rows signed, columns 0 … nx/2)."""
    ky, kx, _ = frequencies(shape)
    out = (np.rint(ky).astype(np.int64), np.rint(kx).astype(np.int64))
    for a in out:
        a.setflags(write=False)
    return out


def lag_kernel(t: np.ndarray, k: np.ndarray, n: int, q: int | None) -> np.ndarray:
    """``exp(2πi t·k/n)``, shape ``(len(t), len(k))``, for integer frequencies ``k``.

    With ``q``, the lags ``t`` lie on the ``1/q``-pixel grid and the kernel is looked up in a
    cached table (exact integer phase arithmetic, no exponentials per call); without, it is
    computed directly.
    """
    if q is None:
        return np.exp((2j * np.pi / n) * np.outer(t, k))
    steps = np.rint(np.asarray(t, dtype=float) * q).astype(np.int64)
    return _phase_table(n, q)[np.outer(steps, k) % (q * n)]


def dft_block(
    spectrum: np.ndarray, shape: tuple[int, int], ty: np.ndarray, tx: np.ndarray,
    q: int | None = None,
) -> np.ndarray:
    """Real correlation at the positions ``ty`` (rows) × ``tx`` (columns) by matrix DFT.

    ``spectrum`` is a half spectrum (``rfft2`` layout), or a stack of them (leading axis); the
    result is ``Re(E_y · spectrum · E_x) / N`` with the kernels of :func:`frequencies`, i.e.
    the inverse transform evaluated off the pixel grid (Guizar-Sicairos et al. 2008,
    matrix-multiply DFT). A stack shares the kernels. ``q``: the positions lie on the
    ``1/q``-pixel grid (kernels from a table, see :func:`lag_kernel`).
    """
    ny, nx = shape
    ky, kx = int_frequencies(shape)
    wk = frequencies(shape)[2]
    ey = lag_kernel(ty, ky, ny, q)  # (my, ny)
    ex = wk[:, None] * lag_kernel(tx, kx, nx, q).T  # (nkx, mx)
    return (ey @ (spectrum @ ex)).real / (ny * nx)


def irfft2_at(spectrum: np.ndarray, shape: tuple[int, int], rows: np.ndarray, cols: np.ndarray,
              workers: int | None) -> np.ndarray:
    """``irfft2(spectrum, s=shape)[..., rows, :][..., cols]``, transforming only those rows.

    The column transform (complex, along the rows' axis) runs in full, the real transform along
    each row only for the wanted rows: a fraction ``len(rows)/ny`` of the second half of the
    work.
    """
    part = sfft.ifft(spectrum, axis=-2, workers=workers)[..., rows, :]
    return sfft.irfft(part, n=shape[1], axis=-1, workers=workers)[..., cols]


def parabolic_offset(cm: float, c0: float, cp: float) -> float:
    """Vertex offset (in samples, within ±0.5) of the parabola through three samples."""
    den = cm - 2.0 * c0 + cp
    if den >= 0 or not math.isfinite(den):
        return 0.0
    return float(np.clip(0.5 * (cm - cp) / den, -0.5, 0.5))


def parabolic_peak(surface: np.ndarray, jy: int, jx: int, *, wrap: bool) -> tuple[float, float]:
    """Sub-pixel offset of a grid maximum from three-point parabolas along each axis.

    ``wrap``: the surface is periodic (a circular correlation); otherwise an edge maximum has
    offset 0 along that axis.
    """
    ny, nx = surface.shape
    c = float(surface[jy, jx])
    if wrap:
        dy = parabolic_offset(surface[(jy - 1) % ny, jx], c, surface[(jy + 1) % ny, jx])
        dx = parabolic_offset(surface[jy, (jx - 1) % nx], c, surface[jy, (jx + 1) % nx])
        return dy, dx
    dy = parabolic_offset(surface[jy - 1, jx], c, surface[jy + 1, jx]) if 0 < jy < ny - 1 \
        else 0.0
    dx = parabolic_offset(surface[jy, jx - 1], c, surface[jy, jx + 1]) if 0 < jx < nx - 1 \
        else 0.0
    return dy, dx


#: Block recentrings of :func:`upsample_peak` (each climbs up to ~0.2 px). On the elongated
#: peak of a step edge the parabolic start can be a pixel or more off the maximum; three
#: recentrings then stopped on the block's edge, leaving no curvature (infinite uncertainty,
#: confidence 0) for a good match. Most searches stop after the first block.
MAX_RECENTRE = 8


def upsample_peak(
    blocks: Callable[[np.ndarray, np.ndarray, int], np.ndarray], sy: float, sx: float, u: int,
    start: tuple[float, float] | None = None,
) -> tuple[float, float, np.ndarray | None, float]:
    """Locate the maximum of ``blocks(ty, tx, q)`` on a 1/u grid around ``(sy, sx)``.

    Small matrix-DFT blocks instead of one of ``1.5u × 1.5u`` points: about ±0.2 px at
    ``1/u`` spacing around a sub-pixel ``start`` (recentred, at most :data:`MAX_RECENTRE`
    times, while the maximum lands on the block's edge), then a three-point parabola through
    the final maximum.
    ``start`` is the whole-pixel peak ``(sy, sx)`` plus the parabolic offsets on the whole-pixel
    surface (:func:`parabolic_peak`); without it a first block of 7 × 7 points at 0.25 px
    (±0.75 px around ``(sy, sx)``) finds it. Either way the search climbs to the same local
    maximum of the ``1/u`` grid; the parabolic start saves that first block. Returns the
    refined shift, the negative Hessian at the peak (per pixel², or None at a block edge) and
    the peak value. ``blocks`` is told that its positions lie on the ``1/q``-pixel grid.
    """
    if u <= 1:
        stages = [(1.0, 1, 1)]
    elif u <= 4:
        stages = [(1.0 / u, math.ceil(0.75 * u), u)]
    else:
        stages = [(0.25, 3, 4), (1.0 / u, math.ceil(0.125 * u) + 1, u)]
    cy, cx = sy, sx
    if start is not None and len(stages) > 1:
        stages = stages[-1:]
        cy, cx = start
    block = ty = tx = None
    jy = jx = 0
    step = 1.0
    for k, (step, half, q) in enumerate(stages):
        for _ in range(MAX_RECENTRE):  # recentre while the maximum lands on the block's edge
            if k == len(stages) - 1 and u > 1:
                cy, cx = round(cy * u) / u, round(cx * u) / u
            offs = np.arange(-half, half + 1) * step
            ty, tx = cy + offs, cx + offs
            block = blocks(ty, tx, q)
            jy, jx = np.unravel_index(int(np.argmax(block)), block.shape)
            cy, cx = float(ty[jy]), float(tx[jx])
            if 0 < jy < 2 * half and 0 < jx < 2 * half:
                break
    assert block is not None and ty is not None and tx is not None
    m = block.shape[0]
    dy = dx = 0.0
    hessian = None
    if 0 < jy < m - 1 and 0 < jx < m - 1:
        dy = parabolic_offset(block[jy - 1, jx], block[jy, jx], block[jy + 1, jx])
        dx = parabolic_offset(block[jy, jx - 1], block[jy, jx], block[jy, jx + 1])
        hyy = (block[jy - 1, jx] - 2 * block[jy, jx] + block[jy + 1, jx]) / step**2
        hxx = (block[jy, jx - 1] - 2 * block[jy, jx] + block[jy, jx + 1]) / step**2
        hyx = (block[jy + 1, jx + 1] - block[jy + 1, jx - 1] - block[jy - 1, jx + 1]
               + block[jy - 1, jx - 1]) / (4 * step**2)
        hessian = -np.array([[hyy, hyx], [hyx, hxx]])
    return float(ty[jy] + dy * step), float(tx[jx] + dx * step), hessian, float(block[jy, jx])


def peak_value(blocks: Callable[[np.ndarray, np.ndarray, int], np.ndarray], cy: float,
               cx: float, q: int, moves: int = 4) -> float:
    """Value of the maximum of ``blocks(ty, tx, q)`` near ``(cy, cx)``, to compare maxima.

    A 5 × 5 block at ``1/q`` pixel around the nearest ``1/q``-grid point, moved while its
    maximum lies on its edge (at most ``moves`` times), then the vertices of the two
    three-point parabolas through the maximum are added to it. Cheaper than
    :func:`upsample_peak`: no fine grid, no Hessian. NaN when the block's maximum is still on
    its edge after the last move (a ridge rising beyond it: no maximum nearby).
    """
    step = 1.0 / q
    cy, cx = round(cy * q) / q, round(cx * q) / q
    offs = np.arange(-2, 3) * step
    for _ in range(moves + 1):
        block = blocks(cy + offs, cx + offs, q)
        jy, jx = np.unravel_index(int(np.argmax(block)), block.shape)
        if 0 < jy < 4 and 0 < jx < 4:
            break
        cy, cx = cy + offs[jy], cx + offs[jx]
    else:
        return math.nan
    c = float(block[jy, jx])
    rise = 0.0
    for cm, cp in ((float(block[jy - 1, jx]), float(block[jy + 1, jx])),
                   (float(block[jy, jx - 1]), float(block[jy, jx + 1]))):
        d = parabolic_offset(cm, c, cp)
        rise += 0.5 * (cp - cm) * d + 0.5 * (cm - 2.0 * c + cp) * d * d
    return c + rise
