"""Line summaries for the tip-change detector: fast-axis segments, blocks of lines, line levels."""

from __future__ import annotations

import itertools

import numpy as np

from pipeline.stages.stats import nanmedian

#: Lines per block on each side of a candidate tip change; a change must persist at least
#: this long (a one- or two-line glitch is outvoted by the block medians).
_BLOCK_LINES = 8
#: Segments of the fast axis; a tip change moves (nearly) every segment, a step only some.
_MAX_SEGMENTS = 4
#: Fewest columns per segment.
_MIN_SEGMENT_PX = 8


def _segments(n: int) -> list[tuple[int, int]]:
    nseg = int(np.clip(n // _MIN_SEGMENT_PX, 1, _MAX_SEGMENTS))
    edges = np.linspace(0, n, nseg + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in itertools.pairwise(edges)]


def _segment_medians(a: np.ndarray, n: int) -> np.ndarray:
    """Median over the columns of each fast-axis segment: shape (rows, segments)."""
    return np.column_stack([nanmedian(a[:, lo:hi], axis=1) for lo, hi in _segments(n)])


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

    The same numbers as :func:`nanmedian` over the sliding windows, computed with a sorting
    network on whole shifted copies of the map (elementwise min/max, no per-window sort): NaN
    become +inf, so they sort last, and each pixel takes the middle of its finite values.
    """
    w = _BLOCK_LINES
    n_out = a.shape[0] - w + 1
    if n_out < 1:
        win = np.lib.stride_tricks.sliding_window_view(a, w, axis=0)
        return nanmedian(win, axis=-1)
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


def _detrend(a: np.ndarray) -> np.ndarray:
    """Each column minus its median over rows (tilt, steady drift)."""
    return a - nanmedian(a, axis=0)[None, :]


def _levels(pair: np.ndarray) -> np.ndarray:
    """Level of every line (rows, ...) from the line-to-line changes (rows − 1, ...): their
    cumulative sum from 0 (a missing change counts as none). A line offset stays a one-line
    excursion there, and a step edge crossing a segment moves only the few columns it crosses
    at each line, not their median."""
    steps = np.where(np.isfinite(pair), pair, 0.0)
    return np.concatenate([np.zeros((1, *steps.shape[1:])), np.cumsum(steps, axis=0)])
