"""Line offsets: each scan line matched to its neighbours, steps along the slow axis kept."""

from __future__ import annotations

import math
from typing import Any, Literal

import numpy as np
import xarray as xr
from scipy import ndimage

from pipeline.errors import ProcessingError
from pipeline.model import add_warning, get_tip_change_rows, stage
from pipeline.stages.level.edges import _edge_mask
from pipeline.stages.level.frame import (
    _add_variance,
    _bad_names,
    _coords,
    _copy_with,
    _inputs,
    _name,
    _warn_if_constant,
)
from pipeline.stages.level.robust import (
    _BLOCK_PIXELS,
    _TINY_M,
    MAD_TO_SIGMA,
    _fit,
    _huber_weights,
    _mad_scale,
    _tukey_weights,
)
from pipeline.stages.stats import nanmedian


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
    loc = nanmedian(dz, axis=1)
    slope = np.zeros_like(loc)
    scale = MAD_TO_SIGMA * nanmedian(np.abs(dz - loc[:, None]), axis=1)
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
    return nanmedian(win[starts], axis=1)


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


@stage(version="2")
def level_lines(
    ds: xr.Dataset,
    *,
    slopes: bool = False,
    step_threshold_sigma: float = 5.0,
    min_step_height_m: float = 5e-11,
    window_lines: int = 10,
    tip_jumps: Literal["remove", "keep"] = "remove",
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
    tip_jumps : {"remove", "keep"}
        A persistent jump at a line where :func:`pipeline.stages.quality.flag_tip_changes`
        found a tip change (attr ``tip_change_rows``) is the tip's own length change, not
        topography: ``"remove"`` (default) takes it out of the lines after it, ``"keep"`` keeps
        it as a step.

    Returns
    -------
    xarray.Dataset
        New frame; attrs ``line_offsets_m`` (removed offset of each line, NaN where a line had
        too few usable pixels), ``line_offset_rms_m``, ``line_slopes`` (per-line slope along
        the fast axis in m/m, when ``slopes``), ``line_steps_kept`` (indices of the first line
        above each kept step) and ``line_step_heights_m``; ``tip_jump_rows`` (first line after
        each removed tip-change jump), ``tip_jumps_m`` and ``tip_jump_uncertainties_m`` (the
        jump taken out, and its standard uncertainty: the fit's, the boundary match's and
        :data:`TIP_JUMP_ALLOWANCE`).

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
    axis closer than ``window_lines`` lines merge into one. A persistent jump within two lines
    of a detected tip change is the tip's own length change (the quality stage tells it from a
    step parallel to the fast axis: it moves the whole line, across every step edge): it is
    removed from the lines after it, and its uncertainty is added to theirs; with
    ``tip_jumps="keep"`` it is kept like a step. (A real step edge within about 1° of the fast
    axis across the whole frame cannot be told from a tip change in one frame and is removed
    too; the warning names it.) The slow profile of
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
    if tip_jumps not in ("remove", "keep"):
        raise ProcessingError(f"frame {_name(ds)}: level_lines tip_jumps = {tip_jumps!r}; "
                              "expected 'remove' or 'keep'")
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
    tip = _at_tip_changes(ds, rows, res.steps) if tip_jumps == "remove" else \
        np.zeros(res.steps.size, dtype=bool)
    first_after = rows[res.steps + 1] if res.steps.size else np.zeros(0, int)
    notes = []
    tip_errors = np.hypot(res.step_errors[tip], TIP_JUMP_ALLOWANCE * res.step_heights[tip])
    for before, row, jump, err in zip(rows[res.steps[tip]], first_after[tip],
                                      res.step_heights[tip], tip_errors, strict=True):
        corr[row:] += jump
        var[row:] += err**2 if math.isfinite(err) else 0.0
        notes.append(f"level_lines: the tip change's height jump of {jump * 1e12:+.1f} ± "
                     f"{err * 1e12:.1f} pm between lines {before} and {row} was removed")
    attrs: dict[str, Any] = {
        "line_offsets_m": offsets,
        "line_offset_rms_m": float(np.sqrt(np.mean(res.off**2))),
        "line_steps_kept": first_after[~tip].astype(np.int32),
        "line_step_heights_m": np.asarray(res.step_heights[~tip], dtype=np.float64),
        "tip_jump_rows": first_after[tip].astype(np.int32),
        "tip_jumps_m": np.asarray(res.step_heights[tip], dtype=np.float64),
        "tip_jump_uncertainties_m": np.asarray(tip_errors, dtype=np.float64),
    }
    if slopes:
        line_slopes = np.full(ny, np.nan)
        line_slopes[rows] = res.slope / hx
        attrs["line_slopes"] = line_slopes
    out = _copy_with(ds, height=h - corr, uncertainty=_add_variance(ds, var), attrs=attrs)
    for note in notes:
        add_warning(out, note)
    if res.breaks.size:
        add_warning(out, f"level_lines: {res.breaks.size} pair(s) of neighbouring lines share "
                    "too few usable pixels to be matched; their relative level is kept as "
                    "recorded")
    _warn_if_constant(out, h, valid, "level_lines")
    return out


