"""Two consecutive constant-current frames of one surface under drift, with the true shift."""

from __future__ import annotations

from datetime import datetime, timedelta

import numpy as np

from pipeline.simulate.frames import simulate_constant_current_frame
from pipeline.simulate.surface import Surface

__all__ = ["simulate_frame_pair"]


def simulate_frame_pair(
    surface: Surface,
    rng: np.random.Generator,
    *,
    drift_velocity_m_per_s: tuple[float, float],
    z_noise_m: float,
    n: int = 256,
    size_m: float = 30e-9,
    line_time_s: float = 0.04,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two consecutive ``n``² constant-current frames (forward slow direction) of ``surface``.

    Parameters
    ----------
    surface : Surface
        The simulated sample.
    rng : numpy.random.Generator
        Used for both frames and their white z noise, in that order.
    drift_velocity_m_per_s : tuple of float
        Constant drift ``(vx, vy)``.
    z_noise_m : float
        Standard deviation of white noise added to each z map.
    n, size_m, line_time_s
        Pixels per side, frame size and line time; the second frame starts 5 % of a frame
        time after the first ends.

    Returns
    -------
    tuple
        Both z maps and the true feature displacement ``(dy, dx)`` in pixels: features move
        by ``−v·Δt`` (DESIGN.md §4); the drift during the scan changes it by < 0.2 %.
    """
    t0 = datetime(2026, 3, 14, 22)
    gap_s = n * line_time_s * 1.05
    z = []
    for k in range(2):
        raw, _ = simulate_constant_current_frame(
            surface, rng=rng, phi_eV=4.6, setpoint_A=1e-10, bias_V=0.5, nx=n, ny=n,
            size_x_m=size_m, size_y_m=size_m, line_time_s=line_time_s,
            start_time=t0 + timedelta(seconds=k * gap_s), run_t0=t0,
            drift_velocity_m_per_s=drift_velocity_m_per_s, frame_id=f"f{k}")
        z.append(raw["z"].values + rng.normal(0, z_noise_m, (n, n)))
    vx, vy = drift_velocity_m_per_s
    truth = -np.array([vy, vx]) * gap_s / (size_m / n)
    return z[0], z[1], truth
