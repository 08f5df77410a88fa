"""Robust weighted least squares of the levelling stages: Legendre bases on a frame's
normalised grid, Huber and Tukey IRLS, and the per-terrace normal equations."""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial import legendre

from pipeline.stages.stats import median_inplace as _median_inplace

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
_HUBER_ITER = 3
#: Pixels per block of rows in row-wise reweighting loops: a block's working arrays stay in
#: the processor's cache through all iterations (several times faster than whole-frame passes
#: on a memory-bound machine; rows are independent, so the numbers are the same).
_BLOCK_PIXELS = 65536


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
            # (a column gather comes out in Fortran order: made C-contiguous again, so that
            # every per-pixel product below runs along memory)
            phi = np.ascontiguousarray(phi[:, order])
            z, lab = z[order], labels[order]
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
