"""The run's drift model ``d(t)``: position, velocity, their uncertainties, rate units (private).

Public API in :mod:`pipeline.stages.drift`. ``d(t)`` is the displacement of the tip relative to
the sample since the run start (DESIGN.md §4); :mod:`pipeline.stages.drift_fit` fits it to
frame-to-frame displacements.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["DriftModel", "m_per_s_to_nm_per_min", "nm_per_min_to_m_per_s"]

#: 1 m/s expressed in nm/min.
NM_PER_MIN_PER_M_PER_S = 1e9 * 60.0


def m_per_s_to_nm_per_min(value: Any) -> Any:
    """Convert a rate from m/s to nm/min (1 m/s = 6·10¹⁰ nm/min)."""
    return np.asarray(value, dtype=float) * NM_PER_MIN_PER_M_PER_S if np.ndim(value) else \
        float(value) * NM_PER_MIN_PER_M_PER_S


def nm_per_min_to_m_per_s(value: Any) -> Any:
    """Convert a rate from nm/min to m/s."""
    return np.asarray(value, dtype=float) / NM_PER_MIN_PER_M_PER_S if np.ndim(value) else \
        float(value) / NM_PER_MIN_PER_M_PER_S


@dataclass(frozen=True, eq=False)
class DriftModel:
    """Tip-relative-to-sample drift ``d(t) = Σⱼ cⱼ·(t/T)ʲ`` (j = 1 … degree), ``d(0) = 0``.

    ``t`` is in seconds since the run start. ``kind`` is ``"constant"`` (degree 1: a constant
    velocity), ``"smooth"`` (a low-order polynomial of position against time) or ``"none"``
    (nothing could be measured: zero drift, correction should be skipped).

    Attributes
    ----------
    coef_x, coef_y : ndarray
        Polynomial coefficients (m) of the x and y drift.
    cov_x, cov_y : ndarray
        Their covariance matrices (m²), already scaled by the Birge ratio where the scatter
        exceeds the stated uncertainties.
    time_scale_s : float
        ``T``, for conditioning.
    t_first_s, t_last_s : float
        Span of the frame times that the model was fitted to.
    used, reasons : tuple
        Per frame pair: whether it entered the fit, and why not.
    warnings : tuple of str
        Human-readable notes (excluded pairs, reduced degree, nothing usable).
    """

    kind: str
    coef_x: np.ndarray
    coef_y: np.ndarray
    cov_x: np.ndarray
    cov_y: np.ndarray
    time_scale_s: float = 3600.0
    t_first_s: float = 0.0
    t_last_s: float = 0.0
    used: tuple[bool, ...] = ()
    reasons: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    reduced_chi2: tuple[float, float] = (math.nan, math.nan)
    labels: tuple[str, ...] = field(default=())

    def __repr__(self) -> str:  # compact: it goes into processing histories
        if not self.is_usable:
            return "DriftModel(kind='none')"
        vx, vy = self.velocity_nm_per_min
        return (f"DriftModel(kind={self.kind!r}, degree={self.degree}, "
                f"v=({vx:+.4g}, {vy:+.4g}) nm/min, pairs_used={self.n_used})")

    @classmethod
    def constant(cls, vx_m_per_s: float, vy_m_per_s: float, *,
                 uncertainty_x_m_per_s: float = 0.0,
                 uncertainty_y_m_per_s: float = 0.0) -> DriftModel:
        """A constant-velocity model with given values (for simulation and tests)."""
        t = 3600.0
        return cls("constant", np.array([vx_m_per_s * t]), np.array([vy_m_per_s * t]),
                   np.array([[(uncertainty_x_m_per_s * t) ** 2]]),
                   np.array([[(uncertainty_y_m_per_s * t) ** 2]]), time_scale_s=t)

    @property
    def degree(self) -> int:
        return len(self.coef_x)

    @property
    def is_usable(self) -> bool:
        """False when no frame pair could be used (``kind == "none"``)."""
        return self.kind != "none"

    @property
    def n_used(self) -> int:
        return int(sum(self.used))

    # basis and its derivative, t in s
    def _basis(self, t: np.ndarray) -> np.ndarray:
        tau = np.asarray(t, dtype=float)[..., None] / self.time_scale_s
        return tau ** np.arange(1, self.degree + 1)

    def _dbasis(self, t: np.ndarray) -> np.ndarray:
        tau = np.asarray(t, dtype=float)[..., None] / self.time_scale_s
        j = np.arange(1, self.degree + 1)
        return j * tau ** (j - 1) / self.time_scale_s

    def position_m(self, t: Any) -> tuple[np.ndarray, np.ndarray]:
        """Drift displacement ``d(t) = (x, y)`` in m of the tip relative to the sample."""
        if self.degree == 1:  # constant velocity: the same numbers, without the basis matrix
            tau = np.asarray(t, dtype=float) / self.time_scale_s
            return tau * float(self.coef_x[0]), tau * float(self.coef_y[0])
        b = self._basis(t)
        return b @ self.coef_x, b @ self.coef_y

    def velocity_m_per_s(self, t: Any) -> tuple[np.ndarray, np.ndarray]:
        """Drift velocity ``v(t) = d'(t)`` (m/s)."""
        b = self._dbasis(t)
        return b @ self.coef_x, b @ self.coef_y

    def position_uncertainty_m(self, t: Any, t_ref: Any = 0.0) -> tuple[np.ndarray, np.ndarray]:
        """Standard uncertainty of ``d(t) − d(t_ref)`` (m), from the coefficient covariance."""
        b = self._basis(t) - self._basis(t_ref)
        return (np.sqrt(np.einsum("...i,ij,...j->...", b, self.cov_x, b)),
                np.sqrt(np.einsum("...i,ij,...j->...", b, self.cov_y, b)))

    def _mean_velocity_functional(self) -> np.ndarray:
        if self.kind == "constant" or self.t_last_s <= self.t_first_s:
            return self._dbasis(0.5 * (self.t_first_s + self.t_last_s))
        return (self._basis(self.t_last_s) - self._basis(self.t_first_s)) / (
            self.t_last_s - self.t_first_s)

    @property
    def velocity_x_m_per_s(self) -> float:
        """Run-mean drift velocity (x): the constant velocity, or the mean over the fitted span
        (NaN when nothing was measured: the zero coefficients of that model are no finding)."""
        if not self.is_usable:
            return math.nan
        return float(self._mean_velocity_functional() @ self.coef_x)

    @property
    def velocity_y_m_per_s(self) -> float:
        """Run-mean drift velocity (y); NaN when nothing was measured."""
        if not self.is_usable:
            return math.nan
        return float(self._mean_velocity_functional() @ self.coef_y)

    @property
    def velocity_uncertainty_x_m_per_s(self) -> float:
        g = self._mean_velocity_functional()
        return float(math.sqrt(max(g @ self.cov_x @ g, 0.0)))

    @property
    def velocity_uncertainty_y_m_per_s(self) -> float:
        g = self._mean_velocity_functional()
        return float(math.sqrt(max(g @ self.cov_y @ g, 0.0)))

    @property
    def velocity_nm_per_min(self) -> tuple[float, float]:
        """Run-mean drift velocity ``(vx, vy)`` in nm/min."""
        return (m_per_s_to_nm_per_min(self.velocity_x_m_per_s),
                m_per_s_to_nm_per_min(self.velocity_y_m_per_s))
