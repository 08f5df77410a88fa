"""Calibration: z scale from known step heights, lateral scale from atomic lattice periods.

- :func:`z_scale_from_steps` (run level, pure function) combines the step heights that
  :func:`pipeline.stages.level.level_terraces` measured on a run's frames into one z scale
  factor; :func:`scale_height` (stage) applies a factor to a frame.
- :func:`measure_lattice` finds the six first-order peaks of a hexagonal lattice in the 2-D
  Fourier transform of an atomically resolved frame and returns the lateral scale factors and
  the skew of the scan axes (:class:`LatticeCalibration`); :func:`scale_lateral` (stage)
  rescales a frame's coordinates.

Conventions: a scale factor is *true length / nominal length*; multiplying the nominal
coordinates (heights) by it gives calibrated ones.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr
from numpy.typing import ArrayLike
from scipy import fft as sfft
from scipy import ndimage

from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS, stage

__all__ = [
    "LatticeCalibration",
    "measure_lattice",
    "scale_height",
    "scale_lateral",
    "step_consensus",
    "step_disagreement",
    "z_scale_from_steps",
]

_MAD_TO_SIGMA = 1.482602218505602
#: Largest relative closure error |g3 - g2 + g1| / |g| of a hexagonal peak set.
_CLOSURE_TOL = 0.05

#: Height-valued attributes (m) of a processed frame (height, levelling, quality stages);
#: :func:`scale_height` scales them with the map.
_HEIGHT_ATTRS = (
    "step_height_m", "plane_only_step_height_m", "terrace_offsets_m", "line_offsets_m",
    "line_step_heights_m", "line_offset_rms_m", "background_coefficients_m",
    "terrace_fit_coefficients_m", "background_residual_rms_m", "scar_threshold_m",
    "tip_jumps_m", "height_noise_m", "mean_height_before_levelling_m",
    "Sa_m", "Sq_m", "Sp_m", "Sv_m", "Sz_m",
)
#: Height-valued attributes with their standard uncertainty attribute (same shape).
_HEIGHT_UNCERTAINTIES = (("step_height_m", "step_height_uncertainty_m"),
                         ("tip_jumps_m", "tip_jump_uncertainties_m"))
#: Tilt attributes (rad, atan of a slope along x or y) written by the levelling stages.
_TILT_X = ("tilt_x_rad", "background_tilt_x_rad", "plane_only_tilt_x_rad")
_TILT_Y = ("tilt_y_rad", "background_tilt_y_rad", "plane_only_tilt_y_rad")
#: Slopes along x (height per length, one per line) written by line levelling.
_SLOPES_X = ("line_slopes",)
#: Lateral lengths (m) and velocities (m/s) along x and y; :func:`scale_lateral` scales them.
_LATERAL_X = ("scan_size_x_m", "scan_center_x_m", "drift_displacement_x_m", "drift_shift_x_m",
              "drift_velocity_x_m_per_s")
_LATERAL_Y = ("scan_size_y_m", "scan_center_y_m", "drift_displacement_y_m", "drift_shift_y_m",
              "drift_velocity_y_m_per_s")


def _name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def _positive(value: float, what: str, where: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ProcessingError(f"{where}: {what} = {value!r} is not a number") from None
    if not (math.isfinite(v) and v > 0):
        raise ProcessingError(f"{where}: {what} = {value!r} must be a positive finite number")
    return v


# --------------------------------------------------------------------------------------------
# z scale
# --------------------------------------------------------------------------------------------


def step_consensus(step_heights_m: ArrayLike, uncertainties_m: ArrayLike) -> tuple[float, float]:
    """The unit step a run's frames agree on, and how much they scatter about it.

    Parameters
    ----------
    step_heights_m, uncertainties_m : array_like
        Finite unit step heights of the frames (m) and their positive standard uncertainties.

    Returns
    -------
    step_m, scatter_m : float
        Weighted median (weights 1/u², the lower one at an exact half) and the robust scatter
        of the heights about it (1.4826 × median absolute deviation [1]_), m.

    References
    ----------
    .. [1] P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273 (1993).
       DOI 10.1080/01621459.1993.10476408
    """
    h = np.asarray(step_heights_m, dtype=np.float64).ravel()
    u = np.asarray(uncertainties_m, dtype=np.float64).ravel()
    if h.size == 0 or h.shape != u.shape:
        raise ProcessingError(f"step consensus: {h.size} step heights and {u.size} "
                              "uncertainties (need the same number, at least one)")
    order = np.argsort(h)
    cw = np.cumsum(1 / u[order] ** 2)
    wmed = float(h[order][np.searchsorted(cw, 0.5 * cw[-1])])
    return wmed, _MAD_TO_SIGMA * float(np.median(np.abs(h - wmed)))


#: A frame's unit step off the run's by more than this fraction (as well as beyond its
#: uncertainty) disagrees: 2 %, the tolerance of a staircase's whole multiples.
STEP_RUN_TOLERANCE = 0.02


def step_disagreement(step_m: float, uncertainty_m: float, run_step_m: float,
                      run_scatter_m: float, threshold_sigma: float) -> tuple[bool, float]:
    """Whether one frame's unit step disagrees with the run's, and by how many σ.

    The σ is that of the difference with the frame's own uncertainty and the run's scatter
    combined, ``|s − m| / sqrt(u² + S²)`` (inf when both are 0). The frame disagrees when it
    exceeds ``threshold_sigma`` and the step is also more than :data:`STEP_RUN_TOLERANCE` off
    (``|s/m − 1|``): a deviation far beyond the noise but below 2 % is a calibration detail,
    not a wrong step.
    """
    diff = abs(step_m - run_step_m)
    sd = math.hypot(uncertainty_m, run_scatter_m)
    sigma = diff / sd if sd > 0 else (math.inf if diff else 0.0)
    return bool(sigma > threshold_sigma and diff > STEP_RUN_TOLERANCE * run_step_m), sigma


def z_scale_from_steps(
    step_heights_m: ArrayLike,
    uncertainties_m: ArrayLike,
    *,
    known_step_height_m: float,
    outlier_threshold_sigma: float | None = 5.0,
) -> tuple[float, float]:
    """z scale factor that makes a run's measured step heights equal a known step height.

    Parameters
    ----------
    step_heights_m : array_like
        Measured unit (monatomic) step heights, one per frame (m). Non-finite entries (frames
        without steps) are ignored.
    uncertainties_m : array_like
        Their standard uncertainties (m), same shape; must be positive where the height is
        finite.
    known_step_height_m : float
        True step height (m), e.g. a/sqrt(3) for an fcc(111) surface of cubic lattice
        constant a.
    outlier_threshold_sigma : float or None
        Heights further than this many combined standard deviations (own uncertainty and the
        robust scatter of the set) from the weighted median are left out; ``None`` keeps all.

    Returns
    -------
    scale, scale_uncertainty : float
        ``known / mean`` and its standard uncertainty.

    Raises
    ------
    ProcessingError
        No usable step height, mismatching shapes, non-positive uncertainties or known height.

    Notes
    -----
    The mean is the inverse-variance weighted mean; its uncertainty sqrt(1/sum w) is inflated
    by the Birge ratio sqrt(chi^2/(n-1)) when the heights scatter more than their
    uncertainties allow [1]_, and propagated to the ratio to first order
    (u_scale = scale * u_mean / mean).

    References
    ----------
    .. [1] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932). DOI 10.1103/PhysRev.40.207
    """
    where = "z scale from steps"
    known = _positive(known_step_height_m, "known_step_height_m", where)
    h = np.asarray(step_heights_m, dtype=np.float64).ravel()
    u = np.asarray(uncertainties_m, dtype=np.float64).ravel()
    if h.shape != u.shape:
        raise ProcessingError(f"{where}: {h.size} step heights but {u.size} uncertainties")
    use = np.isfinite(h)
    bad_u = use & ~(np.isfinite(u) & (u > 0))
    if bad_u.any():
        raise ProcessingError(f"{where}: uncertainties must be positive and finite; got "
                              f"{u[bad_u][:3].tolist()} for step heights {h[bad_u][:3].tolist()}")
    if not np.any(use & (h > 0)):
        raise ProcessingError(f"{where}: no usable step height (need at least one positive "
                              f"finite value, got {h[:5].tolist()})")
    use &= h > 0
    h, u = h[use], u[use]
    if outlier_threshold_sigma is not None and h.size >= 3:
        wmed, spread = step_consensus(h, u)
        keep = np.abs(h - wmed) <= outlier_threshold_sigma * np.sqrt(u**2 + spread**2)
        h, u = h[keep], u[keep]
    w = 1.0 / u**2
    mean = float(np.sum(w * h) / np.sum(w))
    u_mean = math.sqrt(1.0 / float(np.sum(w)))
    if h.size > 1:
        chi2 = float(np.sum(w * (h - mean) ** 2)) / (h.size - 1)
        if chi2 > 1:
            u_mean *= math.sqrt(chi2)
    scale = known / mean
    return scale, scale * u_mean / mean


def _like(old: Any, new: np.ndarray) -> Any:
    """``new`` as a float when ``old`` was a scalar, else as an array."""
    return float(new) if np.ndim(old) == 0 else new


def _rescale_tilts(attrs: dict[str, Any], fx: float, fy: float) -> None:
    """Tilts and slopes after multiplying every slope along x by ``fx``, along y by ``fy``."""
    for keys, f in ((_TILT_X, fx), (_TILT_Y, fy)):
        for k in keys:
            if k in attrs:
                attrs[k] = math.atan(f * math.tan(float(attrs[k])))
    for k in _SLOPES_X:
        if k in attrs:
            attrs[k] = _like(attrs[k], np.asarray(attrs[k], dtype=np.float64) * fx)
    if "residual_tilt_rad" in attrs:
        attrs["residual_tilt_rad"] = float(attrs["residual_tilt_rad"]) * max(abs(fx), abs(fy))


@stage(version="2")
def scale_height(ds: xr.Dataset, *, factor: float,
                 factor_uncertainty: float = 0.0) -> xr.Dataset:
    """Multiply a frame's heights (and its height-valued attributes) by a z scale factor.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame.
    factor : float
        z scale factor (true / nominal), e.g. from :func:`z_scale_from_steps`.
    factor_uncertainty : float
        Standard uncertainty of ``factor``.

    Returns
    -------
    xarray.Dataset
        New frame: ``height`` times ``factor``; ``height_uncertainty`` = sqrt((f u)^2 +
        (h u_f)^2) with h measured from the frame's own zero (after
        :func:`~pipeline.stages.level.level_terraces`, the lowest terrace); every
        height-valued attribute scaled likewise (:data:`_HEIGHT_ATTRS`: step heights, terrace
        offsets, line offsets, tip-change jumps, the noise, the ISO 25178-2 heights ``Sq_m``
        and the others), ``step_height_uncertainty_m`` and ``tip_jump_uncertainties_m`` with
        the same propagation, the tilts as atan(f tan t) and the line slopes times f; attrs
        ``z_scale_factor`` and ``z_scale_factor_uncertainty`` (cumulative when scaled
        twice).

    Raises
    ------
    ProcessingError
        A factor that is not positive and finite, or a negative uncertainty.
    """
    f = _positive(factor, "factor", f"frame {_name(ds)}: scale_height")
    uf = float(factor_uncertainty)
    if not (math.isfinite(uf) and uf >= 0):
        raise ProcessingError(f"frame {_name(ds)}: scale_height factor_uncertainty = "
                              f"{factor_uncertainty!r} must be >= 0 and finite")
    if "height" not in ds.data_vars:
        raise ProcessingError(f"frame {_name(ds)}: scale_height needs a variable 'height'")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    out = ds.copy()
    attrs = dict(ds.attrs)
    out["height"] = (ds["height"].dims, (f * h).astype(np.float32), dict(ds["height"].attrs))
    if "height_uncertainty" in ds:
        u = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
        hz = np.where(np.isfinite(h), h, 0.0)
        out["height_uncertainty"] = (ds["height_uncertainty"].dims,
                                     np.sqrt((f * u) ** 2 + (hz * uf) ** 2).astype(np.float32),
                                     dict(ds["height_uncertainty"].attrs))
    for k, ku in _HEIGHT_UNCERTAINTIES:  # GUM first order, from the unscaled values
        if k in attrs and ku in attrs:
            v, uv = (np.asarray(attrs[key], dtype=np.float64) for key in (k, ku))
            attrs[ku] = _like(attrs[ku], np.hypot(f * uv, v * uf))
    for k in _HEIGHT_ATTRS:
        if k in attrs:
            attrs[k] = _like(attrs[k], np.asarray(attrs[k], dtype=np.float64) * f)
    _rescale_tilts(attrs, f, f)
    f0 = float(attrs.get("z_scale_factor", 1.0))
    u0 = float(attrs.get("z_scale_factor_uncertainty", 0.0))
    attrs["z_scale_factor"] = f0 * f
    attrs["z_scale_factor_uncertainty"] = f0 * f * math.hypot(u0 / f0, uf / f)
    out.attrs = attrs
    return out


# --------------------------------------------------------------------------------------------
# lateral scale
# --------------------------------------------------------------------------------------------


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


@stage(version="2")
def scale_lateral(ds: xr.Dataset, *, scale_x: float, scale_y: float) -> xr.Dataset:
    """Rescale a frame's coordinates and scan size by lateral scale factors.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame with coordinates ``x``, ``y`` (m).
    scale_x, scale_y : float
        True / nominal length along x and y (e.g. :attr:`LatticeCalibration.scale_x`).

    Returns
    -------
    xarray.Dataset
        New frame with ``x``, ``y``, ``scan_size_*_m`` and ``scan_center_*_m`` multiplied by the
        factors (so the pixel-centre formula of the raw contract still holds), likewise the
        frame's drift displacement, shift and velocity (:data:`_LATERAL_X`,
        :data:`_LATERAL_Y`), the tilt attributes of the levelling stages and the line slopes
        adjusted to the new slopes, and cumulative attrs
        ``lateral_scale_x``, ``lateral_scale_y``. Skew is not resampled here (it would need an
        interpolation of the map); it is reported by :func:`measure_lattice`.

    Raises
    ------
    ProcessingError
        A factor that is not positive and finite.
    """
    where = f"frame {_name(ds)}: scale_lateral"
    sx = _positive(scale_x, "scale_x", where)
    sy = _positive(scale_y, "scale_y", where)
    out = ds.copy()
    for c, s in (("x", sx), ("y", sy)):
        if c in ds.coords:
            out = out.assign_coords({c: (c, np.asarray(ds[c].values) * s, dict(ds[c].attrs))})
    attrs = dict(ds.attrs)
    for keys, s in ((_LATERAL_X, sx), (_LATERAL_Y, sy)):
        for key in keys:
            if key in attrs:
                attrs[key] = float(attrs[key]) * s
    _rescale_tilts(attrs, 1.0 / sx, 1.0 / sy)
    attrs["lateral_scale_x"] = float(attrs.get("lateral_scale_x", 1.0)) * sx
    attrs["lateral_scale_y"] = float(attrs.get("lateral_scale_y", 1.0)) * sy
    out.attrs = attrs
    return out
