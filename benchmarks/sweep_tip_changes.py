"""Tip-change detection under line offsets: how often it finds, removes and survives.

    OPENBLAS_NUM_THREADS=1 python benchmarks/sweep_tip_changes.py [--frames 30] [--clean 40]

An accuracy sweep, not a timing: the figures quoted in
:func:`pipeline.stages.tip_changes.detect_tip_changes` come from its default run.

Simulated 256² Au(111)-like frames, 100 nm: two monatomic step edges (their normals at 10°, 35°,
70° or 100° from the fast axis, drawn per frame), 12 adsorbates, drift, 3 pm z noise and
white line offsets (``--offsets``, default 20 pm). Each frame gets a tip change at a random
line, of 40, 60, 80, 100 and 130 pm (alternating sign). Printed per jump: frames where the
change was found within 2 lines, where line levelling removed the jump, where the unit step
came out within 1 % of a/√3, where the frame is flagged, and where the step is wrong but the
frame says ``ok`` (the case that must not happen).

Then ``--clean`` frames per configuration without a tip change (step-edge normals at 2°, 10°,
35°, 70°, 85°, 92°, 95° and 100° from the fast axis, i.e. edges 88° to 2° from it on either
side; line offsets 0, 20 and 40 pm; drift on every other frame): the number that report a tip
change anyway. Last, one step edge right across the frame at 0–5° from the fast axis (4 frames
per angle, line offsets 0 and 20 pm): below about 1° it cannot be told from a tip change in
one frame.
"""

from __future__ import annotations

import argparse
import json
import math
from datetime import datetime

import numpy as np
import xarray as xr

A_M = 4.078e-10  # Au lattice constant (from memory); the step is a/sqrt(3)
JUMPS_M = (40e-12, 60e-12, 80e-12, 100e-12, 130e-12)


def make(seed: int, *, normal_deg: float, tip_row: int | None = None, tip_m: float = 0.0,
         offsets_m: float = 20e-12, drift: bool = True) -> xr.Dataset:
    """One simulated frame, as the height stage would hand it on (height = recorded z)."""
    from pipeline.model import make_height_frame, validate_raw_frame
    from pipeline.simulate import Adsorbate, Step, Surface, simulate_constant_current_frame

    rng = np.random.default_rng(seed)
    steps = tuple(Step(offset_m=o, angle_deg=normal_deg, levels=1) for o in (-20e-9, 10e-9))
    ads = tuple(Adsorbate(float(px), float(py), 1.5e-10, 6e-10)
                for px, py in rng.uniform(-45e-9, 45e-9, (12, 2)))
    surf = Surface(lattice_constant_m=A_M, steps=steps, corrugation_m=20e-12,
                   corrugation_angle_deg=12.0, adsorbates=ads, slope_x=5e-3, slope_y=-3e-3)
    kw: dict = {"tip_change_row": tip_row, "tip_change_m": tip_m} if tip_row is not None else {}
    if drift:
        kw["drift_velocity_m_per_s"] = (0.42e-9 / 60, -0.27e-9 / 60)
    raw, _ = simulate_constant_current_frame(
        surf, rng=rng, phi_eV=4.5, setpoint_A=1e-10, bias_V=0.5, nx=256, ny=256,
        size_x_m=100e-9, line_time_s=0.1, start_time=datetime(2031, 5, 4, 22, 0, 0),
        z_noise_m=3e-12, line_offsets_m=offsets_m, backward=False, **kw)
    raw = validate_raw_frame(raw)
    return make_height_frame(raw, raw["z"].values, uncertainty=np.full(raw["z"].shape, 3e-12))


