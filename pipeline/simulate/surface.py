"""An analytic model surface: terraced fcc(111)-like crystal with atoms, adsorbates and tilt.

The surface is a pure function of the lateral position, so a simulated scan can sample it at the
exact (drifted) position of every pixel. All lengths are in metres.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from pipeline.errors import ConfigError

__all__ = [
    "AU_LATTICE_CONSTANT_M",
    "Adsorbate",
    "Step",
    "Surface",
    "random_surface",
]

#: Cubic lattice constant of gold at room temperature, 4.078 Å (from memory; ``ase.data``'s
#: reference states list 4.08 Å). Any fcc metal works: pass its own value.
AU_LATTICE_CONSTANT_M = 4.078e-10

#: Adsorbate bumps are cut off at this many widths (there exp(−32) ≈ 1e-14 of their height), so
#: far-away adsorbates cost nothing and the height stays the same function for any query.
_ADSORBATE_CUTOFF_SIGMA = 8.0


@dataclass(frozen=True)
class Step:
    """One step edge: a straight or gently bent line where the surface changes level.

    The edge is the zero line of the signed distance
    ``s(r) = n·r − offset_m − ½·curvature_per_m·(t·r)²``, with ``n`` the unit normal at
    ``angle_deg`` from the x axis and ``t`` the tangent (``n`` turned by +90°). Crossing the edge
    towards +``n`` changes the terrace level by ``levels`` monatomic steps (−1: one step down).

    Parameters
    ----------
    offset_m : float
        Distance of the edge from the origin along ``n``.
    angle_deg : float
        Direction of the normal ``n`` (degrees, counter-clockwise from +x).
    curvature_per_m : float
        Curvature of the (parabolic) edge, 1/m; 0 gives a straight line. Keep
        ``|curvature| × extent ≪ 1`` so that neighbouring edges never cross.
    levels : int
        Level change across the edge, in monatomic steps (non-zero).
    """

    offset_m: float
    angle_deg: float = 0.0
    curvature_per_m: float = 0.0
    levels: int = -1

    def signed_distance(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Signed distance-like coordinate ``s`` (m), positive on the +normal side."""
        th = math.radians(self.angle_deg)
        c, s = math.cos(th), math.sin(th)
        along = -x * s + y * c
        return x * c + y * s - self.offset_m - 0.5 * self.curvature_per_m * along**2


@dataclass(frozen=True)
class Adsorbate:
    """A Gaussian bump ``height_m · exp(−|r − r₀|² / 2 sigma_m²)`` (an adsorbed molecule/atom),
    cut off beyond 8 ``sigma_m``."""

    x_m: float
    y_m: float
    height_m: float
    sigma_m: float


def _as_tuple(value: Sequence) -> tuple:  # type: ignore[type-arg]
    return tuple(value)


