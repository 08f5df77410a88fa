"""A whole synthetic overnight run: a schedule of frames and approach curves with ground truth.

:class:`RunSpec` describes the run (sample, barrier, frame series, timing, drift, noise, file
formats); :func:`simulate_run` renders it deterministically from a seed into a list of
``(relative_file_name, dataset, format)`` entries and a run-level truth dictionary;
:func:`pipeline.io.simrun.write_run` writes them to a folder. :func:`preset` gives named specs.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any, Literal, NamedTuple

import numpy as np
import xarray as xr

from pipeline import physics
from pipeline.errors import ConfigError
from pipeline.model import parse_time
from pipeline.simulate.curves import grid_positions, simulate_approach_curves
from pipeline.simulate.frames import (
    simulate_constant_current_frame,
    simulate_constant_height_frame,
)
from pipeline.simulate.surface import AU_LATTICE_CONSTANT_M, Surface, random_surface

__all__ = [
    "DATA_FORMATS",
    "PRESETS",
    "RunSpec",
    "SimulatedFile",
    "preset",
    "simulate_run",
]

#: File formats of data entries; ``"truth"`` entries are ground-truth datasets (netCDF).
DATA_FORMATS = ("nc", "npz", "txt")
_FRAME_KINDS = ("constant-current", "constant-height", "atomic")


class SimulatedFile(NamedTuple):
    """One file of a simulated run: name relative to the run folder, dataset, format.

    ``format`` is ``"nc"``, ``"npz"``, ``"txt"`` (a one-channel text grid: the dataset holds that
    channel only) or ``"truth"`` (a ground-truth dataset, under ``truth/``).
    """

    name: str
    dataset: xr.Dataset
    format: str


@dataclass(frozen=True)
class RunSpec:
    """Description of a synthetic overnight run (all lengths m, times s, currents A).

    The schedule: ``n_constant_current`` frames of the main series (``nx × ny`` pixels,
    ``scan_size_m`` square), with ``n_constant_height`` constant-height frames, ``n_atomic``
    small atomically resolved constant-current frames, ``n_curve_files`` approach-curve files and
    ``curve_grid_files`` files of curves on a grid of positions inserted at evenly spaced places;
    files follow one another with a gap of
    ``gap_between_files_s`` (± ``gap_jitter_fraction``). The main series' window starts at the
    origin and moves by ``(dx, dy)`` before main frame ``k`` for each ``(k, dx, dy)`` in
    ``window_moves``; the other frames and the curves sit inside the current window (the
    constant-height and atomic frames and the curve grids on its flattest spot). The drift is
    constant.

    Notes on some fields (the others are named after the frame-simulator arguments):

    - ``terrace_width_m``, ``step_*``: a staircase of step edges, about ``terrace_width_m``
      apart (0: a flat crystal), across the whole area the run scans
      (:func:`~pipeline.simulate.surface.random_surface`); ``n_adsorbates`` is per main-frame
      area (scaled to the area the surface must cover).
    - ``bias_V``, ``setpoint_A``: cycled over the main frames (magnitudes for the setpoint; the
      sign follows the bias). ``constant_height_bias_V`` is cycled over constant-height frames.
      Atomic frames use 50 mV (sign of ``bias_V[0]``) and 1 nA.
    - ``tip_change_frames``: main-frame indices with a tip change (row drawn at random in the
      middle half); ``z_in_volts_every = k``: main frames k−1, 2k−1, ... store z in V;
      ``backward_every = k``: main frames 0, k, 2k, ... also record the backward trace
      (0: none); atomic and constant-height frames always do.
    - ``formats``, ``constant_height_formats``, ``atomic_formats``, ``curve_formats``: file
      formats cycled over the frames of each kind (``"nc"``, ``"npz"``, ``"txt"``; curves
      ``"nc"``/``"npz"``). A text grid holds one channel: z (constant current) or current.
    - ``dtype``: dtype of the frame channels (curves are float64).
    - ``curve_*``: passed to :func:`~pipeline.simulate.curves.simulate_approach_curves`
      (exponential model, so the apparent barrier equals ``phi_eV``).
    - ``curve_grid_*``: each grid file holds one curve per node of a ``curve_grid_shape =
      (nx, ny)`` grid (``nx`` columns along x, ``ny`` rows along y, ``curve_grid_pitch_m``
      apart, row by row as :func:`~pipeline.simulate.curves.grid_positions`), centred on a flat
      spot of the window; the other ``curve_*`` settings apply (samples, bias, setpoint,
      tip-change and contact fractions, formats). Nodes right of the grid centre (x offset
      > 0) see the barrier ``phi_eV + curve_grid_phi_step_eV``: an invented patch of another
      barrier height that only the grid curves see (the frames keep ``phi_eV``).
    """

    name: str = "run"
    start_time: str = "2026-03-14T22:10:00"
    seed: int = 0
    # --- sample
    lattice_constant_m: float = AU_LATTICE_CONSTANT_M
    terrace_width_m: float = 10.0e-9
    step_angle_deg: float = 15.0
    step_curvature_per_m: float = 1.0e7
    step_width_m: float = 1.5e-10
    corrugation_m: float = 2.0e-11
    corrugation_angle_deg: float = 8.0
    n_adsorbates: int = 8
    adsorbate_height_m: float = 1.5e-10
    adsorbate_sigma_m: float = 4.0e-10
    slope_x: float = 0.008
    slope_y: float = -0.005
    # --- barrier, bias, feedback
    phi_eV: float = 4.6
    bias_V: tuple[float, ...] = (0.5,)
    setpoint_A: tuple[float, ...] = (1.0e-10,)
    feedback_time_constant_s: float = 5.0e-4
    current_noise_fraction: float = 0.02
    z_noise_m: float = 2.0e-12
    line_offsets_m: float = 5.0e-12
    scars_per_frame: int = 2
    tip_change_frames: tuple[int, ...] = ()
    tip_change_m: float = 1.0e-10
    z_in_volts_every: int = 0
    piezo_z_m_per_V: float = 2.5e-9
    current_limit_A: float = 5.0e-9
    # --- main constant-current series
    n_constant_current: int = 8
    nx: int = 128
    ny: int = 128
    scan_size_m: float = 25.0e-9
    line_time_s: float = 0.25
    alternate_slow_direction: bool = True
    backward_every: int = 1
    window_moves: tuple[tuple[int, float, float], ...] = ()
    # --- atomically resolved constant-current frames
    n_atomic: int = 0
    atomic_nx: int = 128
    atomic_scan_size_m: float = 5.0e-9
    atomic_line_time_s: float = 0.1
    # --- constant-height frames
    n_constant_height: int = 2
    constant_height_nx: int = 64
    constant_height_scan_size_m: float = 4.0e-9
    constant_height_line_time_s: float = 0.1
    constant_height_bias_V: tuple[float, ...] = (0.1, -0.1)
    tip_height_m: float = 6.0e-10
    reference_current_A: float = 3.0e-10
    noise_floor_A: float = 2.0e-12
    # --- approach curves
    n_curve_files: int = 2
    curves_per_file: int = 8
    curve_samples: int = 256
    curve_bias_V: float = 0.1
    curve_setpoint_A: float = 1.0e-9
    curve_phi_spread_eV: float = 0.0
    curve_contact_fraction: float = 0.0
    curve_tip_change_fraction: float = 0.0
    curve_time_s: float = 1.5
    curve_z_range_m: tuple[float, float] = (-0.2e-9, 0.5e-9)
    # --- approach curves on a grid of positions (a map of the apparent barrier)
    curve_grid_files: int = 0
    curve_grid_shape: tuple[int, int] = (4, 4)
    curve_grid_pitch_m: float = 1.0e-9
    curve_grid_phi_step_eV: float = 0.0
    # --- timing and drift
    gap_between_files_s: float = 15.0
    gap_jitter_fraction: float = 0.2
    drift_velocity_m_per_s: tuple[float, float] = (7.0e-12, -4.5e-12)
    # --- output
    formats: tuple[str, ...] = ("nc",)
    constant_height_formats: tuple[str, ...] = ("nc",)
    atomic_formats: tuple[str, ...] = ("nc",)
    curve_formats: tuple[str, ...] = ("nc",)
    dtype: Literal["float32", "float64"] = "float32"
    description: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        for name in ("bias_V", "setpoint_A", "tip_change_frames", "constant_height_bias_V",
                     "drift_velocity_m_per_s", "curve_z_range_m", "formats",
                     "constant_height_formats", "atomic_formats", "curve_formats"):
            object.__setattr__(self, name, tuple(getattr(self, name)))
        object.__setattr__(self, "curve_grid_shape",
                           tuple(int(v) for v in self.curve_grid_shape))
        object.__setattr__(self, "window_moves",
                           tuple((int(k), float(dx), float(dy))
                                 for k, dx, dy in self.window_moves))
        self._validate()

    def _validate(self) -> None:
        def bad(key: str, allowed: str) -> ConfigError:
            return ConfigError(f"run spec {self.name!r}: {key} = {getattr(self, key)!r}; "
                               f"{allowed}")

        for key in ("n_constant_current", "n_constant_height", "n_atomic", "n_curve_files",
                    "curve_grid_files", "terrace_width_m", "n_adsorbates", "scars_per_frame",
                    "z_in_volts_every"):
            if getattr(self, key) < 0:
                raise bad(key, "must be >= 0")
        if self.n_constant_current + self.n_constant_height + self.n_atomic < 1:
            raise bad("n_constant_current", "the run needs at least one frame")
        for key in ("nx", "ny", "atomic_nx", "constant_height_nx"):
            if getattr(self, key) < 8:
                raise bad(key, "at least 8 pixels")
        for key in ("scan_size_m", "atomic_scan_size_m", "constant_height_scan_size_m",
                    "line_time_s", "atomic_line_time_s", "constant_height_line_time_s",
                    "phi_eV", "lattice_constant_m", "tip_height_m", "reference_current_A",
                    "piezo_z_m_per_V", "curve_setpoint_A", "curve_time_s", "current_limit_A",
                    "curve_grid_pitch_m"):
            v = getattr(self, key)
            if not (isinstance(v, int | float) and math.isfinite(v) and v > 0):
                raise bad(key, "must be a positive finite number")
        if self.curves_per_file < 1 or self.curve_samples < 5:
            raise bad("curves_per_file", "need >= 1 curve per file and >= 5 samples per curve")
        if len(self.curve_grid_shape) != 2 or min(self.curve_grid_shape) < 2:
            raise bad("curve_grid_shape", "expected (nx, ny) with at least 2 nodes along each axis")
        if (self.curve_grid_files > 0
                and max(self.curve_grid_shape) * self.curve_grid_pitch_m > self.scan_size_m):
            raise bad("curve_grid_pitch_m",
                      f"the grid ({max(self.curve_grid_shape)} nodes of this pitch) must fit in "
                      f"the {self.scan_size_m:g} m window")
        grid_phi = self.phi_eV + self.curve_grid_phi_step_eV
        if not (math.isfinite(self.curve_grid_phi_step_eV) and grid_phi > 0.5):
            raise bad("curve_grid_phi_step_eV",
                      f"phi_eV + step = {grid_phi:g} eV; must be finite and > 0.5 eV")
        if self.backward_every < 0:
            raise bad("backward_every", "must be >= 0 (0: no backward traces)")
        if not self.bias_V or not self.setpoint_A or not self.constant_height_bias_V:
            raise bad("bias_V", "bias_V, setpoint_A and constant_height_bias_V need >= 1 value")
        if any(b == 0 for b in (*self.bias_V, *self.constant_height_bias_V, self.curve_bias_V)):
            raise bad("bias_V", "biases must be non-zero")
        if any(s <= 0 for s in self.setpoint_A):
            raise bad("setpoint_A", "setpoint magnitudes must be > 0")
        if len(self.drift_velocity_m_per_s) != 2:
            raise bad("drift_velocity_m_per_s", "expected (vx, vy)")
        for key in ("formats", "constant_height_formats", "atomic_formats"):
            fmts = getattr(self, key)
            if not fmts or any(f not in DATA_FORMATS for f in fmts):
                raise bad(key, f"need >= 1 value, each one of {', '.join(DATA_FORMATS)}")
        if not self.curve_formats or any(f not in ("nc", "npz") for f in self.curve_formats):
            raise bad("curve_formats", "each one of nc, npz (a text grid cannot hold curves)")
        if self.dtype not in ("float32", "float64"):
            raise bad("dtype", "expected 'float32' or 'float64'")
        if not 0 <= self.gap_jitter_fraction < 1 or self.gap_between_files_s < 0:
            raise bad("gap_jitter_fraction", "gap >= 0 and jitter in [0, 1)")
        for k, _, _ in self.window_moves:
            if not 0 <= k < max(self.n_constant_current, 1):
                raise bad("window_moves",
                          f"frame indices must be in 0..{self.n_constant_current - 1}")
        for k in self.tip_change_frames:
            if not 0 <= k < max(self.n_constant_current, 1):
                raise bad("tip_change_frames",
                          f"frame indices must be in 0..{self.n_constant_current - 1}")
        parse_time(self.start_time, source=f"run spec {self.name!r}")

    def replace(self, **changes: Any) -> RunSpec:
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """The fields as plain Python values (tuples as lists)."""
        def plain(v: Any) -> Any:
            return [plain(x) for x in v] if isinstance(v, tuple | list) else v

        return {f.name: plain(getattr(self, f.name)) for f in dataclasses.fields(self)}


# --------------------------------------------------------------------------------------------
# presets
# --------------------------------------------------------------------------------------------

PRESETS: dict[str, RunSpec] = {
    "sample": RunSpec(
        name="night-01",
        description=(
            "Au(111)-like crystal, 25 nm frames with terraces, atoms and adsorbates; "
            "one 5 nm atomically resolved frame, two 4 nm constant-height frames, two files "
            "of 8 approach curves, one 4 x 4 grid of approach curves (1 nm pitch) over a patch "
            "of 0.5 eV lower barrier; drift about 0.5 nm/min"),
        start_time="2026-03-14T22:10:00",
        n_constant_current=8, nx=128, ny=128, scan_size_m=25e-9, line_time_s=0.25,
        n_atomic=1, atomic_nx=96, atomic_scan_size_m=5e-9, atomic_line_time_s=0.1,
        n_constant_height=2, constant_height_nx=64, constant_height_scan_size_m=4e-9,
        constant_height_bias_V=(0.1, -0.1),
        n_curve_files=2, curves_per_file=8, curve_samples=200,
        curve_contact_fraction=0.0, curve_tip_change_fraction=0.125,
        curve_grid_files=1, curve_grid_shape=(4, 4), curve_grid_pitch_m=1e-9,
        curve_grid_phi_step_eV=-0.5,
        bias_V=(0.5, 0.5, 0.5, 0.5, 0.5, 0.5, -0.5, 0.5), setpoint_A=(1e-10,),
        tip_change_frames=(5,), z_in_volts_every=3, backward_every=8,
        window_moves=((4, 4e-9, 2.5e-9),),
        formats=("nc", "nc", "npz", "nc"), constant_height_formats=("txt", "nc"),
        atomic_formats=("nc",), curve_formats=("nc", "npz"),
        drift_velocity_m_per_s=(7.0e-12, -4.5e-12),
    ),
    "tiny": RunSpec(
        name="tiny",
        description="three 64 x 64 constant-current frames, one constant-height frame, "
                    "one file of 4 approach curves (for tests)",
        n_constant_current=3, nx=64, ny=64, scan_size_m=12e-9, line_time_s=0.05,
        n_atomic=0, n_constant_height=1, constant_height_nx=32,
        constant_height_scan_size_m=3e-9, constant_height_line_time_s=0.05,
        n_curve_files=1, curves_per_file=4, curve_samples=64,
        terrace_width_m=6e-9, n_adsorbates=3, gap_between_files_s=5.0,
        formats=("nc", "npz", "txt"), constant_height_formats=("nc",), curve_formats=("nc",),
        drift_velocity_m_per_s=(2.0e-11, -1.0e-11),
    ),
    "overnight": RunSpec(
        name="overnight",
        description="a long run for batch and scale tests: 96 frames of 256 x 256",
        n_constant_current=96, nx=256, ny=256, scan_size_m=30e-9, line_time_s=0.4,
        n_atomic=4, n_constant_height=8, n_curve_files=12, curves_per_file=16,
        bias_V=(0.5,), tip_change_frames=(40, 77), z_in_volts_every=4,
        window_moves=((32, 6e-9, 0.0), (64, -3e-9, 5e-9)),
        formats=("nc", "nc", "npz", "txt"), constant_height_formats=("txt", "nc"),
        curve_formats=("nc", "npz"),
    ),
}


def preset(name: str) -> RunSpec:
    """A named :class:`RunSpec`: ``"sample"`` (the shipped sample run), ``"tiny"`` (fast, for
    tests) or ``"overnight"`` (a long run for scale tests)."""
    try:
        return PRESETS[name]
    except KeyError:
        raise ConfigError(f"unknown simulation preset {name!r}; choose one of "
                          f"{', '.join(PRESETS)}") from None


# --------------------------------------------------------------------------------------------
# planning
# --------------------------------------------------------------------------------------------


@dataclass
class _Item:
    kind: str  # "constant-current" | "constant-height" | "atomic" | "curves" | "curve-grid"
    index: int  # index within its kind
    key: float  # position in the schedule
    start: datetime | None = None
    duration_s: float = 0.0
    center: tuple[float, float] = (0.0, 0.0)
    window: tuple[float, float] = (0.0, 0.0)  # main window centre at that time


def _schedule(spec: RunSpec) -> list[_Item]:
    n_cc = spec.n_constant_current
    span = max(n_cc, 1)
    items = [_Item("constant-current", k, float(k)) for k in range(n_cc)]
    items += [_Item("constant-height", j, (j + 1) * span / (spec.n_constant_height + 1) - 0.4)
              for j in range(spec.n_constant_height)]
    items += [_Item("atomic", j, (j + 1) * span / (spec.n_atomic + 1) - 0.3)
              for j in range(spec.n_atomic)]
    items += [_Item("curves", j, j * span / max(spec.n_curve_files, 1) - 0.5)
              for j in range(spec.n_curve_files)]
    items += [_Item("curve-grid", j, (j + 1) * span / (spec.curve_grid_files + 1) + 0.2)
              for j in range(spec.curve_grid_files)]
    return sorted(items, key=lambda it: it.key)


def _duration_s(spec: RunSpec, item: _Item) -> float:
    if item.kind == "constant-current":
        return spec.ny * spec.line_time_s
    if item.kind == "atomic":
        return spec.atomic_nx * spec.atomic_line_time_s
    if item.kind == "constant-height":
        return spec.constant_height_nx * spec.constant_height_line_time_s
    if item.kind == "curve-grid":
        return math.prod(spec.curve_grid_shape) * spec.curve_time_s
    return spec.curves_per_file * spec.curve_time_s


def _flattest_centre(surface: Surface, rng: np.random.Generator, *, window: tuple[float, float],
                     window_size: float, size: float, shift: tuple[float, float],
                     n_try: int = 24) -> tuple[float, float]:
    """Of ``n_try`` random sub-frame centres inside the window, one on a single terrace (the
    one with the fewest step pixels, then the fewest adsorbate pixels, first drawn wins).

    ``shift`` is the drift displacement ``v·t`` at the time of the frame: the tip then sees the
    surface at ``r + shift``.
    """
    half = 0.5 * (window_size - size)
    cx = window[0] + rng.uniform(-half, half, n_try)
    cy = window[1] + rng.uniform(-half, half, n_try)
    g = (np.arange(16) + 0.5) / 16 - 0.5
    gx = cx[:, None, None] + size * g[None, None, :] + shift[0]
    gy = cy[:, None, None] + size * g[None, :, None] + shift[1]
    level = surface.terrace_level(gx, gy).reshape(n_try, -1)
    ads = surface.adsorbate_height(gx, gy).reshape(n_try, -1) > 0.05 * surface.step_height_m
    mixed = (level != np.median(level, axis=1, keepdims=True)).sum(axis=1)
    score = mixed * 1000 + ads.sum(axis=1)
    best = int(np.argmin(score))
    return float(cx[best]), float(cy[best])


def _frame_format(spec: RunSpec, it: _Item) -> str:
    fmts = {"constant-current": spec.formats, "constant-height": spec.constant_height_formats,
            "atomic": spec.atomic_formats, "curves": spec.curve_formats,
            "curve-grid": spec.curve_formats}[it.kind]
    return fmts[it.index % len(fmts)]


def simulate_run(spec: RunSpec, *, seed: int | None = None
                 ) -> tuple[list[SimulatedFile], dict[str, Any]]:
    """Render a run: its files (data and ground truth) and its run-level truth.

    Parameters
    ----------
    spec : RunSpec
        What to simulate.
    seed : int, optional
        Seed of all randomness (default ``spec.seed``); the same seed gives bit-identical
        datasets. Each file gets its own stream spawned from
        :class:`numpy.random.SeedSequence` ``(seed)``, so adding files at the end of a spec
        does not change the earlier ones.

    Returns
    -------
    files : list of SimulatedFile
        ``(name, dataset, format)`` in time order: data files named ``frame_NNN.<ext>`` /
        ``curves_NNN.<ext>`` (``NNN`` a shared sequence number), each frame followed by its
        truth ``truth/<id>.nc`` (format ``"truth"``); the per-curve truth of curve files is in
        their record of ``truth["curves"]``.
    truth : dict
        Run-level truth: barrier (``phi_eV``, ``two_kappa_per_m``), drift (m/s and nm/min),
        crystal (``lattice_constant_m``, ``step_height_m``, ``surface_lattice_m``), tilt, the
        surface's steps and adsorbates, and one record per frame and per curve file (file,
        times, centre, size, mode, bias, ...; curve files: positions and the true ``phi_eV``
        per curve, grid files also ``on_grid``, ``grid_nx``, ``grid_ny``, ``grid_pitch_m``,
        ``grid_center_x_m``/``_y_m`` and ``grid_phi_step_eV``).

    Notes
    -----
    Times of the files follow the schedule with gaps; each frame's truth carries its time offset
    from the run start. Main frames alternate their slow direction (up/down pairs) when
    ``alternate_slow_direction``; every ``backward_every``-th main frame records the backward
    trace; every ``z_in_volts_every``-th main frame stores z in V.
    """
    seed = spec.seed if seed is None else int(seed)
    if seed < 0:
        raise ConfigError(f"run spec {spec.name!r}: seed = {seed}; must be >= 0")
    root = np.random.SeedSequence(seed)
    plan_rng, surf_rng, pos_rng = (np.random.default_rng(s) for s in root.spawn(3))
    items = _schedule(spec)
    item_seeds = np.random.SeedSequence([seed, 1]).spawn(len(items))

    # ---- times and main windows
    t0 = parse_time(spec.start_time, source=f"run spec {spec.name!r}")
    moves = {k: (dx, dy) for k, dx, dy in spec.window_moves}
    now = t0
    window = (0.0, 0.0)
    for n, it in enumerate(items):
        if n > 0:
            gap = spec.gap_between_files_s * (1.0 + spec.gap_jitter_fraction
                                               * plan_rng.uniform(-1.0, 1.0))
            now = now + timedelta(milliseconds=round(gap * 1000.0))
        if it.kind == "constant-current" and it.index in moves:
            dx, dy = moves[it.index]
            window = (window[0] + dx, window[1] + dy)
        it.start = now
        it.window = window
        it.center = window
        it.duration_s = _duration_s(spec, it)
        now = now + timedelta(milliseconds=round(it.duration_s * 1000.0))
    run_s = (now - t0).total_seconds()

    # ---- surface covering every window over the whole run
    vx, vy = (float(v) for v in spec.drift_velocity_m_per_s)
    wx = [it.window[0] for it in items]
    wy = [it.window[1] for it in items]
    margin = 0.75 * spec.scan_size_m + run_s * math.hypot(vx, vy) + 2e-9
    extent = (min(wx) - margin, max(wx) + margin, min(wy) - margin, max(wy) + margin)
    surface = random_surface(
        surf_rng, extent_m=extent, lattice_constant_m=spec.lattice_constant_m,
        terrace_width_m=spec.terrace_width_m, step_angle_deg=spec.step_angle_deg,
        max_curvature_per_m=spec.step_curvature_per_m, step_width_m=spec.step_width_m,
        corrugation_m=spec.corrugation_m, corrugation_angle_deg=spec.corrugation_angle_deg,
        n_adsorbates=round(spec.n_adsorbates * (extent[1] - extent[0]) * (extent[3] - extent[2])
                           / spec.scan_size_m**2),
        adsorbate_height_m=spec.adsorbate_height_m, adsorbate_sigma_m=spec.adsorbate_sigma_m,
        slope_x=spec.slope_x, slope_y=spec.slope_y)

    # ---- sub-frame positions (constant height, atomic, curves) inside the current window
    curve_pos: dict[int, np.ndarray] = {}
    grid_nx, grid_ny = spec.curve_grid_shape
    sizes = {"constant-height": spec.constant_height_scan_size_m,
             "atomic": spec.atomic_scan_size_m,
             "curve-grid": max(grid_nx, grid_ny) * spec.curve_grid_pitch_m}
    for n, it in enumerate(items):
        if it.kind in sizes:
            size = sizes[it.kind]
            assert it.start is not None
            t_mid = (it.start - t0).total_seconds() + 0.5 * it.duration_s
            it.center = _flattest_centre(surface, pos_rng, window=it.window,
                                         window_size=spec.scan_size_m, size=size,
                                         shift=(vx * t_mid, vy * t_mid))
            if it.kind == "curve-grid":
                curve_pos[n] = np.asarray(it.center) + np.asarray(
                    grid_positions(grid_nx, grid_ny, spec.curve_grid_pitch_m))
        elif it.kind == "curves":
            half = 0.3 * spec.scan_size_m
            curve_pos[n] = np.asarray(it.window) + pos_rng.uniform(
                -half, half, (spec.curves_per_file, 2))

    files: list[SimulatedFile] = []
    frame_records: list[dict[str, Any]] = []
    curve_records: list[dict[str, Any]] = []
    for n, it in enumerate(items):
        rng = np.random.default_rng(item_seeds[n])
        assert it.start is not None
        if it.kind in ("curves", "curve-grid"):
            entry, rec = _render_curves(spec, it, n, rng, curve_pos[n], t0)
            files.extend(entry)
            curve_records.append(rec)
            continue
        entry, rec = _render_frame(spec, surface, it, n, rng, _frame_format(spec, it), t0)
        files.extend(entry)
        frame_records.append(rec)

    two_kappa = 2.0 * float(physics.decay_constant(spec.phi_eV))
    truth: dict[str, Any] = {
        "name": spec.name,
        "seed": seed,
        "description": spec.description,
        "run_start_time": t0.isoformat(),
        "run_duration_s": run_s,
        "phi_eV": spec.phi_eV,
        "two_kappa_per_m": two_kappa,
        "drift_velocity_x_m_per_s": vx,
        "drift_velocity_y_m_per_s": vy,
        "drift_velocity_x_nm_per_min": vx * 1e9 * 60.0,
        "drift_velocity_y_nm_per_min": vy * 1e9 * 60.0,
        "drift_speed_nm_per_min": math.hypot(vx, vy) * 1e9 * 60.0,
        "lattice_constant_m": surface.lattice_constant_m,
        "step_height_m": surface.step_height_m,
        "surface_lattice_m": surface.surface_lattice_m,
        "corrugation_m": surface.corrugation_m,
        "corrugation_angle_deg": surface.corrugation_angle_deg,
        "slope_x": surface.slope_x,
        "slope_y": surface.slope_y,
        "piezo_z_m_per_V": spec.piezo_z_m_per_V,
        "frames": frame_records,
        "curves": curve_records,
        "steps": [dataclasses.asdict(s) for s in surface.steps],
        "adsorbates": [dataclasses.asdict(a) for a in surface.adsorbates],
        "spec": {**spec.to_dict(), "seed": seed},
    }
    return files, truth


def _cycle(values: tuple, k: int) -> Any:  # type: ignore[type-arg]
    return values[k % len(values)]


def _render_frame(spec: RunSpec, surface: Surface, it: _Item, n: int, rng: np.random.Generator,
                  fmt: str, t0: datetime) -> tuple[list[SimulatedFile], dict[str, Any]]:
    frame_id = f"frame_{n:03d}"
    assert it.start is not None
    common: dict[str, Any] = {
        "rng": rng, "phi_eV": spec.phi_eV, "start_time": it.start, "run_t0": t0,
        "drift_velocity_m_per_s": spec.drift_velocity_m_per_s,
        "current_noise_fraction": spec.current_noise_fraction,
        "current_limit_A": spec.current_limit_A, "frame_id": frame_id, "dtype": spec.dtype,
        "center_x_m": it.center[0], "center_y_m": it.center[1],
    }
    z_units = "m"
    tip_row: int | None = None
    if it.kind == "constant-height":
        k = it.index
        raw, truth = simulate_constant_height_frame(
            surface, bias_V=_cycle(spec.constant_height_bias_V, k), tip_height_m=spec.tip_height_m,
            reference_current_A=spec.reference_current_A, noise_floor_A=spec.noise_floor_A,
            nx=spec.constant_height_nx, ny=spec.constant_height_nx,
            size_x_m=spec.constant_height_scan_size_m,
            line_time_s=spec.constant_height_line_time_s, backward=True, **common)
        channel = "current"
    else:
        k = it.index
        main = it.kind == "constant-current"
        if main:
            slow = ("decreasing" if spec.alternate_slow_direction and k % 2 == 1
                    else "increasing")
            backward = spec.backward_every > 0 and k % spec.backward_every == 0
            if spec.z_in_volts_every > 0 and k % spec.z_in_volts_every == spec.z_in_volts_every - 1:
                z_units = "V"
            if k in spec.tip_change_frames:
                tip_row = int(rng.integers(spec.ny // 4, 3 * spec.ny // 4))
            geometry = {"nx": spec.nx, "ny": spec.ny, "size_x_m": spec.scan_size_m,
                        "line_time_s": spec.line_time_s, "scars": spec.scars_per_frame,
                        "line_offsets_m": spec.line_offsets_m}
            bias = _cycle(spec.bias_V, k)
            setpoint = _cycle(spec.setpoint_A, k)
        else:
            slow, backward = "increasing", True
            geometry = {"nx": spec.atomic_nx, "ny": spec.atomic_nx,
                        "size_x_m": spec.atomic_scan_size_m,
                        "line_time_s": spec.atomic_line_time_s, "scars": 0,
                        "line_offsets_m": 0.5 * spec.line_offsets_m}
            bias = -0.05 if spec.bias_V[0] < 0 else 0.05
            setpoint = 1.0e-9
        raw, truth = simulate_constant_current_frame(
            surface, setpoint_A=setpoint, bias_V=bias,
            feedback_time_constant_s=spec.feedback_time_constant_s, z_noise_m=spec.z_noise_m,
            tip_change_row=tip_row, tip_change_m=spec.tip_change_m, backward=backward,
            slow_direction=slow, z_units=z_units,  # type: ignore[arg-type]
            piezo_z_m_per_V=spec.piezo_z_m_per_V if z_units == "V" else None,
            **geometry, **common)
        channel = "z"
    truth.attrs["frame_kind"] = it.kind
    truth.attrs["source_file"] = f"{frame_id}.{fmt}"
    data = raw
    if fmt == "txt":
        data = raw[[channel]]
        data.attrs = dict(raw.attrs)
    files = [SimulatedFile(f"{frame_id}.{fmt}", data, fmt),
             SimulatedFile(f"truth/{frame_id}.nc", truth, "truth")]
    rec = {
        "frame_id": frame_id,
        "file": f"{frame_id}.{fmt}",
        "format": fmt,
        "frame_kind": it.kind,
        "mode": raw.attrs["mode"],
        "start_time": raw.attrs["start_time"],
        "time_offset_s": float(truth.attrs["time_offset_s"]),
        "duration_s": it.duration_s,
        "center_x_m": float(raw.attrs["scan_center_x_m"]),
        "center_y_m": float(raw.attrs["scan_center_y_m"]),
        "scan_size_x_m": float(raw.attrs["scan_size_x_m"]),
        "scan_size_y_m": float(raw.attrs["scan_size_y_m"]),
        "nx": int(raw.sizes["x"]),
        "ny": int(raw.sizes["y"]),
        "line_time_s": float(raw.attrs["line_time_s"]),
        "slow_direction": raw.attrs["slow_direction"],
        "bias_V": float(raw.attrs["bias_V"]),
        "setpoint_A": float(raw.attrs["setpoint_A"]),
        "z_units": z_units if raw.attrs["mode"] == "constant-current" else "",
        "channels": sorted(str(v) for v in data.data_vars),
        "tip_change_row": -1 if tip_row is None else tip_row,
    }
    return files, rec


def _render_curves(spec: RunSpec, it: _Item, n: int, rng: np.random.Generator,
                   positions: np.ndarray, t0: datetime
                   ) -> tuple[list[SimulatedFile], dict[str, Any]]:
    set_id = f"curves_{n:03d}"
    fmt = _frame_format(spec, it)
    assert it.start is not None
    n_curves = positions.shape[0]
    grid: dict[str, Any] = {}
    phi: float | np.ndarray = spec.phi_eV
    if it.kind == "curve-grid":
        # the invented patch: nodes right of the grid centre see phi_eV + step
        right = positions[:, 0] > it.center[0] + 1e-3 * spec.curve_grid_pitch_m
        phi = np.where(right, spec.phi_eV + spec.curve_grid_phi_step_eV, spec.phi_eV)
        grid = {"on_grid": True, "grid_nx": spec.curve_grid_shape[0],
                "grid_ny": spec.curve_grid_shape[1], "grid_pitch_m": spec.curve_grid_pitch_m,
                "grid_center_x_m": float(it.center[0]), "grid_center_y_m": float(it.center[1]),
                "grid_phi_step_eV": spec.curve_grid_phi_step_eV,
                "grid_patch": "nodes with x > grid_center_x_m have phi_eV + grid_phi_step_eV"}
    ds, ctruth = simulate_approach_curves(
        rng, n_curves=n_curves, phi_eV=phi,
        phi_spread_eV=spec.curve_phi_spread_eV, bias_V=spec.curve_bias_V,
        start_time=it.start.isoformat(), setpoint_current_A=spec.curve_setpoint_A,
        z_range_m=spec.curve_z_range_m,
        n_samples=spec.curve_samples, contact_fraction=spec.curve_contact_fraction,
        tip_change_fraction=spec.curve_tip_change_fraction, model="exponential",
        positions=positions, curve_set_id=set_id)
    ds.attrs["comment"] = "synthetic data made by the isogap simulator"
    t_off = (it.start - t0).total_seconds()
    rec: dict[str, Any] = {
        "curve_set_id": set_id, "file": f"{set_id}.{fmt}", "format": fmt,
        "start_time": it.start.isoformat(), "time_offset_s": t_off,
        "n_curves": n_curves, "bias_V": float(spec.curve_bias_V),
        "setpoint_A": float(ds.attrs["setpoint_A"]),
        "position_x_m": [float(v) for v in positions[:, 0]],
        "position_y_m": [float(v) for v in positions[:, 1]],
        **grid,
    }
    for key, value in ctruth.items():
        arr = np.asarray(value)
        if arr.ndim == 1:
            rec[key] = [v.item() for v in arr]
        elif arr.dtype.kind in "fiub":
            rec[key] = arr.item()
        else:
            rec[key] = str(value)
    files = [SimulatedFile(f"{set_id}.{fmt}", ds, fmt)]
    return files, rec
