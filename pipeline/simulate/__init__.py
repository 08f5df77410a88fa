"""Physics-based synthetic STM data with ground truth (demo data and tests).

- :mod:`~pipeline.simulate.surface`: the analytic sample (terraces, atoms, adsorbates, tilt);
- :mod:`~pipeline.simulate.frames`: constant-current and constant-height frames;
- :mod:`~pipeline.simulate.pairs`: two consecutive frames under drift, with the true shift;
- :mod:`~pipeline.simulate.curves`: approach curves I(z);
- :mod:`~pipeline.simulate.run`: a whole overnight run (:class:`RunSpec`, presets).

Writing a run to a folder is :func:`pipeline.io.simrun.write_run` (only ``io`` touches files).
"""

from pipeline.simulate.curves import simulate_approach_curves
from pipeline.simulate.frames import (
    frame_times_s,
    simulate_constant_current_frame,
    simulate_constant_height_frame,
)
from pipeline.simulate.pairs import simulate_frame_pair
from pipeline.simulate.run import PRESETS, RunSpec, SimulatedFile, preset, simulate_run
from pipeline.simulate.surface import (
    AU_LATTICE_CONSTANT_M,
    Adsorbate,
    Step,
    Surface,
    random_surface,
)

__all__ = [
    "AU_LATTICE_CONSTANT_M",
    "PRESETS",
    "Adsorbate",
    "RunSpec",
    "SimulatedFile",
    "Step",
    "Surface",
    "frame_times_s",
    "preset",
    "random_surface",
    "simulate_approach_curves",
    "simulate_constant_current_frame",
    "simulate_constant_height_frame",
    "simulate_frame_pair",
    "simulate_run",
]
