"""Tip changes: abrupt, lasting changes of the tip found in one frame (height jump, resolution).

:func:`detect_tip_changes` returns the first line recorded with the changed tip for each
change; :func:`pipeline.stages.quality.flag_tip_changes` flags those lines and line levelling
then removes the tip's own height jump.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import xarray as xr

from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS
from pipeline.stages.stats import changepoint, nanmedian
from pipeline.stages.stats import median as _median
from pipeline.stages.tip_blocks import (
    _BLOCK_LINES,
    _MIN_SEGMENT_PX,
    _block_medians,
    _block_trimmed_means,
    _detrend,
    _levels,
    _segment_medians,
)

__all__ = ["detect_tip_changes", "valid_height"]

#: Lines per block of the long height test: the median level of 32 lines carries half the
#: line-offset noise of 8 (it shrinks as 1/√lines), so jumps half as large stand out as far.
_LONG_BLOCK_LINES = 32
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


def valid_height(ds: xr.Dataset) -> np.ndarray:
    """Height (float64) with NaN on non-finite and BAD_PIXELS-flagged pixels."""
    if "height" not in ds.data_vars:
        raise ProcessingError(f"frame {ds.attrs.get('frame_id', '<frame>')}: no 'height' "
                              "variable (run reconstruct_height first)")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    if "flags" in ds.data_vars:
        bad = (np.asarray(ds["flags"].values).astype(np.uint8) & np.uint8(BAD_PIXELS)) != 0
        h = np.where(bad, np.nan, h)
    return np.where(np.isfinite(h), h, np.nan)


def _changes(seg_change: np.ndarray, seg_pair: np.ndarray, offset: int, threshold_sigma: float,
             min_spread: float, max_transition_spread: float, block: int = _BLOCK_LINES,
             seg_level: np.ndarray | None = None, long_blocks: bool = False
             ) -> list[tuple[int, int, float, float]]:
    """Boundaries where the whole line changed at once, far beyond the usual spread.

    ``seg_change[i, s]`` is the change of segment ``s`` from the block before boundary ``i`` to
    the block after it; boundary ``i`` lies after row ``i + offset``. ``seg_pair[k, s]`` is the
    change of segment ``s`` from row ``k`` to row ``k + 1``. Returns ``(first, last, sign,
    strength)``: the rows after which the moved segments changed, the direction, and the size
    of the change in units of the robust spread. ``block`` is the number of lines per block
    (the plateau of a change is looked for that far around the candidates).

    The moved segments must agree on where they changed: by the middle of each one's plateau
    of block changes, or else by where each one jumped. With ``seg_level[k, s]`` (rows ×
    segments, the level of each line per segment) that is :func:`changepoint` on its levels;
    without, the line pair of its largest change, which over a run of candidates longer than
    a line or two may be that of the largest line offset, the same in every segment, so that
    a shallow step edge would pass. With ``long_blocks`` the spread leaves out the boundaries
    within a block of the largest change (whose plateau would inflate it when blocks are long
    against the frame).
    """
    seg = seg_change - nanmedian(seg_change, axis=0)[None, :]
    line = nanmedian(seg, axis=1)
    finite = np.isfinite(line)
    if finite.sum() < 3:
        return []
    dev = np.where(finite, line - np.median(line[finite]), 0.0)
    quiet = finite.copy()
    if long_blocks:  # one change moves 2 × block boundaries, not its own
        peak = int(np.argmax(np.abs(dev)))
        quiet[max(peak - block, 0):peak + block + 1] = False
        if quiet.sum() < 3:
            quiet = finite
    spread = max(_MAD_TO_SIGMA * float(np.median(np.abs(dev[quiet]))), min_spread)
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
        # where it jumped; either must agree between the segments
        lo, hi = max(i - block, 0), min(j + block, seg.shape[0])
        above = like_line(seg[lo:hi])[:, moved]
        idx = np.arange(lo, hi)[:, None]
        count = above.sum(axis=0)
        centre = ((above * idx).sum(axis=0) / np.maximum(count, 1))[count > 0] + offset
        if centre.size and np.ptp(centre) <= max_transition_spread:
            out.append((int(np.floor(centre.min())), int(np.ceil(centre.max())), sign, strength))
            continue
        if seg_level is not None:
            wlo = max(i + offset - block, 0)
            whi = min(j - 1 + offset + block, seg_level.shape[0] - 1)
            jump = np.array([changepoint(seg_level[:, k], wlo, whi)
                             for k in np.flatnonzero(moved)])
        else:
            rlo, rhi = max(i + offset - 1, 0), min(j - 1 + offset + 1, seg_pair.shape[0] - 1)
            pairs = sign * seg_pair[rlo:rhi + 1][:, moved]
            jump = rlo + np.argmax(np.where(np.isfinite(pairs), pairs, -np.inf), axis=0)
        if jump.size and np.ptp(jump) <= 1:
            out.append((int(jump.min()), int(jump.max()), sign, strength))
    return out


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


def _long_height_changes(seg_pair: np.ndarray, pair: np.ndarray, seg_lev: np.ndarray,
                         threshold_sigma: float, slow_direction: str
                         ) -> list[tuple[float, int]]:
    """Height jumps between the median line levels of ``_LONG_BLOCK_LINES`` lines.

    ``seg_pair`` are the detrended line-to-line changes per segment, ``pair`` their median
    over segments and ``seg_lev`` the per-segment line levels (:func:`_levels`). Returns
    ``(strength, first new line)``; a rise and fall within one long block is a transient band
    (a burst of offsets, a bent tip that recovers), not a lasting change.
    """
    wl = _LONG_BLOCK_LINES
    ny = pair.size + 1
    if ny < 2 * wl + 2:
        return []
    level = _levels(pair)
    ks = np.arange(wl - 1, ny - wl)  # boundary after row k: lines k-wl+1..k vs k+1..k+wl
    win = np.lib.stride_tricks.sliding_window_view(seg_lev, wl, axis=0)
    change = np.median(win[ks + 1], axis=-1) - np.median(win[ks - wl + 1], axis=-1)
    events = []
    for first, last, sign, strength in _changes(change, seg_pair, wl - 1, threshold_sigma,
                                                _MIN_HEIGHT_SPREAD_M, _MAX_TRANSITION_SPREAD,
                                                block=wl, seg_level=seg_lev,
                                                long_blocks=True):
        k = changepoint(level, max(first - wl, 0), min(last + wl, ny - 1),
                         candidates=(first, last))
        events.append((strength, k if slow_direction == "decreasing" else k + 1, sign))
    return [(strength, row) for strength, row, sign in events
            if not any(s2 == -sign and abs(r2 - row) < wl for _, r2, s2 in events)]


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
      4 segments, median over the segment's columns), then over segments. Line offsets
      (noise of the whole line) set the smallest jump this finds, so the same test is repeated
      on the median levels of 32 lines on either side (:func:`_long_height_changes`: line
      levels from the cumulative line-to-line changes of each segment, which step edges and
      adsorbates hardly move). There the spread leaves out the change's own plateau, each
      moved segment must jump at the same line within one line (a least-squares jump on a
      straight line, :func:`changepoint`), the line is placed the same way on the whole
      line's levels, and a rise and fall within 32 lines is a transient band; changes within
      32 lines of the first or last row are left to the 8-line blocks.
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
    those segments changed at the same line, within 1.5 lines by the middle of their plateaus
    of block changes (3 for the roughness, whose block means change gradually), or else
    within one line by each segment's own best jump (:func:`changepoint` on its line levels;
    for the roughness, its largest line-to-line change) — a mid-line change splits them over
    two lines, while a shallow step crosses the segments at lines that drift along the fast
    axis — and (3) it
    persists (block medians of 8 lines outvote a glitch of one or two lines). The frame's tilt
    and a steady drift cancel (the median change over all boundaries is removed per segment).
    Changes within 8 lines of the first or last row cannot be tested for persistence and are
    not reported; two changes closer than 8 lines count as one. A step within about 1° of
    the fast axis across the whole frame is indistinguishable from a tip change in a single
    frame. Sensitivity (simulated 128×128 frames with 20 pm atomic corrugation and 2 pm
    noise): a 5 pm whole-line jump, a threefold change of the atomic contrast. With 20 pm line
    offsets (simulated 256² frames with two step edges, adsorbates and drift, 30 per jump),
    jumps of 60 / 80 / 100 pm are found in 17 / 28 / 30 frames (8-line blocks alone: 0 / 10 /
    19); none of 960 such frames without a tip change (step edges 2–88° from the fast axis,
    line offsets 0–40 pm) reports one (``benchmarks/sweep_tip_changes.py``).

    References
    ----------
    P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273 (1993),
    doi:10.1080/01621459.1993.10476408 (median absolute deviation as a robust scale).
    """
    if not (math.isfinite(threshold_sigma) and threshold_sigma > 0):
        raise ProcessingError(f"detect_tip_changes: threshold_sigma = {threshold_sigma!r} must "
                              "be > 0")
    h = valid_height(ds)
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
    pair = nanmedian(seg_pair, axis=1)
    seg_lev = _levels(seg_pair)
    for first, last, sign, strength in _changes(seg_h, seg_pair, w - 1, threshold_sigma,
                                                _MIN_HEIGHT_SPREAD_M, _MAX_TRANSITION_SPREAD,
                                                seg_level=seg_lev):
        found.append((strength, _first_new_line(pair, first, last, sign, slow)))
    # the same over long blocks of line levels, for jumps that line offsets hide from the
    # short blocks; a change the short blocks found is not counted twice
    for strength, row in _long_height_changes(seg_pair, pair, seg_lev, threshold_sigma, slow):
        if all(abs(row - r) >= _LONG_BLOCK_LINES for _, r in found):
            found.append((strength, row))

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
        rpair = nanmedian(seg_rpair, axis=1)
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
