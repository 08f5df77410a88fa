"""Removal of atomic-lattice Fourier peaks before registration (private).

A lattice makes every lattice translation a near-perfect match, and an under-sampled one moves
inconsistently between frames; the registration therefore matches the aperiodic content only.
Public API in :mod:`pipeline.stages.registration`.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import ndimage as ndi

from pipeline.stages.registration_core import frequencies

#: A cross-power bin this many times above its neighbourhood (geometric mean over
#: :data:`PERIODIC_BACKGROUND_BINS` bins) counts as a lattice (Bragg) peak.
PERIODIC_PEAK_RATIO = 50.0
PERIODIC_BACKGROUND_BINS = 9
#: More flagged bins than this fraction means a continuous spectrum, not a lattice.
PERIODIC_MAX_FRACTION = 0.02
#: Largest extent (bins) of one flagged spot for it to count as a lattice peak.
PERIODIC_MAX_SPOT_BINS = 5
#: A lattice peak also exceeds the highest bin on a ring 4-6 bins around it this many times.
PERIODIC_RING_RATIO = 10.0
_ring = [(dy, dx) for dy in range(-6, 7) for dx in range(-6, 7) if 16 <= dy * dy + dx * dx <= 36]
_RING_OFFSETS = (np.array([r[0] for r in _ring]), np.array([r[1] for r in _ring]))


@functools.lru_cache(maxsize=16)
def _outside_lowest(shape: tuple[int, int]) -> np.ndarray:
    """Half-spectrum bins above 6 cycles per frame (the lowest ones are no lattice)."""
    ny, nx = shape
    ky, kx, _ = frequencies(shape)
    out = np.hypot((ky / ny)[:, None], (kx / nx)[None, :]) > 6.0 / min(ny, nx)
    out.setflags(write=False)
    return out


def periodic_notch(spec_a: np.ndarray, spec_b: np.ndarray,
                   shape: tuple[int, int]) -> np.ndarray | None:
    """Keep-mask that removes isolated strong peaks (a lattice) from two half spectra.

    A bin of the cross-power magnitude ``|F|·|G|`` more than :data:`PERIODIC_PEAK_RATIO` times
    above the geometric mean of its neighbourhood, in a compact spot, counts as a Bragg peak;
    the spots and two bins around them (window leakage) are removed. ``None`` when there are
    none.
    """
    ny, nx = shape
    logm = np.log(np.abs(spec_a) * np.abs(spec_b) + 1e-300)
    # rows of the half spectrum are periodic, its columns are not (0 … Nyquist)
    background = ndi.uniform_filter(logm, size=PERIODIC_BACKGROUND_BINS,
                                    mode=("wrap", "reflect"))
    peaks = logm - background > math.log(PERIODIC_PEAK_RATIO)
    peaks &= _outside_lowest(shape)
    count = int(np.count_nonzero(peaks))
    if count == 0 or count > PERIODIC_MAX_FRACTION * peaks.size:
        return None
    # an isolated spot stands above everything on a ring around it; a streak (the Fourier
    # line of a straight step edge, dashed by window ripples) runs through its ring
    iy, ix = np.nonzero(peaks)
    ring_y, ring_x = _RING_OFFSETS
    ry = iy[:, None] + ring_y[None, :]
    rx = ix[:, None] + ring_x[None, :]
    # columns outside the half spectrum are the conjugates of (−ky, −kx) and (−ky, nx − kx)
    low, high = rx < 0, rx > logm.shape[1] - 1
    ry = np.where(low | high, -ry, ry) % ny
    rx = np.where(low, -rx, np.where(high, nx - rx, rx))
    ring_max = logm[ry, rx].max(axis=1)
    isolated = logm[iy, ix] - ring_max > math.log(PERIODIC_RING_RATIO)
    peaks[iy[~isolated], ix[~isolated]] = False
    if not peaks.any():
        return None
    # Bragg peaks are compact spots; streaks of straight steps and the edge of a band limit
    # are extended, and carry real (aperiodic) information: keep those
    labels, _ = ndi.label(peaks)
    for k, box in enumerate(ndi.find_objects(labels), start=1):
        if box is not None and max(sl.stop - sl.start for sl in box) > PERIODIC_MAX_SPOT_BINS:
            peaks[box] &= labels[box] != k
    if not peaks.any():
        return None
    return ~ndi.binary_dilation(peaks, iterations=2)
