"""Levelling stages: background plane/polynomial, line offsets, terraces, scars.

Every stage takes a processed frame (:func:`pipeline.model.make_height_frame`: ``height`` in m,
``height_uncertainty``, ``flags``; coordinates ``x``, ``y`` in m) and returns a new one. Pixels
that are NaN or carry a flag of :data:`pipeline.model.BAD_PIXELS` take part in no fit; they are
carried through unchanged (NaN stays NaN).

Recommended order in a batch::

    repair_scars -> level_lines -> level_terraces      (terraces on; its own common plane)
    repair_scars -> level_lines -> subtract_background (terraces off)

Scars first: they are found against the neighbouring lines whatever the line offsets are, and
once repaired they take part in the line matching as ordinary pixels. Line offsets next: they
cut spurious edges into the terrace segmentation and add noise to any plane, while the line
levelling itself keeps the plane's tilt and the steps. The background last: with terraces on,
:func:`level_terraces` fits the common plane (or polynomial) itself, and a plane subtracted
before it would only be refitted; a polynomial subtracted before it would eat into the
staircase.

All fits work in float64 on coordinates normalised to [-1, 1] (for conditioning); maps are
returned as float32.
"""

from __future__ import annotations

import math
from typing import Any, Literal

import numpy as np
import xarray as xr
from numpy.polynomial import legendre
from scipy import ndimage

from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS, FLAG_MEANINGS, Flag, add_warning, stage

__all__ = ["level_lines", "level_terraces", "repair_scars", "subtract_background"]

#: Tukey biweight tuning constant (95 % efficiency at the normal distribution); Beaton & Tukey,
#: Technometrics 16, 147 (1974).
TUKEY_C = 4.685
#: Huber tuning constant (95 % efficiency at the normal); Huber, Ann. Math. Stat. 35, 73 (1964).
HUBER_K = 1.345
#: Consistency factor of the median absolute deviation for a normal distribution, 1/Φ⁻¹(3/4).
MAD_TO_SIGMA = 1.482602218505602
#: Scales below this are treated as an exact fit (heights in m; far below any STM resolution).
_TINY_M = 1e-15
_MAX_ITER = 50
#: Gaps (pixels) bridged when measuring the length of a streak in :func:`repair_scars`.
_SCAR_GAP_PX = 4
_HUBER_ITER = 3


# --------------------------------------------------------------------------------------------
# shared helpers
# --------------------------------------------------------------------------------------------


def _name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def _bad_names() -> str:
    return "/".join(FLAG_MEANINGS[f] for f in FLAG_MEANINGS if f & BAD_PIXELS)


