"""The usable range of one approach curve (private: import from pipeline.stages.barrier).

The steps of :func:`pipeline.stages.barrier.fit_approach_curve` before the final fit: the finite
samples sorted by z; offset and noise floor from the retracted tail; saturation; candidates above
the floor; whether the current decays at all; the tunnelling block (a contact plateau at the
close end and a levelled-off far end trimmed); a first fit that gives the offset again; the final
range, chosen from the fitted line. A step that finds the curve unusable raises
:class:`_Rejection` with the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.errors import ProcessingError, ShapeError
from pipeline.stages.barrier_lines import _line_design, _robust_line
from pipeline.stages.barrier_noise import _tail_noise

__all__ = ["CONTACT_MARGIN", "FLAT_SLOPE_FRACTION", "SATURATION_MARGIN", "SLOPE_WINDOW"]

#: Samples per sliding window of the local-slope test (range selection, contact detection).
SLOPE_WINDOW = 7
#: A local slope flatter than this fraction of the curve's median slope is not tunnelling.
FLAT_SLOPE_FRACTION = 0.5
#: Samples whose fitted current exceeds this fraction of the preamplifier limit are left out,
#: so that noise clipped at the limit cannot bias the retained samples.
SATURATION_MARGIN = 0.8
#: Past a contact plateau the fit keeps currents below this fraction of the plateau level I_c,
#: where the series-contact correction I·I_c/(I_c − I) is insensitive to the error of I_c.
CONTACT_MARGIN = 0.05


class _Rejection(Exception):
    """Raised by a step that finds the curve unusable; carries the reason and what is known.

    :func:`pipeline.stages.barrier.fit_approach_curve` turns it into a rejected
    :class:`~pipeline.stages.barrier.CurveFit`.
    """

    def __init__(self, reason: str, **known: Any) -> None:
        super().__init__(reason)
        self.reason = reason
        self.known = known


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Start/stop (exclusive) indices of the runs of True in a 1-D mask."""
    padded = np.concatenate([[False], mask, [False]])
    edges = np.flatnonzero(np.diff(padded.astype(np.int8)))
    return list(zip(edges[::2].tolist(), edges[1::2].tolist(), strict=True))


def _local_slopes(z: np.ndarray, logy: np.ndarray, good: np.ndarray, w: int) -> np.ndarray:
    """Least-squares slope of ``logy`` against ``z`` in centred windows of ``w`` samples.

    NaN where the window leaves the array or contains a sample that is not ``good``.
    """
    n = z.size
    out = np.full(n, np.nan)
    if n < w:
        return out
    lz = np.where(good, logy, 0.0)
    zz = np.where(good, z, 0.0)

    def wsum(a: np.ndarray) -> np.ndarray:
        c = np.concatenate([[0.0], np.cumsum(a)])
        return c[w:] - c[:-w]

    s1 = float(w)
    sz, szz = wsum(zz), wsum(zz * zz)
    sy, szy = wsum(lz), wsum(zz * lz)
    nbad = wsum((~good).astype(float))
    den = s1 * szz - sz * sz
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (s1 * szy - sz * sy) / den
    slope[(nbad > 0) | ~(den > 0)] = np.nan
    half = w // 2
    out[half:half + slope.size] = slope
    return out


@dataclass(frozen=True)
class _Samples:
    """The finite samples of one curve, sorted by z."""

    order: np.ndarray  # their indices in the input
    z: np.ndarray  # tip displacement, m
    raw: np.ndarray  # current as recorded, A
    sign: float  # sign of the bias: sign * raw is the (positive) tunnelling signal


@dataclass(frozen=True)
class _Block:
    """The stretch of a curve that tunnels: between a contact plateau and a levelled-off end."""

    start: int  # first sample of the longest run of candidates (a contact plateau starts here)
    block_start: int  # first sample after the contact plateau (``start`` without one)
    block_stop: int  # one past the last steady sample when the far end levels off, else the run's
    contact_samples: int  # flattened samples between ``start`` and ``block_start``
    far_trimmed: bool  # whether the far end levels off
    mask: np.ndarray  # candidates inside [block_start, block_stop)


