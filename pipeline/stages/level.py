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
from pipeline.stages.stats import median_inplace as _median_inplace

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
        # the factors of every term on the grid's columns / rows (one gather per design matrix)
        self.pu_t = self.pu[:, self.ii]  # (nx, n_terms)
        self.pv_t = self.pv[:, self.jj]  # (ny, n_terms)

    @property
    def n(self) -> int:
        return len(self.terms)

    def at(self, iy: np.ndarray, ix: np.ndarray) -> np.ndarray:
        """Design matrix (n_pixels, n_terms) at pixel indices."""
        return self.pu_t[ix] * self.pv_t[iy]

    def at_t(self, iy: np.ndarray, ix: np.ndarray) -> np.ndarray:
        """:meth:`at` transposed, (n_terms, n_pixels); for the whole grid in raster order the
        outer products of the factors (the same numbers, no gathers)."""
        ny, nx = self.pv.shape[0], self.pu.shape[0]
        if iy.size == ny * nx:  # every pixel, in raster order (np.nonzero of a full mask)
            return (self.pv_t.T[:, :, None] * self.pu_t.T[:, None, :]).reshape(self.n, -1)
        return self.pu_t.T[:, ix] * self.pv_t.T[:, iy]

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
        return _grid_variance(self.pu_t, self.pv_t, cov)

    def slope_at_centre(self, beta: np.ndarray, hx: float, hy: float) -> tuple[float, float]:
        """dh/dx and dh/dy (m/m) of the surface at the frame centre."""
        d0 = legendre.legval(0.0, np.eye(self.order + 1))  # P_k(0)
        d1 = np.array([legendre.legval(0.0, legendre.legder(np.eye(self.order + 1)[k]))
                       for k in range(self.order + 1)])  # P_k'(0)
        gx = float(np.sum(beta * d1[self.ii] * d0[self.jj])) / hx
        gy = float(np.sum(beta * d0[self.ii] * d1[self.jj])) / hy
        return gx, gy