#: A persistent line jump this close (lines) to a detected tip change is the tip's own jump.
TIP_JUMP_TOLERANCE_LINES = 2
#: Allowance (fraction of the jump, combined in quadrature with the fit's standard error) for
#: what the line-level model misses at a tip change: on 8 simulated 256² Au(111) frames with
#: 20 pm corrugation and no line offsets, jumps of 57-178 pm came out with an RMS relative
#: error of 6.8 % while the fit's own error was 5x too small; with 20 pm line offsets the fit's
#: error alone covers it (measured here, a type B allowance in the sense of the GUM, JCGM
#: 100:2008 §4.3).
TIP_JUMP_ALLOWANCE = 0.05


def _at_tip_changes(ds: xr.Dataset, rows: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """Which of the chain's kept steps (boundary after ``rows[steps]``) lie at a tip change.

    The quality stage records the first line with the changed tip, in acquisition order
    (``tip_change_rows``, JSON); the jump lies between that line and the one recorded before it,
    above or below it depending on the slow direction.
    """
    tips = np.asarray(get_tip_change_rows(ds) or [], dtype=float)
    if not (steps.size and tips.size):
        return np.zeros(steps.size, dtype=bool)
    middle = 0.5 * (rows[steps] + rows[steps + 1])  # the boundary, between two lines
    below = str(ds.attrs.get("slow_direction", "increasing")) == "decreasing"
    boundary = tips + 0.5 if below else tips - 0.5
    gap = np.abs(middle[:, None] - boundary[None, :]).min(axis=1)
    return gap <= TIP_JUMP_TOLERANCE_LINES


class _LineMatch:
    def __init__(self, rows: np.ndarray, off: np.ndarray, slope: np.ndarray, se: np.ndarray,
                 steps: np.ndarray, step_heights: np.ndarray, step_errors: np.ndarray,
                 breaks: np.ndarray) -> None:
        self.rows, self.off, self.slope, self.se = rows, off, slope, se
        self.steps, self.step_heights, self.step_errors = steps, step_heights, step_errors
        self.breaks = breaks

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
    is_step = np.isin(jumps, steps)
    step_heights = coef[2:][is_step]
    # standard errors of the jumps: the least-squares error with the line offsets as the
    # residuals, plus the error of the match across the boundary itself, which goes into every
    # level after it: its own standard error and the scatter of one match (two offsets)
    dof = rows.size - x.shape[1]
    var = float(off @ off) / dof if dof > 0 else math.nan
    step_errors = np.sqrt(var * np.diag(np.linalg.pinv(x.T @ x))[2:][is_step]
                          + se[steps] ** 2 + 2.0 * sigma_o**2)
    slope = np.zeros(rows.size)
    if slopes:
        cs = np.concatenate([[0.0], np.cumsum(gg)])
        xs = x[:, :2]
        cs_coef, *_ = np.linalg.lstsq(xs, cs, rcond=None)
        slope = cs - xs @ cs_coef
    return _LineMatch(rows, off, slope, se, steps, step_heights, step_errors, breaks)