def _validated_arrays(z_m: np.ndarray, current_A: np.ndarray, *, bias_V: float,
                      min_points: int) -> tuple[np.ndarray, np.ndarray]:
    """The curve as float arrays; raises on a wrong shape, bias or ``min_points``."""
    z_in = np.asarray(z_m, dtype=float)
    i_in = np.asarray(current_A, dtype=float)
    if z_in.ndim != 1 or z_in.shape != i_in.shape:
        raise ShapeError(f"fit_approach_curve: z {z_in.shape} and current {i_in.shape} must be "
                         "1-D arrays of the same length")
    if not (math.isfinite(bias_V) and bias_V != 0):
        raise ProcessingError(f"fit_approach_curve: bias_V = {bias_V!r}; a tunnelling curve "
                              "needs a finite non-zero bias")
    if min_points < 4:
        raise ProcessingError(f"fit_approach_curve: min_points = {min_points}; at least 4")
    return z_in, i_in


def _sorted_samples(z_in: np.ndarray, i_in: np.ndarray, *, bias_V: float,
                    min_points: int) -> _Samples:
    """Drop non-finite samples and sort the rest by z (stable)."""
    finite = np.isfinite(z_in) & np.isfinite(i_in)
    if not finite.any():
        raise _Rejection("no finite samples")
    if finite.sum() < min_points:
        raise _Rejection("too few points")
    idx = np.flatnonzero(finite)
    idx = idx[np.argsort(z_in[idx], kind="stable")]
    return _Samples(order=idx, z=z_in[idx], raw=i_in[idx], sign=math.copysign(1.0, bias_V))


def _tail_offset_and_floor(y: np.ndarray, *, noise_floor_A: float | None,
                           min_points: int) -> tuple[float, float]:
    """(offset, floor σ) from the retracted tail; rejects a current of the wrong sign.

    A flat tail far above its noise is not an offset but a current that never decayed: the
    offset is then 0.
    """
    flat, tail_median, tail_sigma = _tail_noise(y)
    offset = tail_median if flat and abs(tail_median) <= 10.0 * tail_sigma else 0.0
    sigma_floor = float(noise_floor_A) if noise_floor_A is not None else tail_sigma
    strong = np.abs(y) > 5.0 * sigma_floor
    if strong.sum() >= min_points and np.mean(y[strong] < 0) > 0.9:
        raise _Rejection("current sign contradicts the bias", noise_floor_A=sigma_floor)
    return offset, sigma_floor


def _saturation(raw: np.ndarray, current_limit_A: float | None) -> tuple[float, np.ndarray]:
    """(limit, saturated mask): the given limit, or the curve's largest magnitude repeated ≥ 3×."""
    mag = np.abs(raw)
    if current_limit_A is not None and current_limit_A > 0:
        limit = float(current_limit_A)
        return limit, mag >= 0.999 * limit
    top = float(mag.max())
    at_top = mag >= top * (1.0 - 1e-9)
    if at_top.sum() >= 3:
        return top, at_top
    return math.inf, np.zeros_like(at_top)


def _candidates(y: np.ndarray, saturated: np.ndarray, *, threshold: float, min_points: int,
                known: dict[str, Any]) -> np.ndarray:
    """Samples above the floor threshold and below saturation."""
    above = (y > threshold) & (y > 0)
    if (above & ~saturated).sum() < min_points:
        reason = "below noise floor" if (~saturated).sum() >= min_points else "saturated"
        raise _Rejection(reason, **known)
    return above & ~saturated


def _check_decay(z: np.ndarray, logy: np.ndarray, good: np.ndarray,
                 known: dict[str, Any]) -> None:
    """Reject a curve whose candidates do not decay (plain line, white-noise error, 5 σ)."""
    zg, lg = z[good], logy[good]
    xg = _line_design(zg)
    coef = np.linalg.lstsq(xg, lg, rcond=None)[0]
    dof = max(zg.size - 2, 1)
    se_slope = math.sqrt(float(np.sum((lg - xg @ coef) ** 2)) / dof
                         / max(float(np.sum((zg - zg.mean()) ** 2)), 1e-300))
    if coef[1] > 5.0 * se_slope:
        raise _Rejection("current increases on retract", **known)
    if coef[1] > -5.0 * se_slope:
        raise _Rejection("current does not decay on retract", **known)