def sweep_jumps(n_frames: int, offsets_m: float) -> None:
    from pipeline.stages.level import level_lines, level_terraces, repair_scars
    from pipeline.stages.quality import assess_quality, flag_tip_changes

    step = A_M / math.sqrt(3)
    table = {j: np.zeros(5, int) for j in JUMPS_M}
    for seed in range(n_frames):
        rng = np.random.default_rng(100 + seed)
        normal = float(rng.choice([10.0, 35.0, 70.0, 100.0]))
        row = int(rng.integers(40, 216))
        for jump in JUMPS_M:
            ds = flag_tip_changes(make(seed, normal_deg=normal, tip_row=row,
                                       tip_m=jump if seed % 2 else -jump, offsets_m=offsets_m))
            found = json.loads(ds.attrs["tip_change_rows"])
            levelled = level_terraces(level_lines(repair_scars(ds)))
            status = assess_quality(levelled).attrs["status"]
            a = levelled.attrs
            true_step = abs(a["step_height_m"] / step - 1) < 0.01
            table[jump] += [any(abs(r - row) <= 2 for r in found), len(a["tip_jump_rows"]) > 0,
                            true_step, status != "ok", not true_step and status == "ok"]
    print(f"\ntip changes under {offsets_m * 1e12:.0f} pm line offsets, {n_frames} frames per jump")
    print(f"  {'jump':>6s}  {'found':>6s}  {'removed':>7s}  {'step<1%':>7s}  {'flagged':>7s}  "
          f"{'wrong step, ok':>14s}")
    for jump, row_counts in table.items():
        print(f"  {jump * 1e12:4.0f}pm  " + "  ".join(
            f"{v:{w}d}" for v, w in zip(row_counts, (6, 7, 7, 7, 14), strict=True)))


def sweep_clean(n_frames: int) -> None:
    from pipeline.stages.tip_changes import detect_tip_changes

    reported, total = 0, 0
    for seed in range(n_frames):
        for normal in (2.0, 10.0, 35.0, 70.0, 85.0, 92.0, 95.0, 100.0):
            for offsets in (0.0, 20e-12, 40e-12):
                rows = detect_tip_changes(make(1000 + seed, normal_deg=normal,
                                               offsets_m=offsets, drift=seed % 2 == 0))
                total += 1
                if rows:
                    reported += 1
                    print(f"  reported {rows}: seed {1000 + seed}, edge normal {normal}°, "
                          f"offsets {offsets * 1e12:.0f} pm")
    print(f"\nframes without a tip change: {reported} of {total} report one")


def sweep_near_parallel() -> None:
    from pipeline.model import make_height_frame, validate_raw_frame
    from pipeline.simulate import Adsorbate, Step, Surface, simulate_constant_current_frame
    from pipeline.stages.tip_changes import detect_tip_changes

    print("\none step edge across the frame, near the fast axis: frames reported of 4")
    print("  edge angle   " + "  ".join(f"{a:4.1f}°" for a in (0, 0.5, 1, 1.5, 2, 3, 5)))
    for offsets in (0.0, 20e-12):
        counts = []
        for angle in (0.0, 0.5, 1.0, 1.5, 2.0, 3.0, 5.0):
            n = 0
            for seed in range(4):
                rng = np.random.default_rng(seed)
                ads = tuple(Adsorbate(float(px), float(py), 1.5e-10, 6e-10)
                            for px, py in rng.uniform(-45e-9, 45e-9, (12, 2)))
                surf = Surface(lattice_constant_m=A_M, corrugation_m=20e-12,
                               steps=(Step(offset_m=0.0, angle_deg=90.0 + angle, levels=1),),
                               corrugation_angle_deg=12.0, adsorbates=ads)
                raw, _ = simulate_constant_current_frame(
                    surf, rng=rng, phi_eV=4.5, setpoint_A=1e-10, bias_V=0.5, nx=256, ny=256,
                    size_x_m=100e-9, line_time_s=0.1,
                    start_time=datetime(2031, 5, 4, 22, 0, 0), z_noise_m=3e-12,
                    line_offsets_m=offsets, backward=False)
                raw = validate_raw_frame(raw)
                ds = make_height_frame(raw, raw["z"].values,
                                       uncertainty=np.full(raw["z"].shape, 3e-12))
                n += bool(detect_tip_changes(ds))
            counts.append(n)
        print(f"  {offsets * 1e12:3.0f} pm      " + "  ".join(f"{c:5d}" for c in counts))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--frames", type=int, default=30, help="frames per tip-change size")
    ap.add_argument("--clean", type=int, default=40,
                    help="frames per configuration without a tip change")
    ap.add_argument("--offsets", type=float, default=20e-12, help="line offsets (m)")
    args = ap.parse_args()
    sweep_jumps(args.frames, args.offsets)
    sweep_clean(args.clean)
    sweep_near_parallel()


if __name__ == "__main__":
    main()