def _grid_variance(pu_t: np.ndarray, pv_t: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """``phi^T C phi`` at every pixel for separable terms ``phi_k(y, x) = pv_t[y, k] pu_t[x, k]``.

    ``sum_kl C_kl (pv_k pv_l)(y) (pu_k pu_l)(x)``: one (ny, K) x (K, nx) product over the
    K = n(n+1)/2 term pairs instead of a quadratic form per pixel.
    """
    k, m = np.triu_indices(pu_t.shape[1])
    c = np.where(k == m, cov[k, m], cov[k, m] + cov[m, k])
    var = (pv_t[:, k] * pv_t[:, m] * c[None, :]) @ (pu_t[:, k] * pu_t[:, m]).T
    return var.clip(min=0.0)


def _median_mad(x: np.ndarray) -> tuple[float, float]:
    """``median(x)`` and ``median(|x - median(x)|)`` (unscaled), exactly as ``numpy.median``."""
    a = np.array(x, dtype=np.float64).ravel()
    med = _median_inplace(a)
    if math.isnan(med):
        return med, math.nan
    np.subtract(a, med, out=a)
    np.abs(a, out=a)
    return med, _median_inplace(a)


def _row_nanmedian(a: np.ndarray) -> np.ndarray:
    """``numpy.nanmedian(a, axis=1)`` of a 2-D array (rows without finite entries: NaN).

    One sort of all rows (NaN sort last) and the middle of each row's finite values: the same
    numbers, without numpy's per-row masked-array path.
    """
    srt = np.sort(a, axis=1)
    n = np.sum(~np.isnan(a), axis=1)
    lo = np.clip((n - 1) // 2, 0, None)[:, None]
    hi = np.clip(n // 2, 0, None)[:, None]
    med = 0.5 * (np.take_along_axis(srt, lo, 1) + np.take_along_axis(srt, hi, 1))[:, 0]
    return np.where(n > 0, med, np.nan)


def _mad_scale(r: np.ndarray) -> float:
    if r.size == 0:
        return 0.0
    return MAD_TO_SIGMA * _median_mad(r)[1]


def _tukey_weights(t: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Tukey's biweight ``(1 - (t/c)²)²`` for ``|t| < c``, else 0, written into ``out``.

    Computed as ``max(1 - (t/c)², 0)²`` in place (``(t/c)² < 1`` exactly when ``|t/c| < 1``);
    ``t = ±inf`` gives 0.
    """
    np.divide(t, TUKEY_C, out=out)
    np.multiply(out, out, out=out)
    np.subtract(1.0, out, out=out)
    np.maximum(out, 0.0, out=out)
    return np.multiply(out, out, out=out)


def _huber_weights(t: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Huber's weight ``min(1, k/|t|)`` written into ``out`` (as ``k / max(|t|, k)``: exactly 1
    for ``|t| <= k``; ``t = ±inf`` gives 0)."""
    np.abs(t, out=out)
    np.maximum(out, HUBER_K, out=out)
    return np.divide(HUBER_K, out, out=out)


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
         *, robust: bool, need_scale: bool = True, grid: _Basis | None = None) -> _FitResult:
    """(Robust) least squares of ``z`` on ``[phi.T | one-hot(labels)]``.

    ``phi`` is the design transposed, (n_terms, n_pixels), so that every per-pixel product
    runs along memory. ``grid``: the basis whose terms ``phi`` holds, when the pixels are the
    whole grid in raster order (no labels); the reweighting sums then use the terms'
    separable form (one pass over the weight map per solve).

    The one-hot block is never built: its normal-equation blocks are sums over the pixels of
    each label (the pixels are put in label order once, so that these are contiguous
    ``add.reduceat`` sums). With ``robust`` the fit is iteratively reweighted (a few Huber
    steps, then Tukey's biweight; scale = MAD of the residuals, re-estimated at each step).
    ``need_scale=False`` skips the MAD of an ordinary fit (``scale`` is then NaN).
    """
    p, n = phi.shape
    t = n_labels if labels is not None else 0
    phi = np.ascontiguousarray(phi)
    order: np.ndarray | None = None
    lab = labels
    starts: np.ndarray | None = None
    if t:
        assert labels is not None
        counts = np.bincount(labels, minlength=t)
        if counts.size == t and bool((counts > 0).all()):
            key = labels.astype(np.int16) if t < 2**15 else labels
            order = np.argsort(key, kind="stable")
            phi, z, lab = phi[:, order], z[order], labels[order]
            starts = np.concatenate([[0], np.cumsum(counts)[:-1]])

    def label_sums(a: np.ndarray) -> np.ndarray:
        """Sum over the pixels of each label along the last axis: (..., t)."""
        assert lab is not None
        if starts is not None:
            return np.add.reduceat(a, starts, axis=-1)
        if a.ndim == 1:
            return np.bincount(lab, weights=a, minlength=t)
        return np.stack([np.bincount(lab, weights=row, minlength=t) for row in a])

    pw = np.empty_like(phi)
    # Repeated solves (reweighting): every normal-equation entry is a weighted sum of one
    # fixed per-pixel product, so those products are formed once and each solve is one
    # matrix-vector product per label segment (several times less memory traffic).
    sums: _WeightedSums | _GridSums | None = None
    if robust and grid is not None and not t and grid.n == p:
        sums = _GridSums(grid, z)
    elif robust and p <= 8 and (not t or starts is not None):
        sums = _WeightedSums(phi, z, None if not t else starts)

    def solve(w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if sums is not None:
            m, rhs = sums.normal_equations(w)
            minv = np.linalg.pinv(m, hermitian=True)
            return minv @ rhs, minv
        np.multiply(phi, w[None, :], out=pw)
        m = np.zeros((p + t, p + t))
        rhs = np.zeros(p + t)
        if p <= 8:  # p dot products beat a (p, n) x (n, p) matrix product of this shape
            for i in range(p):
                for j in range(i + 1):
                    m[i, j] = m[j, i] = pw[i] @ phi[j]
        else:
            m[:p, :p] = pw @ phi.T
        rhs[:p] = pw @ z
        if t:
            cross = label_sums(pw) if p else np.zeros((0, t))
            m[:p, p:] = cross
            m[p:, :p] = cross.T
            m[p:, p:] = np.diag(label_sums(w))
            rhs[p:] = label_sums(w * z)
        minv = np.linalg.pinv(m, hermitian=True)
        return minv @ rhs, minv

    def residual(beta: np.ndarray) -> np.ndarray:
        if isinstance(sums, _GridSums):
            return sums.residual(beta)
        pred = beta[:p] @ phi if p else np.zeros(n)
        if t and starts is not None:  # label runs: one offset per contiguous run
            bounds = np.append(starts, n).tolist()
            for k in range(t):
                pred[bounds[k]:bounds[k + 1]] += beta[p + k]
        elif t:
            pred += beta[p:][lab]
        return np.subtract(z, pred, out=pred)

    w = np.ones(n)
    beta, minv = solve(w)
    resid = residual(beta)
    scale = _mad_scale(resid) if (robust or need_scale) else math.nan
    it = 0
    if robust:
        for it in range(1, _MAX_ITER + 1):
            if scale <= _TINY_M:
                break
            w = _irls_weights(resid, scale, huber=it <= _HUBER_ITER)
            new, minv = solve(w)
            change = float(np.max(np.abs(new - beta))) if new.size else 0.0
            beta = new
            resid = residual(beta)
            scale = _mad_scale(resid)
            if it > _HUBER_ITER and change < 1e-5 * max(scale, _TINY_M):
                break
    sw = float(w.sum())
    dof = sw - (p + t)
    sigma2 = float(np.sum(w * resid**2) / dof) if dof > 0 else 0.0
    if order is not None:  # back to the caller's pixel order
        back = np.empty_like(order)
        back[order] = np.arange(order.size)
        w, resid = w[back], resid[back]
    return _FitResult(beta, w, sigma2 * minv, resid, scale, it)


def _irls_weights(resid: np.ndarray, scale: float, *, huber: bool) -> np.ndarray:
    """Huber or Tukey weights of ``resid / scale``, block by block (each block's temporaries
    stay in the processor's cache; elementwise, so the numbers are the same)."""
    w = np.empty_like(resid)
    tmp = np.empty(min(_BLOCK_PIXELS, resid.size))
    for a in range(0, resid.size, _BLOCK_PIXELS):
        r = resid[a:a + _BLOCK_PIXELS]
        t = np.divide(r, scale, out=tmp[:r.size])
        if huber:
            _huber_weights(t, out=w[a:a + _BLOCK_PIXELS])
        else:
            _tukey_weights(t, out=w[a:a + _BLOCK_PIXELS])
    return w


class _GridSums:
    """Normal equations and residuals of ``z ~ sum_k beta_k pv_t[y, k] pu_t[x, k]`` on a whole
    grid (raster order) for any weights: ``sum w phi_i phi_j = sum_y pv_i pv_j (W pu_i pu_j)``,
    one matrix product over the weight map ``W`` per solve."""

    def __init__(self, basis: _Basis, z: np.ndarray) -> None:
        self.pu, self.pv = basis.pu_t, basis.pv_t
        ny, nx = self.pv.shape[0], self.pu.shape[0]
        self.shape = (ny, nx)
        self.z = z.reshape(ny, nx)
        self.ii, self.jj = np.tril_indices(basis.n)
        self.pu2 = self.pu[:, self.ii] * self.pu[:, self.jj]  # (nx, pairs)
        self.pv2 = self.pv[:, self.ii] * self.pv[:, self.jj]  # (ny, pairs)

    def normal_equations(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        wm = w.reshape(self.shape)
        pairs = np.einsum("yk,yk->k", self.pv2, wm @ self.pu2)
        rhs = np.einsum("yk,yk->k", self.pv, (wm * self.z) @ self.pu)
        p = self.pu.shape[1]
        m = np.zeros((p, p))
        m[self.ii, self.jj] = pairs
        m[self.jj, self.ii] = pairs
        return m, rhs

    def residual(self, beta: np.ndarray) -> np.ndarray:
        pred = (self.pv * beta[None, :]) @ self.pu.T
        return np.subtract(self.z, pred, out=pred).reshape(-1)


class _WeightedSums:
    """Normal equations of ``z ~ phi.T beta + offset[label]`` for any pixel weights ``w``.

    Rows of ``q`` are the per-pixel products ``phi_i phi_j`` (i <= j), ``phi_i z`` and, with
    label segments (pixels sorted by label, ``starts`` of each run), ``phi_i`` and ``z``: every
    entry of the normal matrix and right-hand side is ``q_k . w`` over all pixels or over one
    segment.
    """

    def __init__(self, phi: np.ndarray, z: np.ndarray, starts: np.ndarray | None) -> None:
        p, n = phi.shape
        self.p = p
        self.ii, self.jj = np.tril_indices(p)
        npair = self.ii.size
        k = npair + p + (p + 2 if starts is not None else 0)
        q = np.empty((k, n))
        for r, (i, j) in enumerate(zip(self.ii, self.jj, strict=True)):
            np.multiply(phi[i], phi[j], out=q[r])
        for i in range(p):
            np.multiply(phi[i], z, out=q[npair + i])
        if starts is not None:
            q[npair + p:npair + 2 * p] = phi
            q[npair + 2 * p] = z
            q[npair + 2 * p + 1] = 1.0
        self.q = q
        self.bounds = None if starts is None else np.append(starts, n).tolist()

    def normal_equations(self, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        p, q, npair = self.p, self.q, self.ii.size
        if self.bounds is None:
            tot, seg = q @ w, None
        else:
            b = self.bounds
            seg = np.array([q[:, b[k]:b[k + 1]] @ w[b[k]:b[k + 1]]
                            for k in range(len(b) - 1)])  # (t, K)
            tot = seg.sum(axis=0)
        t = 0 if seg is None else seg.shape[0]
        m = np.zeros((p + t, p + t))
        rhs = np.zeros(p + t)
        m[self.ii, self.jj] = tot[:npair]
        m[self.jj, self.ii] = tot[:npair]
        rhs[:p] = tot[npair:npair + p]
        if seg is not None:
            cross = seg[:, npair + p:npair + 2 * p].T  # (p, t)
            m[:p, p:] = cross
            m[p:, :p] = cross.T
            m[p:, p:] = np.diag(seg[:, npair + 2 * p + 1])
            rhs[p:] = seg[:, npair + 2 * p]
        return m, rhs


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
    fit = _fit(basis.at_t(iy, ix), h[iy, ix], robust=robust,
               grid=basis if iy.size == h.size else None)
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


#: Pixels per block of rows in row-wise reweighting loops: a block's working arrays stay in
#: the processor's cache through all iterations (several times faster than whole-frame passes
#: on a memory-bound machine; rows are independent, so the numbers are the same).
_BLOCK_PIXELS = 65536


def _robust_line_differences(
    d: np.ndarray, m: np.ndarray, u: np.ndarray, *, slopes: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Robust offset (and slope) of each row of ``d`` over its mask ``m``, all rows at once.

    Returns offset (R,), slope (R,) (zeros unless ``slopes``) and the standard error of the
    offset (R,). Every row must have at least 3 pixels in ``m``. Twelve reweighting steps
    (two Huber, then Tukey), computed in preallocated buffers, block of rows by block.
    """
    step = max(1, _BLOCK_PIXELS // max(d.shape[1], 1))
    if d.shape[0] > step:
        parts = [_robust_line_differences(d[i:i + step], m[i:i + step], u, slopes=slopes)
                 for i in range(0, d.shape[0], step)]
        locs, slps, ses = zip(*parts, strict=True)
        return np.concatenate(locs), np.concatenate(slps), np.concatenate(ses)
    dz = np.where(m, d, np.nan)
    loc = _row_nanmedian(dz)
    slope = np.zeros_like(loc)
    scale = MAD_TO_SIGMA * _row_nanmedian(np.abs(dz - loc[:, None]))
    scale = np.maximum(scale, _TINY_M)[:, None]
    uu = np.broadcast_to(u[None, :], d.shape)
    d0 = np.where(m, d, 0.0)
    # +inf outside the mask: both weight functions give exactly 0 there (k/inf, max(1-inf, 0))
    d_out = np.where(m, d, np.inf)
    r = np.empty_like(d0)
    w = np.empty_like(d0)
    buf = np.empty_like(d0)
    for it in range(12):
        np.subtract(d_out, loc[:, None], out=r)
        if slopes:
            r -= np.multiply(slope[:, None], uu, out=buf)
        np.divide(r, scale, out=r)
        if it < 2:
            _huber_weights(r, out=w)
        else:
            _tukey_weights(r, out=w)
        s0 = w.sum(axis=1)
        ok = s0 > 0
        t0 = np.einsum("ij,ij->i", w, d0)
        if slopes:
            s1 = np.multiply(w, uu, out=buf).sum(axis=1)
            s2 = (np.multiply(buf, uu, out=buf)).sum(axis=1)
            t1 = (np.multiply(np.multiply(w, uu, out=buf), d0, out=buf)).sum(axis=1)
            det = s0 * s2 - s1 * s1
            ok &= det > 1e-12 * np.maximum(s0 * s2, 1e-300)
            det_safe = np.where(ok, det, 1.0)
            loc = np.where(ok, (s2 * t0 - s1 * t1) / det_safe, loc)
            slope = np.where(ok, (s0 * t1 - s1 * t0) / det_safe, slope)
        else:
            loc = np.where(ok, t0 / np.where(ok, s0, 1.0), loc)
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
    return _row_nanmedian(win[starts])


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


def _sobel_magnitude(sm: np.ndarray) -> np.ndarray:
    """``hypot(sobel(sm, axis=1), sobel(sm, axis=0)) / 8`` with ``mode="nearest"``.

    The Sobel sums are those of ``ndimage.sobel`` term by term (difference ``x[+1] - x[-1]``
    along one axis, then ``2 x[0] + (x[-1] + x[+1])`` along the other, edges replicated), on
    slices of one padded copy; the magnitude is ``sqrt(gx² + gy²)``, within an ulp of hypot.
    """
    p = np.pad(sm, 1, mode="edge")
    dx = p[:, 2:] - p[:, :-2]  # (ny + 2, nx)
    dy = p[2:, :] - p[:-2, :]  # (ny, nx + 2)
    gx = 2.0 * dx[1:-1] + (dx[:-2] + dx[2:])
    gy = 2.0 * dy[:, 1:-1] + (dy[:, :-2] + dy[:, 2:])
    gx /= 8.0
    gy /= 8.0
    gx *= gx
    gy *= gy
    gx += gy
    return np.sqrt(gx, out=gx)


def _masked_smooth(h: np.ndarray, valid: np.ndarray, sigma_px: float
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Normalised Gaussian smoothing over the ``valid`` pixels, and where it has support.

    ``gaussian(h * valid) / gaussian(valid)`` where the smoothed mask is at least 0.5, else 0.
    With every pixel valid the smoothed mask is the same number everywhere (the kernel's sum,
    accumulated in the same order at every pixel), so it is taken from a 1 x 1 frame.
    """
    if sigma_px > 0:
        num = ndimage.gaussian_filter(np.where(valid, h, 0.0), sigma_px, mode="nearest")
        if valid.all():
            den = ndimage.gaussian_filter(np.ones((1, 1)), sigma_px, mode="nearest")
        else:
            den = ndimage.gaussian_filter(valid.astype(np.float64), sigma_px, mode="nearest")
    else:
        num, den = np.where(valid, h, 0.0), valid.astype(np.float64)
    support = np.broadcast_to(den >= 0.5, h.shape)
    if den.size == 1:
        sm = num / den if bool(support.flat[0]) else np.zeros_like(num)
    else:
        sm = np.where(support, num / np.where(support, den, 1.0), 0.0)
    return sm, support


def _edge_mask(h: np.ndarray, valid: np.ndarray, *, min_step_m: float,
               threshold_sigma: float = 4.0, sigma_px: float = 1.0,
               grow_px: int = 2) -> np.ndarray:
    """Pixels near height edges: smoothed gradient above median + k robust deviations.

    The threshold is at least a quarter of the peak gradient of a step of ``min_step_m`` (so
    that small line-to-line errors of a first pass do not count as edges).
    """
    sm, support = _masked_smooth(h, valid, sigma_px)
    g = _sobel_magnitude(sm)
    gv = g[valid & support]
    if gv.size == 0:
        return np.zeros_like(valid)
    med, mad = _median_mad(gv)
    spread = MAD_TO_SIGMA * mad
    floor = 0.25 * min_step_m / (math.sqrt(2 * math.pi) * sigma_px)
    mask = (g > max(med + threshold_sigma * spread, floor)) & support
    return _dilate_cross(mask, grow_px) if mask.any() else mask


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
    trend = base @ _fit(base.T, c, robust=True).beta
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
    sm, support = _masked_smooth(r, valid, sigma_px)
    g = _sobel_magnitude(sm)
    inside = valid & support
    gv = g[inside]
    med, mad = _median_mad(gv) if gv.size else (0.0, 0.0)
    spread = MAD_TO_SIGMA * mad
    # a sharp step of min_step_m, smoothed by the Gaussian, peaks at min_step/(sqrt(2 pi) sigma)
    floor = 0.5 * min_step_m / (math.sqrt(2 * math.pi) * max(sigma_px, 0.5))
    thr = max(med + threshold_sigma * spread, floor)
    edges = (g > thr) | ~inside
    edges = _dilate_cross(edges, 1)
    lab, n = ndimage.label(~edges)
    sizes = np.bincount(lab.ravel(), minlength=n + 1)
    keep = sizes >= min_px
    keep[0] = False
    new_id = np.full(n + 1, -1, dtype=np.int64)
    new_id[keep] = np.arange(int(keep.sum()))
    return new_id[lab], thr


def _adjacent_pairs(labels: np.ndarray, n_labels: int, reach: int) -> dict[tuple[int, int], int]:
    """Pairs of labels that face each other across at most ``reach`` pixels, with counts.

    Every pixel pair (p, p + s) along a row, column or diagonal with two different labels is
    counted. Regions are 4-connected, so the straight path between such a pair crosses an
    unassigned pixel (for a diagonal step the two pixels beside it are unassigned) within
    ``|s|`` of p: only pixels that close to an unassigned one are examined.
    """
    counts: dict[tuple[int, int], int] = {}
    if n_labels < 2:
        return counts
    ny, nx = labels.shape
    assigned = labels >= 0
    ys, xs = np.nonzero(assigned & _dilate_square(~assigned, reach))
    la = labels[ys, xs]
    total = np.zeros(n_labels * n_labels, dtype=np.int64) if n_labels <= 1024 else None
    for s in range(1, reach + 1):
        for dy, dx in ((0, s), (s, 0), (s, s), (s, -s)):
            y2, x2 = ys + dy, xs + dx
            inb = (y2 < ny) & (x2 >= 0) & (x2 < nx)
            a, b = la[inb], labels[y2[inb], x2[inb]]
            m = (b >= 0) & (a != b)
            if not m.any():
                continue
            am, bm = a[m], b[m]
            code = np.minimum(am, bm) * n_labels + np.maximum(am, bm)
            if total is not None:  # few labels: one count per possible pair
                total += np.bincount(code, minlength=n_labels * n_labels)
                continue
            codes, cnt = np.unique(code, return_counts=True)
            for c, k in zip(codes.tolist(), cnt.tolist(), strict=True):
                key = (c // n_labels, c % n_labels)
                counts[key] = counts.get(key, 0) + k
    if total is not None:
        for c in np.flatnonzero(total).tolist():
            counts[(c // n_labels, c % n_labels)] = int(total[c])
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
    phi_c = basis_c.at_t(iy, ix)
    z = h[iy, ix]
    pre = _fit(phi_c, z, robust=True, grid=basis_c if iy.size == h.size else None)
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
        # the terrace pixels' rows of the design without its constant column (same numbers
        # as basis.at(jy, jx): basis_c's terms are (0, 0) followed by basis's)
        fit = _fit(phi_c[1:, sel[iy, ix]], h[jy, jx], labels[jy, jx], n_lab, robust=robust)
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
    sub = np.r_[np.arange(basis.n), basis.n]
    csub = cov_all[np.ix_(sub, sub)]
    ones_u, ones_v = np.ones((basis.pu_t.shape[0], 1)), np.ones((basis.pv_t.shape[0], 1))
    var_sub = _grid_variance(np.concatenate([basis.pu_t, ones_u], axis=1),
                             np.concatenate([basis.pv_t, ones_v], axis=1), csub)
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
    plain = _fit(phi_c if order == 1 else basis_p.at_t(iy, ix), z, robust=False,
                 need_scale=False)
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


def _close_rows(mask: np.ndarray, radius: int) -> np.ndarray:
    """Binary closing along each row by a segment of ``2 radius + 1`` pixels.

    The same as ``ndimage.binary_closing`` with a (1, 2 radius + 1) structure (outside the
    frame counts as False in both the dilation and the erosion), done as running max / min.
    """
    size = 2 * radius + 1
    m = mask.view(np.uint8) if mask.dtype == bool else mask.astype(np.uint8)
    grown = ndimage.maximum_filter1d(m, size, axis=1, mode="constant", cval=0)
    return ndimage.minimum_filter1d(grown, size, axis=1, mode="constant", cval=0).astype(bool)


def _shifted_or(mask: np.ndarray, offsets: list[tuple[int, int]]) -> np.ndarray:
    """``mask`` OR its copies moved by each (dy, dx) (pixels moved in from outside: False)."""
    out = mask.copy()
    ny, nx = mask.shape
    for dy, dx in offsets:
        if abs(dy) >= ny or abs(dx) >= nx:
            continue
        ty, sy = (slice(dy, None), slice(None, ny - dy)) if dy >= 0 else (
            slice(None, ny + dy), slice(-dy, None))
        tx, sx = (slice(dx, None), slice(None, nx - dx)) if dx >= 0 else (
            slice(None, nx + dx), slice(-dx, None))
        out[ty, tx] |= mask[sy, sx]
    return out


def _dilate_square(mask: np.ndarray, radius: int) -> np.ndarray:
    """``ndimage.binary_dilation`` by a (2r+1)² square, as running ORs along each axis."""
    rows = _shifted_or(mask, [(d, 0) for r in range(1, radius + 1) for d in (r, -r)])
    return _shifted_or(rows, [(0, d) for r in range(1, radius + 1) for d in (r, -r)])


def _dilate_cross(mask: np.ndarray, iterations: int) -> np.ndarray:
    """``ndimage.binary_dilation(mask, iterations=n)`` (4-neighbour cross, outside False)."""
    out = mask
    for _ in range(iterations):
        out = _shifted_or(out, [(1, 0), (-1, 0), (0, 1), (0, -1)])
    return out


def _row_median(a: np.ndarray) -> np.ndarray:
    """Median of each row over its finite entries (0 for rows without any)."""
    med = _row_nanmedian(a)
    return np.where(np.isnan(med), 0.0, med)


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
    bridged = low | (_close_rows(low, _SCAR_GAP_PX)
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
