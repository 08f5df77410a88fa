"""Frame quality: areal roughness parameters, tip-change detection, status and warnings.

The last stage of a frame: it summarises the flags the earlier stages set, adds the
``TIP_CHANGE`` flags, computes the ISO 25178-2 height parameters and decides the frame's
``status`` (``"ok"`` or ``"flagged"``) with a human-readable warning for every reason.
"""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import (
    BAD_PIXELS,
    Flag,
    add_warning,
    flag_attrs,
    get_tip_change_rows,
    get_warnings,
    replace_maps,
    stage,
)
from pipeline.stages.stats import median as _median

__all__ = ["areal_parameters", "assess_quality", "detect_tip_changes", "flag_tip_changes"]

#: Lines per block on each side of a candidate tip change; a change must persist at least
#: this long (a one- or two-line glitch is outvoted by the block medians).
_BLOCK_LINES = 8
#: Segments of the fast axis; a tip change moves (nearly) every segment, a step only some.
_MAX_SEGMENTS = 4
#: Fewest columns per segment.
_MIN_SEGMENT_PX = 8
#: Fraction of segments that must move together for a whole-line change (the others may hold
#: a step edge crossing the boundary).
_WHOLE_LINE_FRACTION = 0.6
#: The moved segments must change within this many lines of one another: a tip change hits
#: every segment at the same line (or two, when it happens mid-line), a shallow step edge
#: crosses them at lines that drift along the fast axis.
_MAX_TRANSITION_SPREAD = 1.5
#: The same for the roughness, whose block means change gradually (a step edge does not
#: change the roughness of the lines beside it, so this test matters less there).
_MAX_ROUGHNESS_TRANSITION_SPREAD = 3.0
#: σ of a Gaussian = this factor × its median absolute deviation.
_MAD_TO_SIGMA = 1.482602218505602
#: Smallest robust spread used for the height series (m): below it a frame is flat.
_MIN_HEIGHT_SPREAD_M = 1e-15
#: Pixels whose gradient exceeds this multiple of the frame's median gradient are edges (a step
#: of 2.4 Å against atomic corrugation of tens of pm) and do not count for the roughness.
_EDGE_GRADIENT_FACTOR = 8.0
#: Smallest robust spread of the log line roughness (a 1 % change is never a tip change).
_MIN_LOG_ROUGHNESS_SPREAD = 0.01


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def _nanmedian(a: np.ndarray, axis: int = -1) -> np.ndarray:
    """Median ignoring NaN, NaN for all-NaN slices, without numpy's RuntimeWarning."""
    arr = np.moveaxis(np.asarray(a, dtype=np.float64), axis, -1)
    srt = np.sort(arr, axis=-1)  # NaN sort last
    n = np.sum(~np.isnan(arr), axis=-1)
    lo = np.clip((n - 1) // 2, 0, None)[..., None]
    hi = np.clip(n // 2, 0, None)[..., None]
    med = 0.5 * (np.take_along_axis(srt, lo, -1) + np.take_along_axis(srt, hi, -1))[..., 0]
    return np.where(n > 0, med, np.nan)


def _valid_height(ds: xr.Dataset) -> np.ndarray:
    """Height (float64) with NaN on non-finite and BAD_PIXELS-flagged pixels."""
    if "height" not in ds.data_vars:
        raise ProcessingError(f"frame {ds.attrs.get('frame_id', '<frame>')}: no 'height' "
                              "variable (run reconstruct_height first)")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        bad = (np.asarray(ds["flags"].values).astype(np.uint8) & np.uint8(BAD_PIXELS)) != 0
        h = np.where(bad, np.nan, h)
    return np.where(np.isfinite(h), h, np.nan)


# --------------------------------------------------------------------------------------------
# areal parameters
# --------------------------------------------------------------------------------------------


def areal_parameters(height: np.ndarray, *, mask: np.ndarray | None = None) -> dict[str, float]:
    """ISO 25178-2 height parameters of a height map.

    Parameters
    ----------
    height : numpy.ndarray
        Height map in m; non-finite pixels are ignored. The caller levels it first (plane or
        terraces removed as wanted): the parameters are taken about the mean of what is given.
    mask : numpy.ndarray of bool, optional
        ``True`` for pixels to leave out.

    Returns
    -------
    dict
        ``Sq_m`` (root-mean-square height), ``Sa_m`` (arithmetic mean height), ``Ssk``
        (skewness), ``Sku`` (kurtosis), ``Sp_m`` (maximum peak height), ``Sv_m`` (maximum pit
        depth, positive), ``Sz_m = Sp_m + Sv_m`` (maximum height). ``Ssk`` and ``Sku`` are NaN
        for a flat map (``Sq = 0``), where they are undefined.

    Raises
    ------
    ProcessingError
        No usable pixel.

    Notes
    -----
    Discrete forms of the ISO definitions over the ``n`` valid pixels with ``z`` the heights
    minus their mean: ``Sq = √(Σz²/n)``, ``Sa = Σ|z|/n``, ``Ssk = Σz³/(n·Sq³)``,
    ``Sku = Σz⁴/(n·Sq⁴)``, ``Sp = max z``, ``Sv = |min z|``. No filtering (S-filter, L-operator)
    is applied: the scale limitation is the caller's levelling.

    References
    ----------
    ISO 25178-2:2012, *Geometrical product specifications (GPS) — Surface texture: Areal —
    Part 2: Terms, definitions and surface texture parameters*, §4.1.
    """
    h = np.asarray(height, dtype=np.float64)
    ok = np.isfinite(h)
    if mask is not None:
        ok &= ~np.asarray(mask, dtype=bool)
    if not ok.any():
        raise ProcessingError("areal parameters: no valid pixel (all non-finite or masked)")
    v = h[ok]
    z = v - v.mean() if np.ptp(v) > 0 else np.zeros_like(v)  # no rounding noise if flat
    sq = float(np.sqrt(np.mean(z * z)))
    sa = float(np.mean(np.abs(z)))
    if sq > 0:
        z2 = z * z  # products, not z**3 / z**4 (a generic power is ~50x slower per pixel)
        ssk = float(np.mean(z2 * z) / sq**3)
        sku = float(np.mean(z2 * z2) / sq**4)
    else:
        ssk = sku = math.nan
    sp = float(z.max())
    sv = float(-z.min())
    return {"Sq_m": sq, "Sa_m": sa, "Ssk": ssk, "Sku": sku, "Sp_m": sp, "Sv_m": sv,
            "Sz_m": sp + sv}


# --------------------------------------------------------------------------------------------
# tip changes
# --------------------------------------------------------------------------------------------


def _segments(n: int) -> list[tuple[int, int]]:
    nseg = int(np.clip(n // _MIN_SEGMENT_PX, 1, _MAX_SEGMENTS))
    edges = np.linspace(0, n, nseg + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in itertools.pairwise(edges)]


def _segment_medians(a: np.ndarray, n: int) -> np.ndarray:
    """Median over the columns of each fast-axis segment: shape (rows, segments)."""
    return np.column_stack([_nanmedian(a[:, lo:hi], axis=1) for lo, hi in _segments(n)])


def _network(n: int) -> list[tuple[int, int]]:
    """Comparators (i, j) of Batcher's odd-even merge sort for ``n`` inputs (any ``n``)."""
    pairs: list[tuple[int, int]] = []
    p = 1
    while p < n:
        k = p
        while k >= 1:
            for j in range(k % p, n - k, 2 * k):
                for i in range(min(k, n - j - k)):
                    if (i + j) // (2 * p) == (i + j + k) // (2 * p):
                        pairs.append((i + j, i + j + k))
            k //= 2
        p *= 2
    return pairs


def _block_medians(a: np.ndarray) -> np.ndarray:
    """Median over each run of ``_BLOCK_LINES`` consecutive rows: shape (ny − W + 1, ...).

    The same numbers as :func:`_nanmedian` over the sliding windows, computed with a sorting
    network on whole shifted copies of the map (elementwise min/max, no per-window sort): NaN
    become +inf, so they sort last, and each pixel takes the middle of its finite values.
    """
    w = _BLOCK_LINES
    n_out = a.shape[0] - w + 1
    if n_out < 1:
        win = np.lib.stride_tricks.sliding_window_view(a, w, axis=0)
        return _nanmedian(win, axis=-1)
    arr = np.asarray(a, dtype=np.float64)
    finite = ~np.isnan(arr)
    all_finite = bool(finite.all())
    filled = arr if all_finite else np.where(finite, arr, np.inf)
    planes = [filled[k:k + n_out].copy() for k in range(w)]
    tmp = np.empty_like(planes[0])
    for i, j in _network(w):
        np.minimum(planes[i], planes[j], out=tmp)
        np.maximum(planes[i], planes[j], out=planes[j])
        planes[i], tmp = tmp, planes[i]
    if all_finite:
        return 0.5 * (planes[(w - 1) // 2] + planes[w // 2])
    count = sum(finite[k:k + n_out].astype(np.intp) for k in range(w))
    srt = np.stack(planes, axis=-1)
    lo = np.clip((count - 1) // 2, 0, None)[..., None]
    hi = np.clip(count // 2, 0, None)[..., None]
    med = 0.5 * (np.take_along_axis(srt, lo, -1) + np.take_along_axis(srt, hi, -1))[..., 0]
    return np.where(count > 0, med, np.nan)


def _block_trimmed_means(a: np.ndarray) -> np.ndarray:
    """Mean over each run of ``_BLOCK_LINES`` rows without its largest and smallest value.

    Averages a quantity that oscillates from line to line (the roughness of lines through and
    between atomic rows) better than a median, and still ignores one glitch line per block.
    """
    win = np.sort(np.lib.stride_tricks.sliding_window_view(a, _BLOCK_LINES, axis=0), axis=-1)
    inner = win[..., 1:-1]
    n = np.sum(~np.isnan(inner), axis=-1)
    total = np.where(np.isnan(inner), 0.0, inner).sum(axis=-1)
    return np.where(n == inner.shape[-1], total / np.maximum(n, 1), np.nan)


def _changes(seg_change: np.ndarray, seg_pair: np.ndarray, offset: int, threshold_sigma: float,
             min_spread: float, max_transition_spread: float
             ) -> list[tuple[int, int, float, float]]:
    """Boundaries where the whole line changed at once, far beyond the usual spread.

    ``seg_change[i, s]`` is the change of segment ``s`` from the block before boundary ``i`` to
    the block after it; boundary ``i`` lies after row ``i + offset``. ``seg_pair[k, s]`` is the
    change of segment ``s`` from row ``k`` to row ``k + 1``. Returns ``(first, last, sign,
    strength)``: the rows after which the moved segments changed, the direction, and the size
    of the change in units of the robust spread.
    """
    seg = seg_change - _nanmedian(seg_change, axis=0)[None, :]
    line = _nanmedian(seg, axis=1)
    finite = np.isfinite(line)
    if finite.sum() < 3:
        return []
    dev = np.where(finite, line - np.median(line[finite]), 0.0)
    spread = max(_MAD_TO_SIGMA * float(np.median(np.abs(dev[finite]))), min_spread)
    code = np.where(finite & (np.abs(dev) > threshold_sigma * spread), np.sign(dev), 0.0)
    edges = np.flatnonzero(np.diff(np.concatenate([[0.0], code, [0.0]])) != 0)
    out: list[tuple[int, int, float, float]] = []
    for i, j in itertools.pairwise(edges):  # one pass per run of candidates, not per row
        if code[i] == 0:
            continue
        sign = float(code[i])
        peak = i + int(np.argmax(np.abs(dev[i:j])))
        size = abs(dev[peak])
        strength = size / spread

        def like_line(v: np.ndarray, size: float = size, sign: float = sign) -> np.ndarray:
            # a segment that moved as the whole line did (a step edge adds to it or cancels)
            return np.isfinite(v) & (sign * np.where(np.isfinite(v), v, 0.0) > 0.5 * size) & (
                sign * np.where(np.isfinite(v), v, 0.0) < 1.5 * size)

        moved = like_line(seg[peak])
        if moved.sum() < _WHOLE_LINE_FRACTION * np.isfinite(seg[peak]).sum():
            continue
        # where each moved segment changed: the middle of its plateau of block changes, or
        # the line pair where it jumped; either must agree between the segments
        lo, hi = max(i - _BLOCK_LINES, 0), min(j + _BLOCK_LINES, seg.shape[0])
        above = like_line(seg[lo:hi])[:, moved]
        idx = np.arange(lo, hi)[:, None]
        count = above.sum(axis=0)
        centre = ((above * idx).sum(axis=0) / np.maximum(count, 1))[count > 0] + offset
        rlo, rhi = max(i + offset - 1, 0), min(j - 1 + offset + 1, seg_pair.shape[0] - 1)
        pairs = sign * seg_pair[rlo:rhi + 1][:, moved]
        jump = rlo + np.argmax(np.where(np.isfinite(pairs), pairs, -np.inf), axis=0)
        if centre.size and np.ptp(centre) <= max_transition_spread:
            out.append((int(np.floor(centre.min())), int(np.ceil(centre.max())), sign, strength))
        elif jump.size and np.ptp(jump) <= 1:
            out.append((int(jump.min()), int(jump.max()), sign, strength))
    return out


def _detrend(a: np.ndarray) -> np.ndarray:
    """Each column minus its median over rows (tilt, steady drift)."""
    return a - _nanmedian(a, axis=0)[None, :]


def _first_new_line(step: np.ndarray, first: int, last: int, sign: float,
                    slow_direction: str) -> int:
    """Row of the first line recorded with the changed tip, from line-pair changes ``step``.

    ``step[k]`` is the change from row k to row k+1; the boundary of the run is where it is
    largest (in the direction of the change).
    """
    lo, hi = max(first - 1, 0), min(last + 1, step.size - 1)
    window = np.where(np.isfinite(step[lo:hi + 1]), sign * step[lo:hi + 1], -np.inf)
    k = lo + int(np.argmax(window))
    return k if slow_direction == "decreasing" else k + 1


def detect_tip_changes(ds: xr.Dataset, *, threshold_sigma: float = 8.0) -> list[int]:
    """Rows where the tip changed abruptly and for good (height jump or resolution change).

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame with ``height`` (and ``flags``; unusable pixels are ignored). Run it
        before line levelling: per-line offset removal also removes the height jumps.
    threshold_sigma : float
        A change counts when it exceeds this many robust standard deviations of the same
        quantity over the frame's other lines.

    Returns
    -------
    list of int
        Row indices of the first line recorded with the changed tip (in acquisition order:
        the lower row of the pair for ``slow_direction = "decreasing"``), sorted.

    Notes
    -----
    Two signatures, each tested against the frame's own line-to-line scatter (threshold ×
    1.4826 × median absolute deviation over all row boundaries):

    * *height*: every pixel column is summarised by its median over blocks of 8 lines before
      and after each row boundary; the change is taken per segment of the fast axis (up to
      4 segments, median over the segment's columns), then over segments.
    * *resolution*: the line roughness, the median gradient magnitude per segment and line
      (fast-axis difference and the smaller of the two slow-axis differences, so that it
      hardly depends on where a line cuts the atomic rows and a line offset does not count),
      compared in log over the same blocks with trimmed means (a sharper or blunter tip
      changes the high-frequency contrast of every line after the change). Edge pixels
      (gradient above 8× the frame's median) are left out, and a rise and fall within 16
      lines, or within 16 lines of the frame's first or last row, is a transient band (a
      shallow step edge, a burst of noise), not a tip change.

    A change is a tip change only if (1) at least 60 % of the segments moved in the same
    direction by 0.5–1.5 times the line's change (a tip change shifts the whole line; a step
    edge crossing the frame moves only the segments it passes through, by its own height), (2)
    those segments changed at the same line, within 1.5 lines (3 for the roughness, whose
    block means change gradually; a mid-line change splits them over two lines, while a
    shallow step crosses the segments at lines that drift along the fast axis), and (3) it
    persists (block medians of 8 lines outvote a glitch of one or two lines). The frame's tilt
    and a steady drift cancel (the median change over all boundaries is removed per segment).
    Changes within 8 lines of the first or last row cannot be tested for persistence and are
    not reported; two changes closer than 8 lines count as one. A step within about 1° of
    the fast axis across the whole frame is indistinguishable from a tip change in a single
    frame. Sensitivity (simulated 128×128 frames with 20 pm atomic corrugation and 2 pm
    noise): a 5 pm whole-line jump, a threefold change of the atomic contrast.

    References
    ----------
    P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273 (1993),
    doi:10.1080/01621459.1993.10476408 (median absolute deviation as a robust scale).
    """
    if not (math.isfinite(threshold_sigma) and threshold_sigma > 0):
        raise ProcessingError(f"detect_tip_changes: threshold_sigma = {threshold_sigma!r} must "
                              "be > 0")
    h = _valid_height(ds)
    ny, nx = h.shape
    w = _BLOCK_LINES
    if ny < 2 * w + 2 or nx < 2 * _MIN_SEGMENT_PX or not np.isfinite(h).any():
        return []
    slow = str(ds.attrs.get("slow_direction", "increasing"))
    ks = np.arange(w - 1, ny - w)  # boundary after row k: block k-w+1..k vs k+1..k+w
    found: list[tuple[float, int]] = []  # (strength, row)

    # height jumps
    blocks = _block_medians(h)  # (ny - w + 1, nx)
    diff = blocks[ks + 1] - blocks[ks - w + 1]
    seg_h = _segment_medians(diff, nx)
    seg_pair = _detrend(_segment_medians(h[1:] - h[:-1], nx))
    pair = _nanmedian(seg_pair, axis=1)
    for first, last, sign, strength in _changes(seg_h, seg_pair, w - 1, threshold_sigma,
                                                _MIN_HEIGHT_SPREAD_M, _MAX_TRANSITION_SPREAD):
        found.append((strength, _first_new_line(pair, first, last, sign, slow)))

    # resolution changes
    # line roughness: median gradient magnitude per segment (the slow-axis difference makes it
    # nearly independent of where a line cuts the atomic rows); the boundary itself is placed
    # with the fast-axis roughness of each line alone
    dx = np.abs(np.diff(h, axis=1))
    step_y = np.abs(np.diff(h, axis=0))
    pad = np.full((1, nx), np.inf)
    # the smaller of the two slow-axis differences: a line offset (glitch, height jump) makes
    # one side large, never both sides of its neighbours
    dy = np.fmin(np.vstack([step_y, pad]), np.vstack([pad, step_y]))[:, :-1]
    dy = np.where(np.isinf(dy), np.nan, dy)
    grad = np.sqrt(dx * dx + dy * dy)  # hypot(dx, dy) to within an ulp (NaN stays NaN)
    finite_grad = grad[np.isfinite(grad)]
    if finite_grad.size:  # edges (steps, adsorbate flanks) are topography, not resolution
        edge = np.where(np.isfinite(grad), grad, 0.0) > _EDGE_GRADIENT_FACTOR * _median(
            finite_grad)
        grad = np.where(edge, np.nan, grad)
        dx = np.where(edge, np.nan, dx)
    seg_r = _segment_medians(grad, nx - 1)
    seg_x = _segment_medians(dx, nx - 1)
    pos = seg_r[np.isfinite(seg_r) & (seg_r > 0)]
    if pos.size:
        floor = 1e-3 * _median(pos)
        logr = np.log(np.where(np.isfinite(seg_r), np.maximum(seg_r, floor), np.nan))
        logx = np.log(np.where(np.isfinite(seg_x), np.maximum(seg_x, floor), np.nan))
        rblocks = _block_trimmed_means(logr)
        change = rblocks[ks + 1] - rblocks[ks - w + 1]
        seg_rpair = _detrend(logx[1:] - logx[:-1])
        rpair = _nanmedian(seg_rpair, axis=1)
        events = [(strength, _first_new_line(rpair, first, last, sign, slow), sign)
                  for first, last, sign, strength in _changes(
                      change, seg_rpair, w - 1, threshold_sigma, _MIN_LOG_ROUGHNESS_SPREAD,
                      _MAX_ROUGHNESS_TRANSITION_SPREAD)]
        # a rough band of a few lines (a shallow step edge running along the fast axis, a
        # burst of noise) rises and falls within two blocks, or at the frame's edge
        for strength, row, sign in events:
            transient = row < 2 * w or row > ny - 2 * w or any(
                sign2 == -sign and abs(row2 - row) < 2 * w for _, row2, sign2 in events)
            if not transient:
                found.append((strength, row))
    # one event per block: changes closer than a block cannot be told apart; keep the strongest
    rows: list[int] = []
    for _, row in sorted(found, reverse=True):
        if all(abs(row - r) >= w for r in rows):
            rows.append(row)
    return sorted(rows)


# --------------------------------------------------------------------------------------------
# the stage
# --------------------------------------------------------------------------------------------


@stage(version="1")
def flag_tip_changes(ds: xr.Dataset, *, threshold_sigma: float = 8.0) -> xr.Dataset:
    """Find tip changes (:func:`detect_tip_changes`) and flag their lines ``TIP_CHANGE``.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame, before line levelling (which would remove the height jumps).
    threshold_sigma : float
        Threshold of :func:`detect_tip_changes`.

    Returns
    -------
    xarray.Dataset
        Copy with the flags set and the attr ``tip_change_rows`` (JSON list), which
        :func:`assess_quality` later reports instead of detecting again.
    """
    rows = detect_tip_changes(ds, threshold_sigma=threshold_sigma)
    flags = _flags_of(ds)
    if rows:
        flags[rows, :] |= np.uint8(Flag.TIP_CHANGE)
    out = _with_flags(ds, flags)
    out.attrs["tip_change_rows"] = json.dumps(rows)
    return out


def _flags_of(ds: xr.Dataset) -> np.ndarray:
    """The frame's flags (NOT_RECORDED added on non-finite heights), as a new uint8 array."""
    h = np.asarray(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        flags = np.asarray(ds["flags"].values).astype(np.uint8)
    else:
        flags = np.zeros(h.shape, np.uint8)
    flags[~np.isfinite(h)] |= np.uint8(Flag.NOT_RECORDED)
    return flags


def _with_flags(ds: xr.Dataset, flags: np.ndarray) -> xr.Dataset:
    if "flags" in ds.data_vars:
        out = replace_maps(ds, flags=flags)
    else:
        out = ds.copy()
        out["flags"] = (("y", "x"), flags, flag_attrs())
    out.attrs = dict(ds.attrs)
    return out


@stage(version="2")
def assess_quality(
    ds: xr.Dataset,
    *,
    tip_change_threshold_sigma: float = 8.0,
    bad_pixel_fraction_limit: float = 0.01,
    trace_mismatch_fraction_limit: float = 0.02,
) -> xr.Dataset:
    """Flag tip changes, compute roughness, and set the frame's status with its reasons.

    Parameters
    ----------
    ds : xarray.Dataset
        Processed frame (``height``, ``flags``), ideally levelled.
    tip_change_threshold_sigma : float
        Threshold of :func:`detect_tip_changes`.
    bad_pixel_fraction_limit : float
        The frame is flagged when more than this fraction of its pixels is unusable
        (:data:`pipeline.model.BAD_PIXELS`).
    trace_mismatch_fraction_limit : float
        The frame is flagged when more than this fraction of its pixels has disagreeing
        forward and backward traces.

    Returns
    -------
    xarray.Dataset
        Copy with ``TIP_CHANGE`` set on the first line after each tip change (the rows of an
        earlier :func:`flag_tip_changes` when its ``tip_change_rows`` attr is present, since
        line levelling removes height jumps; detected here otherwise); attrs ``Sq_m``,
        ``Sa_m``, ``Ssk``, ``Sku``, ``Sp_m``, ``Sv_m``, ``Sz_m`` (NaN when undefined),
        ``bad_pixel_fraction``, ``tip_change_rows`` (JSON list), ``status`` and ``warnings``.

    Notes
    -----
    ``status`` is ``"flagged"`` when any of these holds, each with its own warning: some
    pixels were not recorded (DESIGN.md §3: a frame with missing data is always flagged),
    more than ``bad_pixel_fraction_limit`` of the pixels are unusable, a tip change was found,
    more than ``trace_mismatch_fraction_limit`` of the pixels have mismatching traces, the
    terrace levels are not whole multiples of one step (``step_levels_consistent = 0`` from
    :func:`pipeline.stages.level.level_terraces`), no pixel is usable, or the height is the
    same everywhere. Otherwise ``"ok"`` (earlier
    warnings are kept, and may be informational). The areal parameters use every usable pixel
    (adsorbates left out of background fits included: they are topography).
    """
    frame = str(ds.attrs.get("frame_id", "<frame>"))
    for name, val in (("bad_pixel_fraction_limit", bad_pixel_fraction_limit),
                      ("trace_mismatch_fraction_limit", trace_mismatch_fraction_limit)):
        if not (math.isfinite(val) and 0 <= val <= 1):
            raise ProcessingError(f"frame {frame}: {name} = {val!r} must be within [0, 1]")
    h = _valid_height(ds)
    flags = _flags_of(ds)
    reasons: list[str] = []

    not_rec = (flags & np.uint8(Flag.NOT_RECORDED)) != 0
    lost_lines = int(np.all(not_rec, axis=1).sum())
    if not_rec.any():
        reasons.append(f"{int(not_rec.sum())} pixel(s) ({100 * not_rec.mean():.1f}%) not "
                       "recorded" + (f", {lost_lines} whole line(s)" if lost_lines else ""))
    bad = (flags & np.uint8(BAD_PIXELS)) != 0
    bad_frac = float(bad.mean())
    if bad_frac > bad_pixel_fraction_limit:
        parts = [f"{int(((flags & np.uint8(f)) != 0).sum())} {label}" for f, label in (
            (Flag.NOT_RECORDED, "not recorded"), (Flag.SATURATED, "saturated"),
            (Flag.NOISE_FLOOR, "below the noise floor"), (Flag.OUTSIDE, "outside the recorded "
                                                          "area"))]
        reasons.append(f"{100 * bad_frac:.1f}% of pixels unusable (limit "
                       f"{100 * bad_pixel_fraction_limit:g}%): " + ", ".join(parts))
    mism = float(((flags & np.uint8(Flag.TRACE_MISMATCH)) != 0).mean())
    if mism > trace_mismatch_fraction_limit:
        reasons.append(f"forward and backward traces disagree on {100 * mism:.1f}% of pixels "
                       f"(limit {100 * trace_mismatch_fraction_limit:g}%)")

    tip_rows: list[int] = []
    if np.isfinite(h).any():
        recorded = get_tip_change_rows(ds)  # found by flag_tip_changes before levelling
        tip_rows = recorded if recorded is not None else detect_tip_changes(
            ds, threshold_sigma=tip_change_threshold_sigma)
        if tip_rows:
            flags[tip_rows, :] |= np.uint8(Flag.TIP_CHANGE)
            reasons.append(f"tip change at line(s) {', '.join(map(str, tip_rows))}")
        if ds.attrs.get("step_levels_consistent") == 0:
            reasons.append("terrace height differences are not whole multiples of one step "
                           "(a tip change that was not detected, or steps of different kinds): "
                           "the step height is unreliable")
        params = areal_parameters(h)
        if params["Sq_m"] == 0:
            reasons.append("height is the same at every usable pixel (Sq = 0): no topography "
                           "recorded")
    else:
        params = dict.fromkeys(("Sq_m", "Sa_m", "Ssk", "Sku", "Sp_m", "Sv_m", "Sz_m"), math.nan)
        reasons.append("no usable pixel: every pixel is not recorded or flagged unusable")

    out = _with_flags(ds, flags)
    out.attrs.update(params)
    out.attrs["bad_pixel_fraction"] = bad_frac
    out.attrs["tip_change_rows"] = json.dumps(tip_rows)
    out.attrs["warnings"] = json.dumps(get_warnings(ds))
    for msg in reasons:
        add_warning(out, msg)
    out.attrs["status"] = "flagged" if reasons else "ok"
    return out
