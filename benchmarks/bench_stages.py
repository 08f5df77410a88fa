"""Per-stage time of the frame recipe (:func:`pipeline.tasks.process_frame`) at several sizes.

Simulated constant-current frames with both traces (three steps, adsorbates, drift, a lagging
feedback loop, current and z noise, line offsets, a few scars) are written to netCDF, then each
frame is read and passed through the stages of ``process_frame`` in its order with the default
configuration, every stage timed on its own with ``time.perf_counter``. Each frame is processed
``--repeat`` times and the median per stage is printed (the machine's cores are shared: medians,
not means). ``--noise-free`` drops the noise and flaws (the noise estimate is then 0 and every
pixel's traces count as mismatched). The frames come from ``bench_pipeline.make_frames``.

Usage::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_stages.py              # 256², 512², 1024²
    python benchmarks/bench_stages.py --sizes 512 --frames 3 --repeat 5
    python benchmarks/bench_stages.py --save ref.npz    # keep every stage's output maps/attrs
    python benchmarks/bench_stages.py --check ref.npz   # compare with a saved run

``--save``/``--check`` make the timing run a regression check as well: every map and numeric
attribute after every stage is compared with float tolerance (float32 maps: 1e-5 of the
map's largest magnitude; float64 arrays and attributes: 1e-6), integer maps and strings exactly.
"""

from __future__ import annotations

import argparse
import functools
import json
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from bench_pipeline import make_frames  # one frame maker for both benchmarks

STAGES = ("read", "reconstruct_height", "flag_tip_changes", "repair_scars", "level_lines",
          "level_terraces", "assess_quality")


def _run_frame(path: Path, cfg: Any
               ) -> tuple[dict[str, float], dict[str, xr.Dataset], dict[str, float]]:
    """One pass of the frame recipe: stage wall times (s), every stage's output, and the
    stage CPU times of this process (s; less disturbed by other processes on the machine)."""
    from pipeline.io.readers import read_file
    from pipeline.stages.height import reconstruct_height
    from pipeline.stages.level import level_lines, level_terraces, repair_scars
    from pipeline.stages.quality import assess_quality, flag_tip_changes

    h, lv, q = cfg.height, cfg.level, cfg.quality
    calls: list[tuple[str, Callable[[Any], xr.Dataset]]] = [
        ("read", lambda _: read_file(path, piezo_z_m_per_V=cfg.input.piezo_z_m_per_V)),
        ("reconstruct_height", lambda ds: reconstruct_height(
            ds, work_function_eV=4.6, work_function_uncertainty_eV=0.1,
            combine_traces=h.combine_traces, trace_mismatch_sigma=h.trace_mismatch_sigma,
            noise_floor_A=h.noise_floor_A, current_noise_A=h.current_noise_A)),
        ("flag_tip_changes", lambda ds: flag_tip_changes(
            ds, threshold_sigma=q.tip_change_threshold_sigma)),
        ("repair_scars", lambda ds: repair_scars(
            ds, threshold_sigma=lv.scar_threshold_sigma, max_length_px=lv.scar_max_length_px)),
        ("level_lines", lambda ds: level_lines(
            ds, slopes=lv.line_slopes, step_threshold_sigma=lv.line_step_threshold_sigma,
            min_step_height_m=lv.min_step_height_m)),
        ("level_terraces", lambda ds: level_terraces(
            ds, min_terrace_px=lv.min_terrace_px, min_step_height_m=lv.min_step_height_m,
            edge_threshold_sigma=lv.edge_threshold_sigma, order=1, robust=lv.robust)),
        ("assess_quality", lambda ds: assess_quality(
            ds, tip_change_threshold_sigma=q.tip_change_threshold_sigma,
            bad_pixel_fraction_limit=q.bad_pixel_fraction_limit,
            trace_mismatch_fraction_limit=q.trace_mismatch_fraction_limit)),
    ]
    times: dict[str, float] = {}
    cpu: dict[str, float] = {}
    outputs: dict[str, xr.Dataset] = {}
    ds: Any = None
    for name, fn in calls:
        t, c = time.perf_counter(), time.process_time()
        ds = fn(ds)
        times[name] = time.perf_counter() - t
        cpu[name] = time.process_time() - c
        outputs[name] = ds
    return times, outputs, cpu


def _snapshot(tag: str, outputs: dict[str, xr.Dataset]) -> dict[str, np.ndarray]:
    """Flat dict of every map and numeric attribute after every stage."""
    snap: dict[str, np.ndarray] = {}
    for name, ds in outputs.items():
        for var in ds.data_vars:
            snap[f"{tag}/{name}/var/{var}"] = np.asarray(ds[var].values)
        for key, val in ds.attrs.items():
            if key in ("processing_history", "source_file", "source_path"):
                continue
            if isinstance(val, str):
                snap[f"{tag}/{name}/str/{key}"] = np.array(val)
            else:
                arr = np.asarray(val)
                if arr.dtype.kind in "biuf":
                    snap[f"{tag}/{name}/attr/{key}"] = arr
    return snap


