"""One trace to height: its pixels checked (unrecorded, saturated, noise floor) and converted."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline import physics
from pipeline.model import Flag
from pipeline.stages.height.noise import NoiseEstimate, estimate_white_noise

#: Default noise floor in multiples of the additive current noise: below it the relative
#: current uncertainty exceeds 1/3 (common practice).
_NOISE_FLOOR_SIGMA = 3.0


#: A current at or above this fraction of ``current_limit_A`` is saturated.
_SATURATION_FRACTION = 0.999


@dataclass
class _Trace:
    height: np.ndarray  # m, NaN where the pixel is bad
    sigma: np.ndarray  # noise σ of height, m
    phi_part: np.ndarray  # the part of height that scales as 1/√φ (for the φ uncertainty)
    flags: np.ndarray  # uint8, bad bits only


@dataclass(frozen=True)
class _CurrentCheck:
    signed: np.ndarray  # current × polarity (positive when physical)
    flags: np.ndarray
    noise: NoiseEstimate
    floor_A: float
    n_saturated: int
    n_floor: int


def _saturated(signed: np.ndarray, finite: np.ndarray, limit_A: float | None) -> np.ndarray:
    """Pixels at the preamplifier limit, or on a clipped plateau at the maximum."""
    if limit_A is not None and limit_A > 0:
        return finite & (np.abs(np.where(finite, signed, 0.0)) >= _SATURATION_FRACTION * limit_A)
    vals = signed[finite]
    none = np.zeros(signed.shape, dtype=bool)
    if vals.size < 3:
        return none
    top = vals.max()
    n_top = int((vals == top).sum())
    below = vals[vals < top]
    if n_top < 3 or below.size == 0:
        return none
    n_next = int((below == below.max()).sum())
    return finite & (np.where(finite, signed, -np.inf) >= top) if n_top > n_next else none


def _shared(noise: NoiseEstimate | None, level: np.ndarray | None,
            shape: tuple[int, ...]) -> NoiseEstimate | None:
    """The noise model of the other trace evaluated at this trace's levels (None if that
    model is unusable). Same model, same pixel handling as :func:`_fit_noise`."""
    if noise is None or not math.isfinite(noise.constant):
        return None
    if level is None or noise.relative == 0:
        return NoiseEstimate(np.full(shape, noise.constant), noise.constant, noise.relative)
    lev = np.where(np.isfinite(level), level, 0.0)
    return NoiseEstimate(np.sqrt(noise.constant**2 + (noise.relative * lev) ** 2),
                         noise.constant, noise.relative)


def _check_current(current: np.ndarray, *, polarity: float, limit_A: float | None,
                   noise_floor_A: float | None, current_noise_A: float | None,
                   shared_noise: NoiseEstimate | None = None) -> _CurrentCheck:
    signed = np.asarray(current, dtype=np.float64) * polarity
    finite = np.isfinite(signed)
    flags = np.where(finite, 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    sat = _saturated(signed, finite, limit_A)
    flags[sat] |= np.uint8(Flag.SATURATED)
    usable = finite & ~sat
    shared = None if current_noise_A is not None else _shared(shared_noise, np.abs(signed),
                                                               signed.shape)
    if shared is not None:
        noise = shared
    elif current_noise_A is None:
        noise = estimate_white_noise(signed, valid=usable, level=np.abs(signed))
    else:
        noise = NoiseEstimate(np.full(signed.shape, float(current_noise_A)),
                              float(current_noise_A), 0.0)
    if noise_floor_A is not None:
        floor = float(noise_floor_A)
    else:
        floor = _NOISE_FLOOR_SIGMA * noise.constant if math.isfinite(noise.constant) else 0.0
    low = usable & (np.where(usable, signed, 0.0) <= floor)
    flags[low] |= np.uint8(Flag.NOISE_FLOOR)
    return _CurrentCheck(signed, flags, noise, floor, int(sat.sum()), int(low.sum()))


def _constant_height_trace(chk: _CurrentCheck, *, reference_A: float, phi_eV: float,
                           two_kappa: float) -> _Trace:
    good = chk.flags == 0
    s = np.where(good, chk.signed, reference_A)
    h = np.where(good, physics.height_from_current(s, reference_A, phi_eV), np.nan)
    sigma = np.where(good, chk.noise.sigma / (two_kappa * s), np.nan)
    return _Trace(h, sigma, h, chk.flags)


def _constant_current_trace(z: np.ndarray, chk: _CurrentCheck | None, *, setpoint_A: float,
                            phi_eV: float, shared_noise: NoiseEstimate | None = None
                            ) -> tuple[_Trace, NoiseEstimate]:
    zz = np.asarray(z, dtype=np.float64)
    flags = np.where(np.isfinite(zz), 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    if chk is None:
        err = np.zeros_like(zz)
    else:
        flags |= chk.flags
        good_i = chk.flags == 0
        s = np.where(good_i, chk.signed, setpoint_A)
        err = physics.height_from_current(s, setpoint_A, phi_eV)
    good = flags == 0
    h = np.where(good, zz + err, np.nan)
    noise = _shared(shared_noise, None, h.shape) or estimate_white_noise(h, valid=good)
    sigma = np.where(good, noise.sigma, np.nan)
    return _Trace(h, sigma, np.where(good, err, np.nan), flags), noise