def _inputs(ds: xr.Dataset, what: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Height (float64 copy), flags (uint8 copy) and the mask of pixels usable in fits."""
    if "height" not in ds.data_vars or ds["height"].dims != ("y", "x"):
        raise ProcessingError(
            f"frame {_name(ds)}: {what} needs a variable 'height' with dims (y, x) (a processed "
            f"frame from make_height_frame); found {', '.join(map(str, ds.data_vars)) or 'none'}")
    h = np.array(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        flags = np.array(ds["flags"].values, dtype=np.uint8)
    else:
        flags = np.zeros(h.shape, dtype=np.uint8)
    valid = np.isfinite(h) & ((flags & np.uint8(BAD_PIXELS)) == 0)
    return h, flags, valid


def _require(ds: xr.Dataset, valid: np.ndarray, need: int, what: str) -> None:
    n = int(valid.sum())
    if n < need:
        raise ProcessingError(
            f"frame {_name(ds)}: {what} needs at least {need} usable pixels, found {n} of "
            f"{valid.size} (the others are NaN or flagged {_bad_names()})")


def _warn_if_constant(out: xr.Dataset, h: np.ndarray, valid: np.ndarray, what: str) -> bool:
    vals = h[valid]
    if vals.size and float(vals.max() - vals.min()) == 0.0:
        add_warning(out, f"{what}: height is constant over all {vals.size} usable pixels "
                    "(no topography: feedback or channel problem?); nothing to level")
        return True
    return False


def _coords(ds: xr.Dataset) -> tuple[np.ndarray, np.ndarray, float, float, float, float]:
    """Normalised coordinates u (x), v (y) in [-1, 1] and the half ranges/pixel steps in m."""
    ny, nx = ds.sizes["y"], ds.sizes["x"]
    if "x" not in ds.coords or "y" not in ds.coords:
        raise ProcessingError(
            f"frame {_name(ds)}: coordinates 'x' and 'y' (m) are missing; they are needed to "
            "express tilts in radians")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    hx = 0.5 * float(x.max() - x.min())
    hy = 0.5 * float(y.max() - y.min())
    if not (hx > 0 and hy > 0):
        raise ProcessingError(f"frame {_name(ds)}: coordinates x, y must span a positive range "
                              f"(got {2 * hx:g} m x {2 * hy:g} m)")
    u = (x - 0.5 * float(x.max() + x.min())) / hx
    v = (y - 0.5 * float(y.max() + y.min())) / hy
    dx = 2 * hx / max(nx - 1, 1)
    dy = 2 * hy / max(ny - 1, 1)
    return u, v, hx, hy, dx, dy


def _terms(order: int, *, constant: bool) -> list[tuple[int, int]]:
    """Legendre product terms P_i(u) P_j(v) with 1 <= i + j <= order (0 too if constant)."""
    start = 0 if constant else 1
    return [(d - j, j) for d in range(start, order + 1) for j in range(d + 1)]


def _term_names(terms: list[tuple[int, int]]) -> str:
    return " ".join(f"P{i}(u)P{j}(v)" for i, j in terms)


class _Basis:
    """Legendre product basis evaluated on a frame's normalised grid."""

    def __init__(self, u: np.ndarray, v: np.ndarray, order: int, *, constant: bool) -> None:
        self.terms = _terms(order, constant=constant)
        self.order = order
        self.pu = legendre.legvander(u, order)  # (nx, order+1)
        self.pv = legendre.legvander(v, order)  # (ny, order+1)
        self.ii = np.array([t[0] for t in self.terms], dtype=int)
        self.jj = np.array([t[1] for t in self.terms], dtype=int)

    @property
    def n(self) -> int:
        return len(self.terms)

    def at(self, iy: np.ndarray, ix: np.ndarray) -> np.ndarray:
        """Design matrix (n_pixels, n_terms) at pixel indices."""
        return self.pu[ix][:, self.ii] * self.pv[iy][:, self.jj]

    def surface(self, beta: np.ndarray) -> np.ndarray:
        """The fitted surface on the whole grid (ny, nx)."""
        if self.n == 0:
            return np.zeros((self.pv.shape[0], self.pu.shape[0]))
        return (self.pv[:, self.jj] * beta[None, :]) @ self.pu[:, self.ii].T

    def variance(self, cov: np.ndarray) -> np.ndarray:
        """Variance of the fitted surface at every pixel, phi^T C phi (ny, nx)."""
        ny, nx = self.pv.shape[0], self.pu.shape[0]
        if self.n == 0:
            return np.zeros((ny, nx))
        iy, ix = np.divmod(np.arange(ny * nx), nx)
        phi = self.at(iy, ix)
        return np.einsum("ij,jk,ik->i", phi, cov, phi).reshape(ny, nx).clip(min=0.0)

    def slope_at_centre(self, beta: np.ndarray, hx: float, hy: float) -> tuple[float, float]:
        """dh/dx and dh/dy (m/m) of the surface at the frame centre."""
        d0 = legendre.legval(0.0, np.eye(self.order + 1))  # P_k(0)
        d1 = np.array([legendre.legval(0.0, legendre.legder(np.eye(self.order + 1)[k]))
                       for k in range(self.order + 1)])  # P_k'(0)
        gx = float(np.sum(beta * d1[self.ii] * d0[self.jj])) / hx
        gy = float(np.sum(beta * d0[self.ii] * d1[self.jj])) / hy
        return gx, gy


def _tukey(t: np.ndarray) -> np.ndarray:
    a = t / TUKEY_C
    return np.where(np.abs(a) < 1.0, (1.0 - a * a) ** 2, 0.0)


def _huber(t: np.ndarray) -> np.ndarray:
    at = np.abs(t)
    return np.where(at <= HUBER_K, 1.0, HUBER_K / np.maximum(at, HUBER_K))


def _mad_scale(r: np.ndarray) -> float:
    if r.size == 0:
        return 0.0
    med = float(np.median(r))
    return MAD_TO_SIGMA * float(np.median(np.abs(r - med)))


class _FitResult:
    def __init__(self, beta: np.ndarray, weights: np.ndarray, cov: np.ndarray,
                 resid: np.ndarray, scale: float, n_iter: int) -> None:
        self.beta = beta
        self.weights = weights
        self.cov = cov
        self.resid = resid
        self.scale = scale
        self.n_iter = n_iter


def _fit(phi: np.ndarray, z: np.ndarray, labels: np.ndarray | None = None, n_labels: int = 0,
         *, robust: bool) -> _FitResult:
    """(Robust) least squares of ``z`` on ``[phi | one-hot(labels)]``.

    The one-hot block is never built: its normal-equation blocks come from ``bincount``. With
    ``robust`` the fit is iteratively reweighted (a few Huber steps, then Tukey's biweight; scale
    = MAD of the residuals, re-estimated at each step).
    """
    n, p = phi.shape
    t = n_labels if labels is not None else 0

    def solve(w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        pw = phi * w[:, None]
        m = np.zeros((p + t, p + t))
        rhs = np.zeros(p + t)
        m[:p, :p] = pw.T @ phi
        rhs[:p] = pw.T @ z
        if t:
            assert labels is not None
            cross = np.stack([np.bincount(labels, weights=pw[:, j], minlength=t)
                              for j in range(p)]) if p else np.zeros((0, t))
            m[:p, p:] = cross
            m[p:, :p] = cross.T
            m[p:, p:] = np.diag(np.bincount(labels, weights=w, minlength=t))
            rhs[p:] = np.bincount(labels, weights=w * z, minlength=t)
        minv = np.linalg.pinv(m, hermitian=True)
        return minv @ rhs, minv

    def predict(beta: np.ndarray) -> np.ndarray:
        out = phi @ beta[:p] if p else np.zeros(n)
        if t:
            out = out + beta[p:][labels]
        return out

    w = np.ones(n)
    beta, minv = solve(w)
    resid = z - predict(beta)
    scale = _mad_scale(resid)
    it = 0
    if robust:
        for it in range(1, _MAX_ITER + 1):
            if scale <= _TINY_M:
                break
            tt = resid / scale
            w = _huber(tt) if it <= _HUBER_ITER else _tukey(tt)
            new, minv = solve(w)
            change = float(np.max(np.abs(new - beta))) if new.size else 0.0
            beta = new
            resid = z - predict(beta)
            scale = _mad_scale(resid)
            if it > _HUBER_ITER and change < 1e-5 * max(scale, _TINY_M):
                break
    sw = float(w.sum())
    dof = sw - (p + t)
    sigma2 = float(np.sum(w * resid**2) / dof) if dof > 0 else 0.0
    return _FitResult(beta, w, sigma2 * minv, resid, scale, it)


def _copy_with(ds: xr.Dataset, *, height: np.ndarray, flags: np.ndarray | None = None,
               uncertainty: np.ndarray | None = None,
               extra: dict[str, tuple[np.ndarray, dict[str, Any]]] | None = None,
               attrs: dict[str, Any] | None = None) -> xr.Dataset:
    """A new frame with some maps replaced (float32 heights), the input left untouched."""
    out = ds.copy()
    out.attrs = dict(ds.attrs)
    out["height"] = (("y", "x"), height.astype(np.float32), dict(ds["height"].attrs))
    if flags is not None:
        fa = dict(ds["flags"].attrs) if "flags" in ds else {}
        out["flags"] = (("y", "x"), flags.astype(np.uint8), fa)
    if uncertainty is not None and "height_uncertainty" in ds:
        out["height_uncertainty"] = (("y", "x"), uncertainty.astype(np.float32),
                                     dict(ds["height_uncertainty"].attrs))
    for name, (arr, a) in (extra or {}).items():
        out[name] = (("y", "x"), arr, dict(a))
    out.attrs.update(attrs or {})
    return out


def _add_variance(ds: xr.Dataset, var: np.ndarray) -> np.ndarray | None:
    """sqrt(u^2 + var) for the frame's uncertainty map (None when the frame has none)."""
    if "height_uncertainty" not in ds:
        return None
    u = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
    return np.sqrt(u * u + var)


# --------------------------------------------------------------------------------------------
# 1. plane / polynomial background
# --------------------------------------------------------------------------------------------


@stage(version="1")
def subtract_background(
    ds: xr.Dataset,
    *,
    method: Literal["plane", "polynomial", "none"] = "plane",
    order: int = 2,
    robust: bool = True,
) -> xr.Dataset:
    """Subtract a least-squares plane or polynomial surface in x and y.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``; coordinates ``x``, ``y`` in m).
    method : {"plane", "polynomial", "none"}
        Background model. ``"none"`` returns an unchanged copy (with the choice recorded).
    order : int
        Total degree of the polynomial (1-8) when ``method="polynomial"``; a plane is order 1.
    robust : bool
        Iteratively reweighted fit, so that adsorbates, other terraces and outliers do not tilt
        the background. Pixels the robust fit rejects (weight 0) are flagged ``EXCLUDED``.

    Returns
    -------
    xarray.Dataset
        New frame with the whole fitted surface (constant included) subtracted. Attributes:
        ``background_method``, ``background_order``, ``background_terms`` (the basis),
        ``background_coefficients_m``, ``background_tilt_x_rad``, ``background_tilt_y_rad``
        (slope of the removed surface at the frame centre, ``atan(dh/dx)``),
        ``background_excluded_fraction``, ``background_residual_rms_m`` (robust).

    Raises
    ------
    ProcessingError
        Unknown method or order, or fewer usable pixels than the model has terms.

    Notes
    -----
    The model is a sum of Legendre products P_i(u) P_j(v), i + j <= order, on coordinates
    normalised to [-1, 1]; this basis keeps the normal equations well conditioned up to order 8
    (a plane is the same as in monomials). The robust fit is iteratively reweighted least
    squares [1]_: three Huber steps from the ordinary solution, then Tukey's biweight [2]_ with
    the residual MAD as scale, so points more than about 4.7 robust standard deviations away
    get zero weight. On a frame with several terraces the robust plane locks on to the largest
    terrace; an unbiased common plane across terraces is :func:`level_terraces`' job. The
    uncertainty map grows by the variance of the fitted surface at each pixel.

    References
    ----------
    .. [1] P. W. Holland, R. E. Welsch, "Robust regression using iteratively reweighted
       least-squares", Commun. Stat. Theory Methods 6, 813 (1977).
       DOI 10.1080/03610927708827533
    .. [2] A. E. Beaton, J. W. Tukey, "The fitting of power series, meaning polynomials,
       illustrated on band-spectroscopic data", Technometrics 16, 147 (1974).
       DOI 10.1080/00401706.1974.10489171
    """
    if method not in ("plane", "polynomial", "none"):
        raise ProcessingError(f"frame {_name(ds)}: background method {method!r} is not one of "
                              "'plane', 'polynomial', 'none'")
    if method == "none":
        out = ds.copy()
        out.attrs = {**ds.attrs, "background_method": "none"}
        return out
    if method == "plane":
        order = 1
    if isinstance(order, bool) or not isinstance(order, int | np.integer) or not 1 <= order <= 8:
        raise ProcessingError(f"frame {_name(ds)}: polynomial order {order!r} must be an "
                              "integer from 1 to 8")
    order = int(order)
    h, flags, valid = _inputs(ds, "subtract_background")
    basis_check = _terms(order, constant=True)
    _require(ds, valid, len(basis_check) + 1, f"a {method} fit of order {order}")
    u, v, hx, hy, _, _ = _coords(ds)
    basis = _Basis(u, v, order, constant=True)
    iy, ix = np.nonzero(valid)
    fit = _fit(basis.at(iy, ix), h[iy, ix], robust=robust)
    surf = basis.surface(fit.beta)
    new_flags = flags.copy()
    rejected = np.zeros_like(valid)
    if robust:
        rejected[iy, ix] = fit.weights == 0
        new_flags[rejected] |= np.uint8(Flag.EXCLUDED)
    gx, gy = basis.slope_at_centre(fit.beta, hx, hy)
    attrs = {
        "background_method": method,
        "background_order": order,
        "background_terms": _term_names(basis.terms) + "; u, v = x, y scaled to [-1, 1]",
        "background_coefficients_m": fit.beta.astype(np.float64),
        "background_tilt_x_rad": math.atan(gx),
        "background_tilt_y_rad": math.atan(gy),
        "background_excluded_fraction": float(rejected.sum() / max(valid.sum(), 1)),
        "background_residual_rms_m": float(fit.scale),
    }
    out = _copy_with(ds, height=h - surf, flags=new_flags,
                     uncertainty=_add_variance(ds, basis.variance(fit.cov)), attrs=attrs)
    _warn_if_constant(out, h, valid, "subtract_background")
    return out


# --------------------------------------------------------------------------------------------
# 2. line offsets
# --------------------------------------------------------------------------------------------


def _robust_line_differences(
    d: np.ndarray, m: np.ndarray, u: np.ndarray, *, slopes: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Robust offset (and slope) of each row of ``d`` over its mask ``m``, all rows at once.

    Returns offset (R,), slope (R,) (zeros unless ``slopes``) and the standard error of the
    offset (R,). Every row must have at least 3 pixels in ``m``.
    """
    dz = np.where(m, d, np.nan)
    loc = np.nanmedian(dz, axis=1)
    slope = np.zeros_like(loc)
    scale = MAD_TO_SIGMA * np.nanmedian(np.abs(dz - loc[:, None]), axis=1)
    scale = np.maximum(scale, _TINY_M)
    uu = np.broadcast_to(u[None, :], d.shape)
    d0 = np.where(m, d, 0.0)
    w = m.astype(np.float64)
    for it in range(12):
        r = d0 - loc[:, None] - slope[:, None] * uu
        w = np.where(m, _huber(r / scale[:, None]) if it < 2 else _tukey(r / scale[:, None]),
                     0.0)
        s0 = w.sum(axis=1)
        ok = s0 > 0
        if slopes:
            s1 = (w * uu).sum(axis=1)
            s2 = (w * uu * uu).sum(axis=1)
            t0 = (w * d0).sum(axis=1)
            t1 = (w * uu * d0).sum(axis=1)
            det = s0 * s2 - s1 * s1
            ok &= det > 1e-12 * np.maximum(s0 * s2, 1e-300)
            det_safe = np.where(ok, det, 1.0)
            loc = np.where(ok, (s2 * t0 - s1 * t1) / det_safe, loc)
            slope = np.where(ok, (s0 * t1 - s1 * t0) / det_safe, slope)
        else:
            loc = np.where(ok, (w * d0).sum(axis=1) / np.where(ok, s0, 1.0), loc)
    r = d0 - loc[:, None] - slope[:, None] * uu
    s0 = w.sum(axis=1)
    npar = 2.0 if slopes else 1.0
    var = (w * r * r).sum(axis=1) / np.maximum(s0 - npar, 1.0)
    se = np.sqrt(var / np.maximum(s0, 1.0))
    return loc, slope, se


def _running_median(c: np.ndarray, w: int, *, after: bool) -> np.ndarray:
    """Median of c[j-w+1 .. j] (before) or c[j+1 .. j+w] (after) for every boundary j."""
    n = c.size
    pad = np.concatenate([np.full(w, np.nan), c, np.full(w, np.nan)])
    win = np.lib.stride_tricks.sliding_window_view(pad, w)
    # window starting at index s of pad covers c[s-w .. s-1]
    starts = np.arange(n - 1) + (w + 1 if after else 1)
    return np.nanmedian(win[starts], axis=1)


def _detect_line_steps(c: np.ndarray, sigma_o: float, *, window: int,
                       threshold_sigma: float, min_step_m: float) -> np.ndarray:
    """Boundaries j (between chain lines j and j+1) where the level jumps and stays.

    ``c`` is the detrended cumulative level of the chain of lines. A jump counts as a step
    when the medians of the ``window`` lines after and before a boundary differ by more than
    ``threshold_sigma`` standard deviations of that difference (a single-line offset moves
    neither median) and by at least ``min_step_m``.
    """
    n = c.size
    if n < 4:
        return np.zeros(0, dtype=int)
    w = max(2, min(window, n // 2))
    jump = _running_median(c, w, after=True) - _running_median(c, w, after=False)
    # standard deviation of the difference of two medians of (up to) w independent offsets;
    # the windows are shorter near the ends of the chain
    j = np.arange(n - 1)
    n_before = np.minimum(j + 1, w)
    n_after = np.minimum(n - 1 - j, w)
    sigma_j = 1.2533 * sigma_o * np.sqrt(1.0 / n_before + 1.0 / n_after)
    thr = np.maximum(threshold_sigma * sigma_j, min_step_m)
    big = np.abs(jump) > thr
    if not big.any():
        return np.zeros(0, dtype=int)
    # non-maximum suppression over +-w boundaries
    mx = ndimage.maximum_filter1d(np.abs(jump), size=2 * w + 1, mode="nearest")
    peaks = np.flatnonzero(big & (np.abs(jump) >= mx))
    steps: list[int] = []
    for j in peaks:  # a handful of candidates: place each at the best boundary near it
        lo_lev = c[max(0, j - 2 * w + 1):max(1, j - w + 2)]
        hi_lev = c[min(n - 1, j + w):min(n, j + 2 * w + 1)]
        l1, l2 = float(np.median(lo_lev)), float(np.median(hi_lev))
        a, b = max(0, j - w), min(n - 1, j + w + 1)
        seg = c[a:b + 1]
        # boundary after line a+i: lines a..a+i at level l1, the rest at l2 (L1 changepoint)
        cost_lo = np.cumsum(np.abs(seg - l1))[:-1]
        cost_hi = np.cumsum(np.abs(seg - l2)[::-1])[::-1][1:]
        k = a + int(np.argmin(cost_lo + cost_hi))
        if not steps or k != steps[-1]:
            steps.append(k)
    return np.array(sorted(set(steps)), dtype=int)


@stage(version="1")
def level_lines(
    ds: xr.Dataset,
    *,
    slopes: bool = False,
    step_threshold_sigma: float = 5.0,
    min_step_height_m: float = 5e-11,
    window_lines: int = 10,
) -> xr.Dataset:
    """Remove per-line (fast-axis) offsets, optionally slopes, keeping steps and the plane.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``; coordinates ``x``, ``y`` in m).
    slopes : bool
        Also remove a per-line slope along the fast axis.
    step_threshold_sigma : float
        A persistent level change between consecutive lines is kept as a step parallel to the
        fast axis when it exceeds this many standard deviations of the line-offset noise
        (estimated from the frame) ...
    min_step_height_m : float
        ... and this height (m). Smaller persistent changes are treated as offsets.
    window_lines : int
        Number of lines on either side of a boundary whose median levels decide "persistent".

    Returns
    -------
    xarray.Dataset
        New frame; attrs ``line_offsets_m`` (removed offset of each line, NaN where a line had
        too few usable pixels), ``line_offset_rms_m``, ``line_slopes`` (per-line slope along
        the fast axis in m/m, when ``slopes``), ``line_steps_kept`` (indices of the first line
        above each kept step) and ``line_step_heights_m``.

    Raises
    ------
    ProcessingError
        No two lines with enough usable pixels.

    Notes
    -----
    Neighbouring lines are matched by a robust location (Huber, then Tukey biweight [1]_; MAD
    scale) of their pixel-by-pixel differences over the pixels valid in both, for all line
    pairs at once (with ``slopes``: a robust straight-line fit per pair, one shared design).
    Pixels across a step edge that crosses the lines at an angle, and adsorbates, are outliers
    of those differences and get no weight. Their faint flanks would still bias the match
    (a step edge at a few degrees to the fast axis spreads over many pixels of each line), so
    the matching is done twice: the second pass leaves out the pixels near height edges of the
    first-pass result (smoothed gradient above the median by 4 robust deviations and above a
    quarter of what a ``min_step_height_m`` step gives, grown by 2 pixels); pairs left with too
    few pixels use all of theirs. The cumulative sum of the matches is each line's level
    relative to the first; that level is modelled as a straight line in the slow-axis
    position (the plane's y tilt, kept; found robustly) plus one jump per step parallel to the
    fast axis, and the residual of that model is the line offset that is removed.

    Such a step cannot be told from a line offset by one pair of lines; it is recognised
    because it persists: the median level of the ``window_lines`` lines after a boundary
    differs from that of the lines before, which an isolated offset cannot do, by more than
    ``step_threshold_sigma`` times the offset noise allows and by at least
    ``min_step_height_m``; the boundary is then placed where a two-level fit of the nearby
    lines is best. A line right at such a step whose own offset exceeds half the step height
    cannot be assigned to the right side (an information limit). Steps parallel to the fast
    axis closer than ``window_lines`` lines merge into one. Offsets that persist for many lines
    (tip changes) are kept too; :mod:`pipeline.stages.quality` flags them. The slow profile of
    the frame beyond the plane (bow, hills wider than the frame) is treated as line offsets,
    as in any line-matching method, and so is the linear trend of the offsets themselves
    (it cannot be told from a y tilt: sigma * sqrt(12 / n_lines) / size_y in rad). The
    matching uncertainty of each line is added to the uncertainty map. Lines with too few
    usable pixels are left unchanged; a gap in the chain is bridged by a free jump (the levels
    on either side keep their data mean).

    References
    ----------
    .. [1] A. E. Beaton, J. W. Tukey, Technometrics 16, 147 (1974).
       DOI 10.1080/00401706.1974.10489171
    """
    if not (step_threshold_sigma > 0 and min_step_height_m >= 0 and window_lines >= 2):
        raise ProcessingError(
            f"frame {_name(ds)}: level_lines needs step_threshold_sigma > 0 (got "
            f"{step_threshold_sigma}), min_step_height_m >= 0 (got {min_step_height_m}) and "
            f"window_lines >= 2 (got {window_lines})")
    h, _, valid = _inputs(ds, "level_lines")
    ny, nx = h.shape
    u, _, hx, _, _, _ = _coords(ds)
    min_px = max(3, nx // 10)
    rows = np.flatnonzero(valid.sum(axis=1) >= min_px)
    if rows.size < 2:
        raise ProcessingError(
            f"frame {_name(ds)}: level_lines needs at least 2 lines with {min_px} or more usable "
            f"pixels, found {rows.size} of {ny} (the others are NaN or flagged {_bad_names()})")
    opts = {"slopes": slopes, "threshold_sigma": float(step_threshold_sigma),
            "min_step_m": float(min_step_height_m), "window": int(window_lines)}
    first = _match_lines(h, valid, valid, rows, u, **opts)
    # second pass: leave out pixels near height edges (step edges, adsorbate flanks) of the
    # first-pass result, whose line-to-line differences are not offsets
    edges = _edge_mask(h - first.correction(ny, nx, u), valid,
                       min_step_m=max(float(min_step_height_m), 1e-12))
    res = _match_lines(h, valid & ~edges, valid, rows, u, **opts)
    corr = res.correction(ny, nx, u)
    offsets = np.full(ny, np.nan)
    offsets[rows] = res.off
    var = np.zeros((ny, nx))
    var[rows[1:]] = (res.se**2)[:, None]
    attrs: dict[str, Any] = {
        "line_offsets_m": offsets,
        "line_offset_rms_m": float(np.sqrt(np.mean(res.off**2))),
        "line_steps_kept": (rows[res.steps + 1] if res.steps.size else np.zeros(0, int)).astype(
            np.int32),
        "line_step_heights_m": np.asarray(res.step_heights, dtype=np.float64),
    }
    if slopes:
        line_slopes = np.full(ny, np.nan)
        line_slopes[rows] = res.slope / hx
        attrs["line_slopes"] = line_slopes
    out = _copy_with(ds, height=h - corr, uncertainty=_add_variance(ds, var), attrs=attrs)
    if res.breaks.size:
        add_warning(out, f"level_lines: {res.breaks.size} pair(s) of neighbouring lines share "
                    "too few usable pixels to be matched; their relative level is kept as "
                    "recorded")
    _warn_if_constant(out, h, valid, "level_lines")
    return out


def _edge_mask(h: np.ndarray, valid: np.ndarray, *, min_step_m: float,
               threshold_sigma: float = 4.0, sigma_px: float = 1.0,
               grow_px: int = 2) -> np.ndarray:
    """Pixels near height edges: smoothed gradient above median + k robust deviations.

    The threshold is at least a quarter of the peak gradient of a step of ``min_step_m`` (so
    that small line-to-line errors of a first pass do not count as edges).
    """
    num = ndimage.gaussian_filter(np.where(valid, h, 0.0), sigma_px, mode="nearest")
    den = ndimage.gaussian_filter(valid.astype(np.float64), sigma_px, mode="nearest")
    support = den >= 0.5
    sm = np.where(support, num / np.where(support, den, 1.0), 0.0)
    g = np.hypot(ndimage.sobel(sm, axis=1, mode="nearest"),
                 ndimage.sobel(sm, axis=0, mode="nearest")) / 8.0
    gv = g[valid & support]
    if gv.size == 0:
        return np.zeros_like(valid)
    med = float(np.median(gv))
    spread = MAD_TO_SIGMA * float(np.median(np.abs(gv - med)))
    floor = 0.25 * min_step_m / (math.sqrt(2 * math.pi) * sigma_px)
    mask = (g > max(med + threshold_sigma * spread, floor)) & support
    return ndimage.binary_dilation(mask, iterations=grow_px) if mask.any() else mask


class _LineMatch:
    def __init__(self, rows: np.ndarray, off: np.ndarray, slope: np.ndarray, se: np.ndarray,
                 steps: np.ndarray, step_heights: np.ndarray, breaks: np.ndarray) -> None:
        self.rows, self.off, self.slope, self.se = rows, off, slope, se
        self.steps, self.step_heights, self.breaks = steps, step_heights, breaks

    def correction(self, ny: int, nx: int, u: np.ndarray) -> np.ndarray:
        corr = np.zeros((ny, nx))
        corr[self.rows] = self.off[:, None] + self.slope[:, None] * u[None, :]
        return corr


def _match_lines(h: np.ndarray, use: np.ndarray, valid: np.ndarray, rows: np.ndarray,
                 u: np.ndarray, *, slopes: bool, threshold_sigma: float, min_step_m: float,
                 window: int) -> _LineMatch:
    """Per-line offsets (and slopes) of the chain of lines ``rows``; see :func:`level_lines`.

    ``use`` are the pixels to match on; pairs left with too few of them fall back to
    ``valid``.
    """
    nx = h.shape[1]
    a, b = rows[:-1], rows[1:]
    need = max(3, nx // 20)
    common = use[a] & use[b]
    short = common.sum(axis=1) < need
    if short.any():
        common[short] = valid[a[short]] & valid[b[short]]
    ok_pair = common.sum(axis=1) >= need
    dd = np.zeros(a.size)
    gg = np.zeros(a.size)
    se = np.zeros(a.size)
    if ok_pair.any():
        dpair = h[b[ok_pair]] - h[a[ok_pair]]
        loc, slp, err = _robust_line_differences(dpair, common[ok_pair], u, slopes=slopes)
        dd[ok_pair], gg[ok_pair], se[ok_pair] = loc, slp, err
    breaks = np.flatnonzero(~ok_pair)
    # detrend: the typical difference per row is the plane's y tilt; bridge gaps with it
    gap = (b - a).astype(np.float64)
    rate = float(np.median(dd[ok_pair] / gap[ok_pair])) if ok_pair.any() else 0.0
    dd = np.where(ok_pair, dd, rate * gap)
    dd_detr = dd - rate * gap
    c = np.concatenate([[0.0], np.cumsum(dd)])
    good = dd_detr[ok_pair]
    sigma_o = (_mad_scale(good) if good.size else 0.0) / math.sqrt(2.0)
    # cumulative level = a + b*k + one jump per step / gap + offsets. The straight line is
    # found robustly first (the median line-to-line difference is too noisy a slope when the
    # offsets are large: its error would accumulate over the window), then refitted with the
    # jumps found, and the search repeated once about that line.
    k = (rows - rows.mean()) / max(float(np.ptp(rows)), 1.0)
    base = np.stack([np.ones_like(k), k], axis=1)
    trend = base @ _fit(base, c, robust=True).beta
    steps = np.zeros(0, dtype=int)
    for _ in range(2):
        steps = _detect_line_steps(c - trend, sigma_o, window=window,
                                   threshold_sigma=threshold_sigma, min_step_m=min_step_m)
        jumps = np.union1d(steps, breaks).astype(int)
        cols = [base] + [(np.arange(rows.size) > j).astype(float)[:, None] for j in jumps]
        x = np.concatenate(cols, axis=1)
        coef, *_ = np.linalg.lstsq(x, c, rcond=None)
        trend = base @ coef[:2]
    off = c - x @ coef
    step_heights = coef[2:][np.isin(jumps, steps)]
    slope = np.zeros(rows.size)
    if slopes:
        cs = np.concatenate([[0.0], np.cumsum(gg)])
        xs = x[:, :2]
        cs_coef, *_ = np.linalg.lstsq(xs, cs, rcond=None)
        slope = cs - xs @ cs_coef
    return _LineMatch(rows, off, slope, se, steps, step_heights, breaks)


# --------------------------------------------------------------------------------------------
# 3. terraces
# --------------------------------------------------------------------------------------------


def _segment(r: np.ndarray, valid: np.ndarray, *, sigma_px: float, threshold_sigma: float,
             min_step_m: float, min_px: int) -> tuple[np.ndarray, float]:
    """Terrace labels (0..T-1, -1 unassigned) from height-gradient edges + components.

    Returns the labels and the gradient threshold used (m per pixel).
    """
    vm = valid.astype(np.float64)
    if sigma_px > 0:
        num = ndimage.gaussian_filter(np.where(valid, r, 0.0), sigma_px, mode="nearest")
        den = ndimage.gaussian_filter(vm, sigma_px, mode="nearest")
    else:
        num, den = np.where(valid, r, 0.0), vm
    support = den >= 0.5
    sm = np.where(support, num / np.where(support, den, 1.0), 0.0)
    gx = ndimage.sobel(sm, axis=1, mode="nearest") / 8.0
    gy = ndimage.sobel(sm, axis=0, mode="nearest") / 8.0
    g = np.hypot(gx, gy)
    inside = valid & support
    gv = g[inside]
    med = float(np.median(gv)) if gv.size else 0.0
    spread = MAD_TO_SIGMA * float(np.median(np.abs(gv - med))) if gv.size else 0.0
    # a sharp step of min_step_m, smoothed by the Gaussian, peaks at min_step/(sqrt(2 pi) sigma)
    floor = 0.5 * min_step_m / (math.sqrt(2 * math.pi) * max(sigma_px, 0.5))
    thr = max(med + threshold_sigma * spread, floor)
    edges = (g > thr) | ~inside
    edges = ndimage.binary_dilation(edges, iterations=1)
    lab, n = ndimage.label(~edges)
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    keep = sizes >= min_px
    keep[0] = False
    new_id = np.full(n + 1, -1, dtype=np.int64)
    new_id[keep] = np.arange(int(keep.sum()))
    return new_id[lab], thr


def _adjacent_pairs(labels: np.ndarray, n_labels: int, reach: int) -> dict[tuple[int, int], int]:
    """Pairs of labels that face each other across at most ``reach`` pixels, with counts."""
    counts: dict[tuple[int, int], int] = {}
    if n_labels < 2:
        return counts
    ny, nx = labels.shape
    for s in range(1, reach + 1):
        for dy, dx in ((0, s), (s, 0), (s, s), (s, -s)):
            x0, x1 = max(0, -dx), nx - max(0, dx)
            if dy >= ny or x1 <= x0:
                continue
            a = labels[0:ny - dy, x0:x1]
            b = labels[dy:ny, x0 + dx:x1 + dx]
            m = (a >= 0) & (b >= 0) & (a != b)
            if not m.any():
                continue
            lo = np.minimum(a[m], b[m])
            hi = np.maximum(a[m], b[m])
            codes, cnt = np.unique(lo * n_labels + hi, return_counts=True)
            for code, k in zip(codes.tolist(), cnt.tolist(), strict=True):
                key = (code // n_labels, code % n_labels)
                counts[key] = counts.get(key, 0) + k
    return {k: c for k, c in counts.items() if c >= 3}


def _merge(labels: np.ndarray, n_labels: int, pairs: list[tuple[int, int]]
           ) -> tuple[np.ndarray, int]:
    parent = list(range(n_labels))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for s, t in pairs:
        rs, rt = root(s), root(t)
        if rs != rt:
            parent[max(rs, rt)] = min(rs, rt)
    roots = np.array([root(i) for i in range(n_labels)])
    uniq, new = np.unique(roots, return_inverse=True)
    lut = np.append(new, -1)  # index -1 -> -1
    return lut[labels], int(uniq.size)


def _unit_step(diffs: np.ndarray, min_step_m: float) -> tuple[float, bool]:
    """Largest height h such that every difference is a whole multiple of it (within 0.2 h)."""
    cand = np.abs(diffs[np.abs(diffs) >= min_step_m])
    if cand.size == 0:
        return float("nan"), False
    trials = np.unique(np.concatenate([cand / m for m in (1, 2, 3, 4)]))
    trials = trials[trials >= min_step_m]
    for h0 in trials[::-1]:
        ratio = cand / h0
        if np.all(np.abs(ratio - np.round(ratio)) < 0.2):
            return float(h0), True
    return float(cand.min()), False


def _residual_correlation_factor(res: np.ndarray, mask: np.ndarray) -> float:
    """Variance inflation for spatially correlated residuals (lag-1 AR(1) approximation)."""
    factor = 1.0
    r = np.where(mask, res, 0.0)
    den = float(np.sum(r * r))
    if den <= 0:
        return 1.0
    for axis in (0, 1):
        a = np.moveaxis(r, axis, 0)
        mm = np.moveaxis(mask, axis, 0)
        both = mm[1:] & mm[:-1]
        num = float(np.sum((a[1:] * a[:-1])[both]))
        nrm = float(np.sum((a[1:] ** 2)[both]))
        rho = min(max(num / nrm, 0.0), 0.95) if nrm > 0 else 0.0
        factor *= (1 + rho) / (1 - rho)
    return factor


def _gls_step(d: np.ndarray, cov: np.ndarray, levels: np.ndarray) -> tuple[float, float, float]:
    """Unit step h0 from terrace offsets d = d0 + n h0 (generalised least squares).

    Returns (h0, standard uncertainty, reduced chi^2 or nan). The uncertainty is the fit's,
    inflated by the Birge ratio when the offsets scatter about whole multiples more than
    their covariance allows.
    """
    x = np.stack([np.ones_like(d), levels.astype(np.float64)], axis=1)
    wmat = np.linalg.pinv(cov, hermitian=True)
    a = x.T @ wmat @ x
    ainv = np.linalg.pinv(a, hermitian=True)
    beta = ainv @ (x.T @ wmat @ d)
    res = d - x @ beta
    dof = d.size - 2
    chi2 = float(res @ wmat @ res) / dof if dof > 0 else float("nan")
    var = float(ainv[1, 1])
    if dof > 0 and chi2 > 1:
        var *= chi2
    return float(beta[1]), math.sqrt(max(var, 0.0)), chi2


@stage(version="1")
def level_terraces(
    ds: xr.Dataset,
    *,
    min_terrace_px: int = 256,
    min_step_height_m: float = 5e-11,
    edge_threshold_sigma: float = 6.0,
    edge_smoothing_px: float = 1.0,
    order: int = 1,
    robust: bool = True,
) -> xr.Dataset:
    """Segment terraces, fit one common plane plus one offset per terrace, report step heights.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``; coordinates ``x``, ``y`` in m), ideally
        after :func:`level_lines`.
    min_terrace_px : int
        Connected regions smaller than this (pixels) are not terraces (adsorbates, islands too
        small to fit, fragments); they get label -1.
    min_step_height_m : float
        Neighbouring regions whose fitted levels differ by less than this are one terrace
        (merged), and smaller edges are not looked for.
    edge_threshold_sigma : float
        Pixels whose smoothed height gradient exceeds the median gradient by more than this many
        robust standard deviations are edges between regions.
    edge_smoothing_px : float
        Gaussian smoothing (pixels) before the gradient; suppresses noise and atomic
        corrugation.
    order : int
        Total degree of the common background (1 = plane; up to 8 for a bowed piezo).
    robust : bool
        Iteratively reweighted joint fit (adsorbates, remaining outliers get no weight; such
        pixels are flagged ``EXCLUDED``).

    Returns
    -------
    xarray.Dataset
        New frame with the common background removed and the terraces kept (the lowest
        terrace at height 0), a variable ``terrace`` (int16 label map, -1 unassigned; labels in
        order of increasing height) and attributes ``n_terraces``, ``terrace_offsets_m``,
        ``terrace_levels`` (whole unit steps above the lowest terrace), ``terrace_pixel_counts``,
        ``tilt_x_rad``, ``tilt_y_rad`` (removed tilt at the frame centre), ``residual_tilt_rad``
        (standard uncertainty of the removed tilt: the tilt that may remain),
        ``terrace_fit_terms``, ``terrace_fit_coefficients_m``, and for comparison the result of
        a plain least-squares plane over all usable pixels (``plane_only_tilt_x_rad``,
        ``plane_only_tilt_y_rad``, and with two or more terrace levels
        ``plane_only_step_height_m``). With two or more terrace levels also ``step_height_m``
        and ``step_height_uncertainty_m`` (the monatomic unit step) and
        ``step_height_chi2_reduced``.

    Raises
    ------
    ProcessingError
        Bad parameters, or too few usable pixels for the model.

    Notes
    -----
    Segmentation: a robust polynomial of the same order is removed, the result is smoothed by a
    normalised (mask-aware) Gaussian, and pixels whose Sobel gradient is an outlier of the
    frame's gradient distribution (median + ``edge_threshold_sigma`` MADs, but at least what a
    step of ``min_step_height_m`` would give) become edges; the edges are dilated by one pixel
    and the 4-connected remaining regions of at least ``min_terrace_px`` pixels are terraces.
    The joint model is ``h = sum_k c_k P_i(u) P_j(v) + d_t`` (no constant term; one offset per
    terrace), solved by iteratively reweighted least squares (Huber, then Tukey biweight [1]_)
    over the terrace pixels; neighbouring regions whose offsets differ by less than
    ``min_step_height_m`` are merged and the fit repeated. Because the plane is common and the
    offsets free, the staircase does not leak into the tilt (a plain plane fit tilts towards
    the staircase and biases every step), and the step heights come out unbiased.

    Step heights: the offset differences of adjacent terraces are grouped into whole
    multiples of one unit (the largest height of which all of them are multiples within 20 %);
    each terrace gets its whole number of units above the lowest, and the unit is fitted by
    generalised least squares to all offsets with their covariance. That covariance comes from
    the joint fit (residual variance times the inverse normal matrix), inflated for spatially
    correlated residuals by the lag-1 autocorrelation factor (1+rho)/(1-rho) per axis [2]_; with
    three or more terraces it is inflated further by the Birge ratio [3]_ when the offsets
    scatter about whole multiples more than their covariance allows. The uncertainty map grows
    by the variance of the subtracted background.

    A frame with one terrace is levelled by the (robust) background alone and gets no
    step-height attributes. Steps that end inside the frame (the two terraces connect around
    the end) are not separated.

    References
    ----------
    .. [1] A. E. Beaton, J. W. Tukey, Technometrics 16, 147 (1974).
       DOI 10.1080/00401706.1974.10489171
    .. [2] G. V. Bayley, J. M. Hammersley, "The 'effective' number of independent observations
       in an autocorrelated time series", Suppl. J. R. Stat. Soc. 8, 184 (1946).
       DOI 10.2307/2983560
    .. [3] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932). DOI 10.1103/PhysRev.40.207
    """
    if (isinstance(order, bool) or not isinstance(order, int | np.integer)
            or not 1 <= order <= 8):
        raise ProcessingError(f"frame {_name(ds)}: terrace background order {order!r} must be "
                              "an integer from 1 to 8")
    if not (int(min_terrace_px) >= 4 and min_step_height_m > 0 and edge_threshold_sigma > 0
            and edge_smoothing_px >= 0):
        raise ProcessingError(
            f"frame {_name(ds)}: level_terraces needs min_terrace_px >= 4 (got "
            f"{min_terrace_px}), min_step_height_m > 0 (got {min_step_height_m}), "
            f"edge_threshold_sigma > 0 (got {edge_threshold_sigma}) and edge_smoothing_px >= 0 "
            f"(got {edge_smoothing_px})")
    order = int(order)
    h, flags, valid = _inputs(ds, "level_terraces")
    u, v, hx, hy, _, _ = _coords(ds)
    basis_c = _Basis(u, v, order, constant=True)
    _require(ds, valid, basis_c.n + 1, "terrace levelling")
    basis = _Basis(u, v, order, constant=False)
    iy, ix = np.nonzero(valid)
    phi_c = basis_c.at(iy, ix)
    z = h[iy, ix]
    pre = _fit(phi_c, z, robust=True)
    r = h - basis_c.surface(pre.beta)
    labels, _thr = _segment(r, valid, sigma_px=float(edge_smoothing_px),
                            threshold_sigma=float(edge_threshold_sigma),
                            min_step_m=float(min_step_height_m), min_px=int(min_terrace_px))
    n_lab = int(labels.max()) + 1
    warn: list[str] = []
    if n_lab == 0:
        warn.append(f"level_terraces: no region of at least {int(min_terrace_px)} pixels "
                    "between height edges; the whole frame is treated as one terrace")
        labels = np.where(valid, 0, -1)
        n_lab = 1
    labels = np.where(valid, labels, -1)
    reach = math.ceil(3 * edge_smoothing_px) + 3
    for _ in range(8):
        sel = labels >= 0
        jy, jx = np.nonzero(sel)
        if jy.size < basis.n + n_lab + 1:
            raise ProcessingError(
                f"frame {_name(ds)}: terrace levelling needs at least {basis.n + n_lab + 1} "
                f"pixels on terraces, found {jy.size}")
        fit = _fit(basis.at(jy, jx), h[jy, jx], labels[jy, jx], n_lab, robust=robust)
        d = fit.beta[basis.n:]
        pairs = _adjacent_pairs(labels, n_lab, reach)
        merge = [p for p in pairs if abs(d[p[0]] - d[p[1]]) < min_step_height_m]
        if not merge:
            break
        labels, n_lab = _merge(labels, n_lab, merge)
    # order terraces by height (label 0 = lowest)
    rank = np.argsort(d, kind="stable")
    inv = np.empty_like(rank)
    inv[rank] = np.arange(n_lab)
    labels = np.where(labels >= 0, inv[np.maximum(labels, 0)], -1)
    perm = np.concatenate([np.arange(basis.n), basis.n + rank])
    beta = fit.beta[perm]
    cov_all = fit.cov[np.ix_(perm, perm)]
    d = beta[basis.n:]
    pairs = _adjacent_pairs(labels, n_lab, reach)
    jy, jx = np.nonzero(labels >= 0)
    weights = np.zeros(h.shape)
    weights[jy, jx] = fit.weights  # fit order of pixels is unchanged by relabelling
    resid = np.zeros(h.shape)
    resid[jy, jx] = fit.resid
    inflate = _residual_correlation_factor(resid, weights > 0)
    cov_all = cov_all * inflate
    plane = basis.surface(beta[:basis.n])
    out_h = h - plane - d[0]
    # uncertainty of the subtracted plane + reference offset
    ny, nx = h.shape
    py, px = np.divmod(np.arange(ny * nx), nx)
    phi_full = np.concatenate([basis.at(py, px), np.ones((ny * nx, 1))], axis=1)
    sub = np.r_[np.arange(basis.n), basis.n]
    csub = cov_all[np.ix_(sub, sub)]
    var_sub = np.einsum("ij,jk,ik->i", phi_full, csub, phi_full).reshape(ny, nx).clip(min=0)
    # tilt and its uncertainty
    gx, gy = basis.slope_at_centre(beta[:basis.n], hx, hy)
    jac = np.zeros((2, basis.n))
    for t in range(basis.n):
        e = np.zeros(basis.n)
        e[t] = 1.0
        jac[:, t] = basis.slope_at_centre(e, hx, hy)
    ctilt = jac @ cov_all[:basis.n, :basis.n] @ jac.T
    residual_tilt = math.sqrt(max(float(np.trace(ctilt)), 0.0))
    # plain least-squares plane (order 1, all usable pixels) for comparison
    basis_p = _Basis(u, v, 1, constant=True)
    plain = _fit(basis_p.at(iy, ix), z, robust=False)
    pgx, pgy = basis_p.slope_at_centre(plain.beta, hx, hy)
    new_flags = flags.copy()
    if robust:
        new_flags[(labels >= 0) & (weights == 0)] |= np.uint8(Flag.EXCLUDED)
    attrs: dict[str, Any] = {
        "n_terraces": int(n_lab),
        "terrace_offsets_m": (d - d[0]).astype(np.float64),
        "terrace_pixel_counts": np.bincount(labels[labels >= 0], minlength=n_lab).astype(
            np.int64),
        "terrace_fit_order": order,
        "terrace_fit_terms": _term_names(basis.terms) + "; u, v = x, y scaled to [-1, 1]",
        "terrace_fit_coefficients_m": beta[:basis.n].astype(np.float64),
        "tilt_x_rad": math.atan(gx),
        "tilt_y_rad": math.atan(gy),
        "residual_tilt_rad": residual_tilt,
        "plane_only_tilt_x_rad": math.atan(pgx),
        "plane_only_tilt_y_rad": math.atan(pgy),
    }
    levels = np.zeros(n_lab, dtype=np.int64)
    if n_lab >= 2:
        diffs = np.array([d[t] - d[s] for s, t in pairs]) if pairs else np.diff(d)
        h0, consistent = _unit_step(diffs, float(min_step_height_m))
        if not consistent:
            warn.append("level_terraces: terrace height differences are not whole multiples "
                        "of one step; the smallest difference is used as the unit step")
        if math.isfinite(h0):
            levels = np.round((d - d[0]) / h0).astype(np.int64)
        if np.unique(levels).size >= 2:
            cov_d = cov_all[basis.n:, basis.n:]
            step, step_u, chi2 = _gls_step(d, cov_d, levels)
            # the same unit fitted to the plain plane's terrace means
            rp = h - basis_p.surface(plain.beta)
            sel = labels >= 0
            cnt = np.bincount(labels[sel], minlength=n_lab)
            means = np.bincount(labels[sel], weights=rp[sel], minlength=n_lab) / np.maximum(
                cnt, 1)
            xl = np.stack([np.ones(n_lab), levels.astype(float)], axis=1)
            pstep = float(np.linalg.lstsq(xl, means, rcond=None)[0][1])
            attrs.update({
                "step_height_m": step,
                "step_height_uncertainty_m": step_u,
                "step_height_chi2_reduced": chi2,
                "plane_only_step_height_m": pstep,
            })
    attrs["terrace_levels"] = levels
    terrace_attrs = {
        "long_name": "terrace label",
        "description": "index into terrace_offsets_m and terrace_levels (0 = lowest terrace); "
        "-1 = not assigned (step edge, adsorbate, region smaller than min_terrace_px, "
        "unusable pixel)",
        "unassigned_value": np.int16(-1),
    }
    out = _copy_with(ds, height=out_h, flags=new_flags,
                     uncertainty=_add_variance(ds, var_sub),
                     extra={"terrace": (labels.astype(np.int16), terrace_attrs)}, attrs=attrs)
    for key in ("step_height_m", "step_height_uncertainty_m", "step_height_chi2_reduced",
                "plane_only_step_height_m"):
        if key not in attrs:
            out.attrs.pop(key, None)
    for w in warn:
        add_warning(out, w)
    _warn_if_constant(out, h, valid, "level_terraces")
    return out


# --------------------------------------------------------------------------------------------
# 4. scars
# --------------------------------------------------------------------------------------------


def _row_median(a: np.ndarray) -> np.ndarray:
    """Median of each row over its finite entries (0 for rows without any)."""
    out = np.zeros(a.shape[0])
    ok = np.isfinite(a).any(axis=1)
    if ok.any():
        out[ok] = np.nanmedian(a[ok], axis=1)
    return out


@stage(version="1")
def repair_scars(
    ds: xr.Dataset,
    *,
    threshold_sigma: float = 6.0,
    max_length_px: int = 32,
    min_length_px: int = 1,
) -> xr.Dataset:
    """Detect short streaks within one line, flag them ``SCAR`` and interpolate across them.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height`` in m, ``flags``).
    threshold_sigma : float
        A pixel is a scar candidate when it deviates from the mean of the lines above and below
        by more than this many robust standard deviations of that deviation over the frame
        (a run is extended along the line while the deviation exceeds half of this).
    max_length_px, min_length_px : int
        Allowed length of a streak along the fast axis (pixels); longer runs are line offsets
        (:func:`level_lines`), not scars.

    Returns
    -------
    xarray.Dataset
        New frame; repaired pixels flagged ``SCAR`` with interpolated heights and an
        uncertainty that includes the interpolation error. Attrs ``scar_count`` (streaks),
        ``scar_pixel_count`` and ``scar_threshold_m``.

    Notes
    -----
    For every interior line k the differences to lines k-1 and k+1 are taken pixel by pixel
    and the median of each line pair is removed (so line offsets and tilt do not matter).
    A candidate deviates from both neighbours with the same sign, its neighbours agree with
    each other, and the neighbours agree with their own outer neighbours (k-2, k+2): the
    feature is one line thin, which an adsorbate or a step edge is not. Candidates are grown
    along the line by hysteresis and kept when the run length is within limits. The repaired
    value is the mean of the two neighbouring lines, each shifted by the median difference of
    its pair, i.e. the line's own level is kept. The first and last lines, and pixels without
    both neighbours usable, are not examined. The threshold scale is the MAD of the
    deviation [1]_.

    References
    ----------
    .. [1] P. J. Rousseeuw, C. Croux, "Alternatives to the median absolute deviation",
       J. Am. Stat. Assoc. 88, 1273 (1993). DOI 10.1080/01621459.1993.10476408
    """
    if not (threshold_sigma > 0 and 1 <= int(min_length_px) <= int(max_length_px)):
        raise ProcessingError(
            f"frame {_name(ds)}: repair_scars needs threshold_sigma > 0 (got {threshold_sigma}) "
            f"and 1 <= min_length_px <= max_length_px (got {min_length_px}, {max_length_px})")
    h, flags, valid = _inputs(ds, "repair_scars")
    _require(ds, valid, 1, "scar repair")
    ny, nx = h.shape
    attrs: dict[str, Any] = {"scar_count": 0, "scar_pixel_count": 0, "scar_threshold_m": 0.0}
    if ny < 3:
        out = _copy_with(ds, height=h, attrs=attrs)
        add_warning(out, f"repair_scars: frame has {ny} line(s); scars need a line above and "
                    "below")
        return out
    hv = np.where(valid, h, np.nan)
    d1 = hv[1:] - hv[:-1]  # d1[i] = h[i+1] - h[i]
    d1 = d1 - _row_median(d1)[:, None]
    up = d1[:-1]  # line k minus line k-1, k = 1 .. ny-2
    dn = -d1[1:]  # line k minus line k+1
    dev = 0.5 * (up + dn)
    fin = np.isfinite(dev)
    scale = _mad_scale(dev[fin])
    thr = threshold_sigma * scale
    attrs["scar_threshold_m"] = float(thr)
    if scale <= _TINY_M:
        out = _copy_with(ds, height=h, attrs=attrs)
        _warn_if_constant(out, h, valid, "repair_scars")
        return out
    nanpad = np.full((1, nx), np.nan)
    outer_up = np.vstack([nanpad, d1[:-2]])  # h[k-1] - h[k-2]
    outer_dn = np.vstack([-d1[2:], nanpad])  # h[k+1] - h[k+2]
    outer = np.fmax(np.abs(np.nan_to_num(outer_up)), np.abs(np.nan_to_num(outer_dn)))
    with np.errstate(invalid="ignore"):
        adev = np.where(fin, np.abs(dev), 0.0)
        same = np.where(fin, up * dn, 0.0) > 0
        agree = np.fmin(np.abs(np.nan_to_num(up)), np.abs(np.nan_to_num(dn))) > 0.5 * adev
        thin = outer < 0.5 * adev
    base = fin & same & agree & thin
    high = base & (adev > thr)
    low = base & (adev > 0.5 * thr)
    # runs along the line; gaps of a few pixels (where the streak crosses a step edge or an
    # adsorbate and the neighbour tests fail) are bridged so that the length test sees the
    # whole streak
    row = np.array([[0, 0, 0], [1, 1, 1], [0, 0, 0]])
    bridged = low | (ndimage.binary_closing(low, structure=np.ones((1, 2 * _SCAR_GAP_PX + 1)))
                     & np.where(fin, (np.abs(dev) > 0.25 * thr), False))
    lab, n = ndimage.label(bridged, structure=row)
    scar_inner = np.zeros_like(low)
    n_runs = 0
    if n:
        length = np.bincount(lab.ravel(), minlength=n + 1)
        has_high = np.bincount(lab[high], minlength=n + 1) > 0
        keep = has_high & (length >= int(min_length_px)) & (length <= int(max_length_px))
        keep[0] = False
        scar_inner = keep[lab] & low
        n_runs = int(keep.sum())
    scar = np.zeros((ny, nx), dtype=bool)
    scar[1:-1] = scar_inner
    new_h = h.copy()
    new_h[1:-1] = np.where(scar_inner, h[1:-1] - np.nan_to_num(dev), h[1:-1])
    new_flags = flags.copy()
    new_flags[scar] |= np.uint8(Flag.SCAR)
    unc = None
    if "height_uncertainty" in ds:
        u0 = np.asarray(ds["height_uncertainty"].values, dtype=np.float64)
        uin = np.sqrt(0.25 * (u0[:-2] ** 2 + u0[2:] ** 2) + scale**2)
        unc = u0.copy()
        unc[1:-1] = np.where(scar_inner, uin, u0[1:-1])
    attrs.update({"scar_count": n_runs, "scar_pixel_count": int(scar.sum())})
    out = _copy_with(ds, height=new_h, flags=new_flags, uncertainty=unc, attrs=attrs)
    return out