def _compare(ref: dict[str, np.ndarray], new: dict[str, np.ndarray],
             inexact: list[str] | None = None) -> list[str]:
    """Differences beyond tolerance; ``inexact`` collects the arrays that differ at all."""
    problems = []
    tags = {k.split("/")[0] for k in new}  # the size-frame pairs run this time
    ref = {k: v for k, v in ref.items() if k.split("/")[0] in tags
           and not k.endswith(("/source_file", "/source_path"))}
    for key in sorted(set(ref) | set(new)):
        if key not in ref or key not in new:
            problems.append(f"{key}: only in {'reference' if key in ref else 'new run'}")
            continue
        a, b = ref[key], new[key]
        kind = key.split("/")[2]
        if kind == "str":
            if str(a) != str(b):
                problems.append(f"{key}: {str(a)[:120]!r} != {str(b)[:120]!r}")
            continue
        if a.shape != b.shape:
            problems.append(f"{key}: shape {a.shape} != {b.shape}")
            continue
        if a.dtype.kind in "biu":
            if not np.array_equal(a, b):
                problems.append(f"{key}: {int((a != b).sum())} integer entries differ")
            continue
        if inexact is not None and not np.array_equal(a, b, equal_nan=True):
            inexact.append(key)
        af, bf = a.astype(np.float64), b.astype(np.float64)
        if not np.array_equal(np.isnan(af), np.isnan(bf)):
            problems.append(f"{key}: NaN pattern differs")
            continue
        fin = np.isfinite(af)
        if not fin.any():
            continue
        span = float(np.ptp(af[fin])) if af.size > 1 else 0.0
        scale = max(span, float(np.max(np.abs(af[fin]))), 1e-300)
        rtol = 1e-5 if a.dtype == np.float32 else 1e-6
        err = float(np.max(np.abs(af[fin] - bf[fin]))) / scale
        if err > rtol:
            problems.append(f"{key}: max relative difference {err:.3g} > {rtol:g}")
    return problems


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[256, 512, 1024])
    ap.add_argument("--frames", type=int, default=2, help="frames per size")
    ap.add_argument("--repeat", type=int, default=3, help="passes per frame (median taken)")
    ap.add_argument("--save", type=Path, help="save every stage's output to this .npz")
    ap.add_argument("--check", type=Path, help="compare every stage's output with this .npz")
    ap.add_argument("--profile", action="store_true", help="cProfile one pass at each size")
    ap.add_argument("--profile-sort", default="cumulative", help="pstats sort key")
    ap.add_argument("--noise-free", action="store_true",
                    help="frames without noise, line offsets, scars or feedback lag")
    args = ap.parse_args()

    from pipeline.config import parse_config

    cfg = parse_config({})
    frames = functools.partial(make_frames, noise=not args.noise_free)
    snap: dict[str, np.ndarray] = {}
    table: dict[int, dict[str, float]] = {}
    with tempfile.TemporaryDirectory() as tmp:
        for size in args.sizes:
            paths = frames(Path(tmp) / f"s{size}", args.frames, size, seed=3)
            per_stage: dict[str, list[float]] = {s: [] for s in STAGES}
            totals: list[float] = []
            cpu_totals: list[float] = []
            _run_frame(paths[0], cfg)  # warm-up (imports, FFT plans)
            for k, p in enumerate(paths):
                for _ in range(args.repeat):
                    times, outputs, cpu = _run_frame(p, cfg)
                    for s in STAGES:
                        per_stage[s].append(times[s])
                    totals.append(sum(times[s] for s in STAGES if s != "read"))
                    cpu_totals.append(sum(cpu[s] for s in STAGES if s != "read"))
                snap.update(_snapshot(f"{size}-{k}", outputs))
                if args.profile and k == 0:
                    import cProfile
                    import pstats

                    prof = cProfile.Profile()
                    prof.runcall(_run_frame, p, cfg)
                    pstats.Stats(prof).sort_stats(args.profile_sort).print_stats(40)
            table[size] = {s: statistics.median(v) * 1e3 for s, v in per_stage.items()}
            table[size]["stages total"] = statistics.median(totals) * 1e3
            table[size]["stages total, CPU"] = statistics.median(cpu_totals) * 1e3

    cols = list(table)
    print(f"\nper-stage time, ms (median of {args.frames} frames x {args.repeat} passes)")
    print(f"  {'stage':22s}" + "".join(f"{f'{s}²':>10s}" for s in cols))
    for s in (*STAGES, "stages total", "stages total, CPU"):
        print(f"  {s:22s}" + "".join(f"{table[c][s]:10.1f}" for c in cols))
    print("  ('stages total' leaves out read: the stages of process_frame after reading; wall "
          "time, and the CPU time of this process)")

    if args.save:
        np.savez_compressed(args.save, **{k.replace("/", "|"): v for k, v in snap.items()})
        print(f"saved {len(snap)} arrays to {args.save}")
    if args.check:
        with np.load(args.check) as f:
            ref = {k.replace("|", "/"): f[k] for k in f.files}
        inexact: list[str] = []
        problems = _compare(ref, snap, inexact)
        print(json.dumps({"compared": len(snap), "problems": len(problems),
                          "not_bit_identical": len(inexact)}))
        for msg in problems[:50]:
            print("  " + msg)
        if problems:
            raise SystemExit(1)


if __name__ == "__main__":
    main()