@dataclass(frozen=True)
class Surface:
    """Analytic terraced fcc(111)-like surface, evaluable at any lateral position.

    ``height(x, y) = offset_m + slope_x·x + slope_y·y + Σ_steps levels·step_height·H_w(s)
    + corrugation + Σ_adsorbates gauss``, with ``H_w(s) = ½(1 + tanh(s / step_width_m))`` a step
    of width ``step_width_m`` (a sharp step for 0).

    Parameters
    ----------
    lattice_constant_m : float
        Cubic (bulk) lattice constant ``a`` of the fcc crystal. The monatomic step height of the
        (111) face is ``a/√3`` and the nearest-neighbour distance of its hexagonal surface lattice
        is ``a/√2`` (crystal geometry).
    steps : sequence of Step
        Step edges (should not cross inside the region that is scanned).
    step_width_m : float
        Width of the tanh step profile; 0 gives an ideally sharp edge.
    corrugation_m : float
        Peak-to-peak amplitude of the hexagonal atomic corrugation (0: none).
    corrugation_angle_deg : float
        Direction of a nearest-neighbour row of the surface lattice, from +x.
    lattice_origin_m : (float, float)
        Position of one surface atom on the level-0 terrace.
    stacking_shift : bool
        Shift the atomic lattice by ``a_nn/√3`` per level (ABC stacking of fcc(111) layers), so
        that the atoms of neighbouring terraces sit on each other's hollow sites.
    adsorbates : sequence of Adsorbate
        Gaussian bumps on top of the terraces.
    slope_x, slope_y : float
        Sample tilt (dimensionless, m of height per m).
    offset_m : float
        Height of the level-0 terrace at the origin.

    Notes
    -----
    The corrugation is the three-cosine model of a hexagonal lattice,
    ``corrugation_m · Σ_j cos(G_j·(r − r₀)) / 4.5`` with the three first-shell reciprocal
    vectors ``|G| = 4π/(√3 a_nn)`` at 120° to one another (at ``angle + 30°, +150°, +270°``);
    the sum lies in [−1.5, 3], has zero mean, and its maxima are the atom sites. Its 2-D Fourier
    transform has six peaks, 60° apart, at spatial frequency ``2/(√3 a_nn)`` (row period
    ``√3 a_nn / 2``). Terrace levels are integers; a pixel's level is the sum of ``levels`` of
    the edges whose +normal side it lies on.

    References
    ----------
    N. W. Ashcroft and N. D. Mermin, *Solid State Physics* (1976), ch. 4–5 (fcc lattice, the
    triangular net and its reciprocal lattice).
    """

    lattice_constant_m: float = AU_LATTICE_CONSTANT_M
    steps: tuple[Step, ...] = ()
    step_width_m: float = 1.5e-10
    corrugation_m: float = 0.0
    corrugation_angle_deg: float = 0.0
    lattice_origin_m: tuple[float, float] = (0.0, 0.0)
    stacking_shift: bool = True
    adsorbates: tuple[Adsorbate, ...] = ()
    slope_x: float = 0.0
    slope_y: float = 0.0
    offset_m: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "steps", _as_tuple(self.steps))
        object.__setattr__(self, "adsorbates", _as_tuple(self.adsorbates))
        object.__setattr__(self, "lattice_origin_m",
                           tuple(float(v) for v in self.lattice_origin_m))
        if not (self.lattice_constant_m > 0 and math.isfinite(self.lattice_constant_m)):
            raise ConfigError(f"surface: lattice_constant_m = {self.lattice_constant_m!r} must "
                              "be a positive finite length")
        if self.step_width_m < 0 or self.corrugation_m < 0:
            raise ConfigError(
                f"surface: step_width_m = {self.step_width_m!r} and corrugation_m = "
                f"{self.corrugation_m!r} must be >= 0")
        for k, st in enumerate(self.steps):
            if int(st.levels) == 0:
                raise ConfigError(f"surface: step {k} has levels = 0; a step must change the "
                                  "level by a non-zero number of monatomic steps")
        for k, ad in enumerate(self.adsorbates):
            if not ad.sigma_m > 0:
                raise ConfigError(f"surface: adsorbate {k} has sigma_m = {ad.sigma_m!r}; "
                                  "it must be > 0")

    # ---- derived crystal geometry ------------------------------------------------------------

    @property
    def step_height_m(self) -> float:
        """Monatomic step height of fcc(111), ``a/√3``."""
        return self.lattice_constant_m / math.sqrt(3.0)

    @property
    def surface_lattice_m(self) -> float:
        """Nearest-neighbour distance of the (111) surface lattice, ``a/√2``."""
        return self.lattice_constant_m / math.sqrt(2.0)

    @property
    def row_period_m(self) -> float:
        """Spacing of the atomic rows, ``√3/2 · a_nn`` (period of each corrugation cosine)."""
        return math.sqrt(3.0) / 2.0 * self.surface_lattice_m

    def reciprocal_vectors(self) -> np.ndarray:
        """The three corrugation wave vectors ``G_j`` (rad/m), shape (3, 2)."""
        g = 4.0 * math.pi / (math.sqrt(3.0) * self.surface_lattice_m)
        ang = np.radians(self.corrugation_angle_deg + np.array([30.0, 150.0, 270.0]))
        return g * np.stack([np.cos(ang), np.sin(ang)], axis=1)

    def stacking_vector_m(self) -> np.ndarray:
        """Lateral shift of the atomic lattice per terrace level (``a_nn/√3`` at +30°)."""
        ang = math.radians(self.corrugation_angle_deg + 30.0)
        d = self.surface_lattice_m / math.sqrt(3.0)
        return np.array([d * math.cos(ang), d * math.sin(ang)])

    # ---- evaluation --------------------------------------------------------------------------

    def terrace_level(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Integer terrace level at (x, y): its height is ``level × step_height_m`` (before tilt,
        corrugation and adsorbates) above the level-0 terrace."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        level = np.zeros(x.shape, dtype=np.int64)
        for st in self.steps:
            level += int(st.levels) * (st.signed_distance(x, y) > 0)
        return level

    def _step_profile(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        out = np.zeros(x.shape)
        for st in self.steps:
            s = st.signed_distance(x, y)
            if self.step_width_m > 0:
                frac = 0.5 * (1.0 + np.tanh(s / self.step_width_m))
            else:
                frac = (s > 0).astype(float)
            out += int(st.levels) * frac
        return out * self.step_height_m

    def corrugation(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Atomic corrugation (m, zero mean) at (x, y), including the per-level stacking shift."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        if self.corrugation_m == 0:
            return np.zeros(x.shape)
        x0, y0 = self.lattice_origin_m
        dx, dy = x - x0, y - y0
        if self.stacking_shift and self.steps:
            level = self.terrace_level(x, y)
            sv = self.stacking_vector_m()
            dx = dx - level * sv[0]
            dy = dy - level * sv[1]
        f = np.zeros(x.shape)
        for gx, gy in self.reciprocal_vectors():
            f += np.cos(gx * dx + gy * dy)
        return self.corrugation_m * f / 4.5

    def adsorbate_height(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Summed height of the Gaussian adsorbates at (x, y), m."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        out = np.zeros(x.shape)
        if x.size == 0 or not self.adsorbates:
            return out
        x0, x1, y0, y1 = x.min(), x.max(), y.min(), y.max()
        for ad in self.adsorbates:
            cut = _ADSORBATE_CUTOFF_SIGMA * ad.sigma_m
            if ad.x_m + cut < x0 or ad.x_m - cut > x1 or ad.y_m + cut < y0 or ad.y_m - cut > y1:
                continue  # too far from every query point
            r2 = (x - ad.x_m) ** 2 + (y - ad.y_m) ** 2
            out += np.where(r2 < cut**2, ad.height_m * np.exp(-0.5 * r2 / ad.sigma_m**2), 0.0)
        return out

    def height(self, x: ArrayLike, y: ArrayLike) -> np.ndarray:
        """Surface height (m) at lateral positions ``x``, ``y`` (m; broadcast together)."""
        x, y = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float))
        h = self.offset_m + self.slope_x * x + self.slope_y * y
        h = h + self._step_profile(x, y)
        h = h + self.corrugation(x, y)
        h = h + self.adsorbate_height(x, y)
        return h


def random_surface(
    rng: np.random.Generator,
    *,
    extent_m: tuple[float, float, float, float],
    lattice_constant_m: float = AU_LATTICE_CONSTANT_M,
    n_steps: int = 3,
    terrace_width_m: float | None = None,
    step_angle_deg: float = 20.0,
    step_angle_spread_deg: float = 6.0,
    max_curvature_per_m: float = 0.0,
    step_width_m: float = 1.5e-10,
    corrugation_m: float = 0.0,
    corrugation_angle_deg: float = 0.0,
    n_adsorbates: int = 0,
    adsorbate_height_m: float = 1.5e-10,
    adsorbate_sigma_m: float = 5e-10,
    slope_x: float = 0.0,
    slope_y: float = 0.0,
) -> Surface:
    """Draw a vicinal staircase surface covering ``extent_m = (x_min, x_max, y_min, y_max)``.

    ``n_steps`` step edges (or, if ``terrace_width_m`` is given, as many as make terraces of
    about that mean width across the extent), roughly perpendicular to ``step_angle_deg`` (each
    edge's normal
    within ±``step_angle_spread_deg``, edges descending one monatomic level towards +normal),
    spread evenly with jitter across the extent; adsorbates at uniform random positions with
    heights and widths within ±30 % of the given values.

    Notes
    -----
    Edge centres are jittered by ±20 % of the mean spacing; the curvature and the spread of the
    normals are capped so that, over the extent, bending and fanning move an edge by at most an
    eighth of the spacing each way. Neighbouring edges therefore never cross inside the extent,
    and the terrace level labels each terrace uniquely. On large extents the edges become
    nearly straight and parallel (a regular vicinal staircase).
    """
    x0, x1, y0, y1 = (float(v) for v in extent_m)
    if not (x1 > x0 and y1 > y0):
        raise ConfigError(f"surface: extent_m = {extent_m!r} must be (x_min, x_max, y_min, y_max) "
                          "with max > min")
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    th = math.radians(step_angle_deg)
    # half-length of the extent projected on the mean normal
    half = 0.5 * (abs((x1 - x0) * math.cos(th)) + abs((y1 - y0) * math.sin(th)))
    if terrace_width_m is not None:
        if terrace_width_m < 0:
            raise ConfigError(f"surface: terrace_width_m = {terrace_width_m!r} must be >= 0 "
                              "(0: no steps)")
        n_steps = 0 if terrace_width_m == 0 else max(1, round(2.0 * half / terrace_width_m))
    steps: list[Step] = []
    if n_steps > 0:
        spacing = 2.0 * half / n_steps
        # half-length of the extent along the edges: cap bending and fanning there so that
        # neighbouring edges cannot meet (each may move by <= 1/8 of the spacing either way)
        along = 0.5 * (abs((x1 - x0) * math.sin(th)) + abs((y1 - y0) * math.cos(th)))
        curv_max = min(max_curvature_per_m, 0.25 * spacing / along**2)
        spread = min(step_angle_spread_deg, math.degrees(0.25 * spacing / along))
        centres = -half + spacing * (np.arange(n_steps) + 0.5)
        centres = centres + rng.uniform(-0.2, 0.2, n_steps) * spacing
        angles = step_angle_deg + rng.uniform(-0.5, 0.5, n_steps) * spread
        curv = rng.uniform(-1.0, 1.0, n_steps) * curv_max
        c0 = cx * math.cos(th) + cy * math.sin(th)
        for d, a, k in zip(centres, angles, curv, strict=True):
            steps.append(Step(offset_m=float(c0 + d), angle_deg=float(a),
                              curvature_per_m=float(k), levels=-1))
    ads: list[Adsorbate] = []
    if n_adsorbates > 0:
        px = rng.uniform(x0, x1, n_adsorbates)
        py = rng.uniform(y0, y1, n_adsorbates)
        hh = adsorbate_height_m * rng.uniform(0.7, 1.3, n_adsorbates)
        ss = adsorbate_sigma_m * rng.uniform(0.7, 1.3, n_adsorbates)
        ads = [Adsorbate(float(a), float(b), float(c), float(d))
               for a, b, c, d in zip(px, py, hh, ss, strict=True)]
    a_nn = lattice_constant_m / math.sqrt(2.0)
    origin = (float(rng.uniform(0, a_nn)), float(rng.uniform(0, a_nn)))
    return Surface(
        lattice_constant_m=lattice_constant_m,
        steps=tuple(steps),
        step_width_m=step_width_m,
        corrugation_m=corrugation_m,
        corrugation_angle_deg=corrugation_angle_deg,
        lattice_origin_m=origin,
        adsorbates=tuple(ads),
        slope_x=slope_x,
        slope_y=slope_y,
    )