def _tunnelling_block(z: np.ndarray, logy: np.ndarray, good: np.ndarray,
                      known: dict[str, Any]) -> _Block:
    """The longest run of candidates, trimmed of a levelled-off close end and far end.

    Gaps of up to two samples are bridged, so that a noise dip at the far end does not cut the
    run; local slopes then find a contact plateau at the close end and a levelled-off far end.
    Anomalies inside the span stay: the tip-change test judges them.
    """
    bridged = good.copy()
    for lo, hi in _runs(~good):
        if hi - lo <= 2 and lo > 0 and hi < good.size:
            bridged[lo:hi] = True
    start, stop = max(_runs(bridged), key=lambda r: (r[1] - r[0], -r[0]))
    w = min(SLOPE_WINDOW, max(3, (stop - start) // 3))
    slopes = _local_slopes(z, logy, good, w)
    valid = np.isfinite(slopes)
    valid[:start] = False
    valid[stop:] = False
    if valid.sum() == 0:
        raise _Rejection("too few points", **known)
    med = float(np.median(slopes[valid]))
    if med >= 0:
        raise _Rejection("current increases on retract", **known)
    flattened = valid & (slopes > FLAT_SLOPE_FRACTION * med)
    # steady = inside a run of at least one window of tunnelling-like slopes (one lucky window
    # inside a noisy plateau does not count)
    steady_runs = [r for r in _runs(valid & ~flattened) if r[1] - r[0] >= w]
    if not steady_runs:
        raise _Rejection("bad fit", **known)
    first_steady, last_steady = steady_runs[0][0], steady_runs[-1][1] - 1
    contact_samples = int(flattened[start:first_steady].sum())
    far_trimmed = bool(flattened[last_steady + 1:stop].any())
    block_start = first_steady if contact_samples else start
    block_stop = last_steady + 1 if far_trimmed else stop
    mask = np.zeros(z.size, bool)
    mask[block_start:block_stop] = True
    mask &= good
    return _Block(start=start, block_start=block_start, block_stop=block_stop,
                  contact_samples=contact_samples, far_trimmed=far_trimmed, mask=mask)


def _contact_current(y: np.ndarray, block: _Block) -> float:
    """Plateau current I_c of a contact (median of its first five samples); inf without one."""
    if not block.contact_samples:
        return math.inf
    return float(np.median(y[block.start:block.start + 5]))


def _junction_log(y: np.ndarray, contact_current: float) -> np.ndarray:
    """ln of the junction current, undoing a series contact of plateau current I_c.

    Past a contact the junction is in series with the contact conductance, I = I_t·I_c/(I_t +
    I_c), so I_t = I·I_c/(I_c − I). Non-positive samples give ln 1 = 0 (they are never fitted).
    """
    y = np.where(y > 0, y, 1.0)
    if math.isfinite(contact_current):
        y = y * contact_current / np.maximum(contact_current - y, 1e-300)
    return np.log(y)


def _corrected_log(y: np.ndarray, fitted: np.ndarray, sigma_floor: float,
                   contact_current: float) -> np.ndarray:
    """ln of the junction current plus the second-order bias of ln(I + noise), +σ²/(2I²)."""
    return _junction_log(y, contact_current) + 0.5 * (sigma_floor / fitted) ** 2


def _first_fit_and_offset(samples: _Samples, block: np.ndarray, logy: np.ndarray,
                          sigma_floor: float) -> tuple[np.ndarray, float, float]:
    """(fitted |I| at every sample, offset, its standard error) from a first robust fit.

    The offset is re-estimated from every sample whose fitted signal is below the floor σ, with
    that signal taken out (a decaying signal left in the tail would pass for an offset and
    steepen the far end); fewer than ten such samples give no offset.
    """
    first = _robust_line(samples.z[block], logy[block], np.ones(int(block.sum())))
    fitted = np.exp(first.a + first.b * samples.z)
    quiet = fitted < max(sigma_floor, 1e-300)
    if quiet.sum() < 10:
        return fitted, 0.0, 0.0
    offset = float(np.median(samples.sign * samples.raw[quiet] - fitted[quiet]))
    sigma_offset = math.sqrt(math.pi / 2.0) * sigma_floor / math.sqrt(int(quiet.sum()))
    return fitted, offset, sigma_offset


def _final_range(fitted: np.ndarray, y: np.ndarray, saturated: np.ndarray, block: _Block, *,
                 threshold: float, limit: float, contact_limit: float) -> np.ndarray:
    """The fit range (sorted order), chosen from the fitted line, not from the noisy samples.

    Fitted current above the floor threshold, below ``SATURATION_MARGIN`` of the limit and the
    contact limit; not before the tunnelling block, never past a levelled-off far end.
    """
    index = np.arange(fitted.size)
    in_model = ((fitted > threshold) & (fitted < SATURATION_MARGIN * limit)
                & (fitted < contact_limit))
    usable = in_model & (index >= block.block_start) & ~saturated & (y > 0)
    if block.far_trimmed:
        usable &= index < block.block_stop
    return usable
