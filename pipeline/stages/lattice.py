"""Lateral scale from the atomic lattice: the six first-order peaks of a hexagonal lattice.

:func:`measure_lattice` finds them in the 2-D Fourier transform of an atomically resolved
frame and returns the lateral scale factors and the skew of the scan axes
(:class:`LatticeCalibration`); :func:`pipeline.stages.calibrate.scale_lateral` applies the
factors. A scale factor is *true length / nominal length*.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr
from scipy import fft as sfft
from scipy import ndimage

from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS
from pipeline.stages.calibrate import _name, _positive

__all__ = ["LatticeCalibration", "measure_lattice"]

#: Largest relative closure error |g3 - g2 + g1| / |g| of a hexagonal peak set.
_CLOSURE_TOL = 0.05


@dataclass(frozen=True)
class LatticeCalibration:
    """Result of :func:`measure_lattice` (all vectors in the frame's nominal coordinates).

    Attributes
    ----------
    frame_id : str
        The measured frame.
    lattice_constant_m : float
        Configured surface lattice period (nearest-neighbour distance), m.
    peaks_per_m : numpy.ndarray
        (3, 2) first-order reciprocal-lattice vectors (kx, ky) in cycles/m, in order of
        direction (0-180 deg); the other three peaks are their negatives.
    lattice_vectors_m : numpy.ndarray
        (2, 2) real-space basis vectors (rows) dual to the first two peaks, m.
    row_spacings_m : numpy.ndarray
        (3,) apparent spacing of the atomic rows of each peak, 1/|g|, m.
    apparent_lattice_constants_m : numpy.ndarray
        (3,) row spacing x 2/sqrt(3): the lattice period each direction suggests, m.
    angles_deg : numpy.ndarray
        (3,) angles between successive peak directions (60 deg each for an undistorted image).
    orientation_deg : float
        Direction of the first peak, degrees from the x axis.
    scale_x, scale_y : float
        True / nominal length along the fast (x) and slow (y) scan axes.
    skew_deg : float
        Angle by which the slow axis deviates from perpendicular to the fast axis, towards
        +x (true position = [[sx, sy sin g], [0, sy cos g]] @ nominal position).
    confidence : float
        0-1: the smaller of 1 - min_peak_snr / (weakest peak's signal-to-background ratio) and
        1 - (closure error of the peak set) / 0.05.
    peak_snr : numpy.ndarray
        (3,) peak power over the median power of the search annulus.
    """

    frame_id: str
    lattice_constant_m: float
    peaks_per_m: np.ndarray = field(repr=False)
    lattice_vectors_m: np.ndarray = field(repr=False)
    row_spacings_m: np.ndarray = field(repr=False)
    apparent_lattice_constants_m: np.ndarray = field(repr=False)
    angles_deg: np.ndarray = field(repr=False)
    orientation_deg: float
    scale_x: float
    scale_y: float
    skew_deg: float
    confidence: float
    peak_snr: np.ndarray = field(repr=False)

    def as_attrs(self) -> dict[str, Any]:
        """netCDF-safe attributes (numbers, strings, 1-D arrays) for the store."""
        return {
            "lattice_frame_id": self.frame_id,
            "lattice_constant_m": self.lattice_constant_m,
            "lattice_scale_x": self.scale_x,
            "lattice_scale_y": self.scale_y,
            "lattice_skew_deg": self.skew_deg,
            "lattice_confidence": self.confidence,
            "lattice_orientation_deg": self.orientation_deg,
            "lattice_apparent_constants_m": self.apparent_lattice_constants_m,
            "lattice_angles_deg": self.angles_deg,
            "lattice_peaks_per_m": self.peaks_per_m.ravel(),
        }


def _refine_peak(img: np.ndarray, kx0: float, ky0: float, *, upsample: int = 20,
                 reach: float = 1.0) -> tuple[float, float, float]:
    """Sub-bin peak of |DFT|^2 near (kx0, ky0) (cycles/pixel) by a local upsampled DFT.

    Evaluates the transform on a grid of 1/``upsample`` bin over +-``reach`` bins by two
    matrix products (Guizar-Sicairos et al. 2008), then interpolates the maximum with a
    parabola through log power along each axis. Returns (kx, ky, power).
    """
    ny, nx = img.shape
    steps = np.arange(-reach * upsample, reach * upsample + 1) / upsample
    kxs = kx0 + steps / nx
    kys = ky0 + steps / ny
    ex = np.exp(-2j * np.pi * np.outer(np.arange(nx), kxs))
    ey = np.exp(-2j * np.pi * np.outer(kys, np.arange(ny)))
    p = np.abs(ey @ img @ ex) ** 2
    j, i = np.unravel_index(int(np.argmax(p)), p.shape)

    def vertex(a: float, b: float, c: float) -> float:
        den = a - 2 * b + c
        return 0.5 * (a - c) / den if den < 0 else 0.0

    lp = np.log(np.maximum(p, np.finfo(float).tiny))
    di = vertex(lp[j, i - 1], lp[j, i], lp[j, i + 1]) if 0 < i < steps.size - 1 else 0.0
    dj = vertex(lp[j - 1, i], lp[j, i], lp[j + 1, i]) if 0 < j < steps.size - 1 else 0.0
    kx = kx0 + (steps[i] + di / upsample) / nx
    ky = ky0 + (steps[j] + dj / upsample) / ny
    return kx, ky, float(p[j, i])


def measure_lattice(
    ds: xr.Dataset,
    *,
    lattice_constant_m: float,
    min_peak_snr: float = 30.0,
    search_tolerance: float = 0.3,
) -> LatticeCalibration:
    """Lateral scale and skew of a frame from the first-order peaks of a hexagonal lattice.

    Parameters
    ----------
    ds : xarray.Dataset
        Atomically resolved processed frame (``height``; coordinates ``x``, ``y`` in m).
    lattice_constant_m : float
        True surface lattice period (nearest-neighbour distance, e.g. a/sqrt(2) for fcc(111)
        of cubic lattice constant a), m.
    min_peak_snr : float
        Each of the three peak pairs must stand this many times above the median power of the
        search annulus; otherwise the frame counts as not atomically resolved.
    search_tolerance : float
        Peaks are looked for at spatial frequencies within this relative distance of the one
        expected for ``lattice_constant_m`` (0.3 = +-30 %).

    Returns
    -------
    LatticeCalibration
        Lattice vectors, periods, angles, ``scale_x``, ``scale_y``, ``skew_deg`` and a
        ``confidence`` in (0, 1].

    Raises
    ------
    ProcessingError
        "not atomically resolved": no hexagonal set of three peak pairs above ``min_peak_snr``
        in the search annulus; also when the pixel spacing cannot resolve the expected period
        or the frame holds fewer than four periods. A frame that is not resolved is an error,
        never a result with made-up numbers.

    Notes
    -----
    The frame minus its least-squares plane (unusable pixels set to zero) is multiplied by a
    2-D Hann window [1]_ and transformed with a real FFT. Local maxima of the power in the
    annulus around |g| = 2/(sqrt(3) a) (the first-order reciprocal vectors of a hexagonal
    lattice of period a) are candidates; the strongest and the strongest ones near 60 and 120
    degrees from it form the set, which must close (g3 = g2 - g1 within 5 % of |g|, true for a
    hexagonal lattice under any linear distortion). Each peak is refined to about 1/100 of a
    frequency bin by a local upsampled DFT [2]_ and a parabola through log power. The measured
    vectors G satisfy
    G = M^T R G0 for the ideal set G0, an unknown rotation R and the map M from nominal to true
    coordinates; with A = G G0^+ (least squares over the three peaks), M^T M = A A^T, and the
    upper-triangular Cholesky factor of that gives M = [[sx, sy sin g], [0, sy cos g]]: the
    fast axis defines the direction, the slow axis may be skewed by g. Drift during the frame
    also distorts the lattice; measure on a drift-corrected frame or a fast one.

    References
    ----------
    .. [1] F. J. Harris, "On the use of windows for harmonic analysis with the discrete Fourier
       transform", Proc. IEEE 66, 51 (1978). DOI 10.1109/PROC.1978.10837
    .. [2] M. Guizar-Sicairos, S. T. Thurman, J. R. Fienup, "Efficient subpixel image
       registration algorithms", Opt. Lett. 33, 156 (2008). DOI 10.1364/OL.33.000156
    """
    name = _name(ds)
    where = f"frame {name}: lattice calibration"
    a = _positive(lattice_constant_m, "lattice_constant_m", where)
    snr_min = _positive(min_peak_snr, "min_peak_snr", where)
    tol = float(search_tolerance)
    if not 0 < tol < 0.5:
        raise ProcessingError(f"{where}: search_tolerance = {search_tolerance!r} must be in "
                              "(0, 0.5)")
    if "height" not in ds.data_vars or "x" not in ds.coords or "y" not in ds.coords:
        raise ProcessingError(f"{where}: needs variable 'height' and coordinates x, y (m)")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    ny, nx = h.shape
    flags = (np.asarray(ds["flags"].values, dtype=np.uint8) if "flags" in ds.data_vars
             else np.zeros(h.shape, np.uint8))
    valid = np.isfinite(h) & ((flags & np.uint8(BAD_PIXELS)) == 0)
    if valid.sum() < 0.5 * valid.size or min(nx, ny) < 16:
        raise ProcessingError(f"{where}: needs at least 16 x 16 pixels, half of them usable "
                              f"(frame {ny} x {nx}, {int(valid.sum())} usable)")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    dx = float(np.ptp(x)) / (nx - 1)
    dy = float(np.ptp(y)) / (ny - 1)
    g0 = 2.0 / (math.sqrt(3.0) * a)
    nyquist = 0.5 / max(dx, dy)
    if g0 * (1 - tol) >= nyquist:
        raise ProcessingError(
            f"{where}: not atomically resolved: pixel spacing {max(dx, dy):.3g} m cannot "
            f"resolve a lattice period of {a:.3g} m (needs a spacing below "
            f"{math.sqrt(3) * a / 4 / (1 - tol):.3g} m)")
    if g0 * min(nx * dx, ny * dy) < 4:
        raise ProcessingError(f"{where}: frame {nx * dx:.3g} m x {ny * dy:.3g} m holds fewer "
                              f"than four lattice periods of {a:.3g} m")
    # plane removal, window, transform
    yy, xx = np.nonzero(valid)
    des = np.stack([np.ones(yy.size), xx, yy], axis=1).astype(np.float64)
    coef, *_ = np.linalg.lstsq(des, h[yy, xx], rcond=None)
    img = np.zeros_like(h)
    img[yy, xx] = h[yy, xx] - des @ coef
    from scipy.signal import windows  # here: scipy.signal takes 0.3 s to import

    win = np.outer(windows.hann(ny, sym=False), windows.hann(nx, sym=False))
    img *= win
    power = np.abs(sfft.rfft2(img)) ** 2
    fy = sfft.fftfreq(ny)[:, None] / dy  # cycles/m
    fx = sfft.rfftfreq(nx)[None, :] / dx
    kmag = np.hypot(fx, fy)
    ring = (kmag >= (1 - tol) * g0) & (kmag <= (1 + tol) * g0)
    background = float(np.median(power[ring])) if ring.any() else 0.0
    local = ndimage.maximum_filter(power, size=3, mode=("wrap", "nearest")) == power
    cand = np.flatnonzero((local & ring).ravel())
    if cand.size == 0 or background <= 0:
        raise ProcessingError(f"{where}: not atomically resolved: no spectral peak near the "
                              f"lattice period {a:.3g} m")
    cand = cand[np.argsort(power.ravel()[cand])[::-1][:40]]
    cj, ci = np.divmod(cand, power.shape[1])
    vec = np.stack([fx[0, ci], fy[cj, 0]], axis=1)
    ang = np.degrees(np.arctan2(vec[:, 1], vec[:, 0])) % 180.0
    pw = power[cj, ci]
    sets = [0]
    for target in (60.0, 120.0):
        diff = np.abs((ang - ang[0] - target + 90.0) % 180.0 - 90.0)
        mag_ok = np.abs(np.hypot(vec[:, 0], vec[:, 1]) / np.hypot(*vec[0]) - 1) < 0.25
        ok = np.flatnonzero((diff < 15.0) & mag_ok)
        if ok.size == 0:
            raise ProcessingError(
                f"{where}: not atomically resolved: the strongest peak near the lattice "
                f"period (direction {ang[0]:.1f} deg, power {pw[0] / background:.3g} x "
                f"background) has no hexagonal partner at {target:.0f} deg")
        sets.append(int(ok[np.argmax(pw[ok])]))
    peaks = []
    snr = []
    for idx in sets:
        kx, ky, p = _refine_peak(img, float(fx[0, ci[idx]] * dx), float(fy[cj[idx], 0] * dy))
        g = np.array([kx / dx, ky / dy])
        if math.atan2(g[1], g[0]) < 0 or (g[1] == 0 and g[0] < 0):
            g = -g
        peaks.append(g)
        snr.append(p / background)
    snr_arr = np.array(snr)
    if snr_arr.min() < snr_min:
        raise ProcessingError(
            f"{where}: not atomically resolved: the weakest of the three lattice peaks stands "
            f"{snr_arr.min():.3g} x above the background (need {snr_min:g})")
    gm = np.array(peaks)
    angles = np.degrees(np.arctan2(gm[:, 1], gm[:, 0])) % 180.0
    order = np.argsort(angles)
    gm, angles, snr_arr = gm[order], angles[order], snr_arr[order]
    # a hexagonal set closes, g(120) = g(60) - g(0), under any linear distortion of the image;
    # harmonics of a staircase or other periodic texture do not
    closure = float(np.hypot(*(gm[2] - gm[1] + gm[0]))) / float(np.mean(np.hypot(*gm.T)))
    if closure > _CLOSURE_TOL:
        raise ProcessingError(
            f"{where}: not atomically resolved: the three strongest peaks near the lattice "
            f"period do not form a hexagonal set (g3 - g2 + g1 is {100 * closure:.0f} % of |g|,"
            f" at most {100 * _CLOSURE_TOL:.0f} % allowed)")
    steps = np.diff(np.r_[angles, angles[0] + 180.0])
    ideal = g0 * np.stack([np.cos(np.radians([0, 60, 120])), np.sin(np.radians([0, 60, 120]))])
    amat = gm.T @ np.linalg.pinv(ideal)
    mmat = np.linalg.cholesky(amat @ amat.T).T  # upper triangular, positive diagonal
    sx = float(mmat[0, 0])
    sy = float(math.hypot(mmat[0, 1], mmat[1, 1]))
    skew = math.degrees(math.atan2(mmat[0, 1], mmat[1, 1]))
    spacings = 1.0 / np.hypot(gm[:, 0], gm[:, 1])
    basis = np.linalg.inv(gm[:2].T)  # rows a1, a2 with a_i . g_j = delta_ij
    return LatticeCalibration(
        frame_id=name,
        lattice_constant_m=a,
        peaks_per_m=gm,
        lattice_vectors_m=basis,
        row_spacings_m=spacings,
        apparent_lattice_constants_m=spacings * 2.0 / math.sqrt(3.0),
        angles_deg=steps,
        orientation_deg=float(angles[0]),
        scale_x=sx,
        scale_y=sy,
        skew_deg=skew,
        confidence=float(np.clip(min(1.0 - snr_min / snr_arr.min(),
                                     1.0 - closure / _CLOSURE_TOL), 0.0, 1.0)),
        peak_snr=snr_arr,
    )
