"""Pipeline speed, side by side in one run: against a plain peer, the I/O floor, and itself.

Prints, per frame and as ratios measured in the same run:

(a) the full default pipeline against a straightforward peer built from NumPy/SciPy/scikit-image
    calls on the same frames (feedback-error height, `numpy.linalg.lstsq` plane, row-by-row
    `np.polyfit` line levelling, `skimage.registration.phase_cross_correlation` against the
    previous frame, `scipy.ndimage.shift`, an h5py write);
(b) against the I/O floor: reading the raw frame and writing a height map, no processing;
(c) scaling with run length (time and peak memory) and with workers (1 vs 2);
(d) scaling with frame size.

Usage::

    python benchmarks/bench_pipeline.py                 # 512² frames, quick scaling set
    python benchmarks/bench_pipeline.py --full          # run length 20/100/400, sizes to 2048²

Each measurement runs in a fresh subprocess so peak memory (max RSS, including worker
processes) is its own. For (a) and (b) every contender runs on a short and a long run of the
same frames, alternating, ``--repeat`` times; two per-frame figures are printed from the median
times: the *whole run* (long-run time / frames, start-up included, what one run costs) and the
*marginal* cost ((long − short) / (extra frames): start-up, imports and worker-pool launch
cancel, what each further frame of an overnight run costs).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
#: every contender computes on one thread per process ("one worker" = one core); the
#: pipeline's worker processes set the same for themselves
ONE_THREAD = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


# --------------------------------------------------------------------------------------------
# data
# --------------------------------------------------------------------------------------------


def make_frames(folder: Path, n: int, size: int, seed: int = 0, *, noise: bool = True
                ) -> list[Path]:
    """``n`` constant-current frames of ``size``² pixels, both traces, with drift, steps and
    adsorbates; with ``noise`` also the usual flaws: 2 % current noise, 2 pm z noise, 20 pm line
    offsets, three scars and a lagging feedback loop. (Shared with ``bench_stages.py``.)"""
    from pipeline.io.writers import write_raw_netcdf
    from pipeline.simulate import random_surface, simulate_constant_current_frame

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    surface = random_surface(rng, extent_m=(-30e-9, 30e-9, -30e-9, 30e-9), n_steps=3,
                             corrugation_m=2e-11, n_adsorbates=40)
    t0 = datetime(2026, 3, 14, 22, 0, 0)
    line_time = 0.02 * size / 128
    flaws = ({"current_noise_fraction": 0.02, "z_noise_m": 2e-12, "line_offsets_m": 2e-11,
              "scars": 3, "feedback_time_constant_s": line_time / size} if noise else {})
    paths = []
    for k in range(n):
        start = t0 + timedelta(seconds=k * size * line_time * 1.05)
        raw, _ = simulate_constant_current_frame(
            surface, rng=rng, phi_eV=4.6, setpoint_A=1e-10, bias_V=0.5, nx=size, ny=size,
            size_x_m=30e-9, size_y_m=30e-9, line_time_s=line_time, start_time=start,
            run_t0=t0, drift_velocity_m_per_s=(1e-11, -0.5e-11), frame_id=f"f{k:04d}",
            **flaws)
        paths.append(write_raw_netcdf(raw, folder / f"f{k:04d}.nc"))
    return paths


# --------------------------------------------------------------------------------------------
# the three contenders (each run in a child process)
# --------------------------------------------------------------------------------------------


def run_pipeline(folder: Path, store: Path, workers: int) -> None:
    from pipeline.batch import run_batch
    from pipeline.config import parse_config

    executor = "serial" if workers == 1 else "processes"
    cfg = parse_config({"run": {"executor": executor, "workers": workers}})
    summary = run_batch(folder, store, cfg)
    if summary.failures:
        raise SystemExit(f"pipeline failures: {summary.failures[:3]}")


def run_io_floor(folder: Path, store: Path) -> None:
    import h5netcdf

    from pipeline.io.readers import find_inputs, read_file

    with h5netcdf.File(store, "w") as out:
        for p in find_inputs(folder):
            raw = read_file(p)
            g = out.create_group(raw.attrs["frame_id"])
            g.dimensions = {"y": raw.sizes["y"], "x": raw.sizes["x"]}
            g.create_variable("height", ("y", "x"), data=raw["z"].values.astype(np.float32))


def run_peer(folder: Path, store: Path) -> None:
    import h5py
    import xarray as xr
    from scipy import constants, ndimage
    from skimage.registration import phase_cross_correlation

    two_kappa = 2 * np.sqrt(2 * constants.m_e * 4.6 * constants.e) / constants.hbar
    previous = None
    with h5py.File(store, "w") as out:
        for p in sorted(folder.glob("*.nc")):
            with xr.open_dataset(p, engine="h5netcdf") as ds:
                z = ds["z"].values.astype(float)
                cur = ds["current"].values.astype(float)
                setpoint = float(ds.attrs["setpoint_A"])
            h = z + np.log(np.clip(cur / setpoint, 1e-6, None)) / two_kappa
            ny, nx = h.shape
            yy, xx = np.mgrid[:ny, :nx]
            a = np.column_stack([xx.ravel(), yy.ravel(), np.ones(h.size)])
            coef, *_ = np.linalg.lstsq(a, h.ravel(), rcond=None)
            h = h - (a @ coef).reshape(h.shape)
            cols = np.arange(nx)
            for row in range(ny):  # the classic row-by-row line levelling
                h[row] -= np.polyval(np.polyfit(cols, h[row], 1), cols)
            if previous is not None:
                shift, _, _ = phase_cross_correlation(previous, h, upsample_factor=20)
                h_reg = ndimage.shift(h, shift, order=1, mode="nearest")
            else:
                h_reg = h
            previous = h
            out.create_dataset(p.stem, data=h_reg.astype(np.float32))


def child(mode: str, folder: str, store: str, workers: int) -> None:
    t = time.perf_counter()
    if mode == "pipeline":
        run_pipeline(Path(folder), Path(store), workers)
    elif mode == "io":
        run_io_floor(Path(folder), Path(store))
    else:
        run_peer(Path(folder), Path(store))
    seconds = time.perf_counter() - t
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    print(json.dumps({"seconds": seconds, "maxrss_mb": max(own, kids) / 1024,
                      "rss_total_mb": (own + kids * max(workers - 1, 0)) / 1024}))


def measure(mode: str, folder: Path, workers: int = 1) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "out.h5"
        res = subprocess.run([sys.executable, str(HERE), "--child", mode, str(folder),
                              str(store), str(workers)], capture_output=True, text=True,
                             env={**os.environ, **ONE_THREAD})
    if res.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{res.stderr[-3000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------------------------------
# main
# --------------------------------------------------------------------------------------------


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--child", nargs=4, metavar=("MODE", "FOLDER", "STORE", "WORKERS"),
                    help=argparse.SUPPRESS)
    ap.add_argument("--size", type=int, default=512, help="frame size for (a), (b)")
    ap.add_argument("--frames", type=int, default=24, help="frames of the long run of (a), (b)")
    ap.add_argument("--repeat", type=int, default=2, help="runs of each contender in (a), (b)")
    ap.add_argument("--full", action="store_true", help="run lengths 20/100/400, sizes to 2048")
    args = ap.parse_args()
    if args.child:
        mode, folder, store, workers = args.child
        child(mode, folder, store, int(workers))
        return
    if args.frames < 6:
        ap.error("--frames must be at least 6 (a short run of a third of them, and at least four "
                 "frames more for the marginal cost)")

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        n, size = args.frames, args.size
        n_short = max(2, n // 3)
        long_run = tmp / f"run{size}"
        paths = make_frames(long_run, n, size)
        short_run = tmp / f"run{size}-short"
        short_run.mkdir()
        for p in paths[:n_short]:
            shutil.copy(p, short_run / p.name)
        contenders = (("ours", "pipeline", 1), ("peer", "peer", 1), ("floor", "io", 1),
                      ("two", "pipeline", 2))
        times: dict[tuple[str, int], list[float]] = {}
        for _ in range(args.repeat):  # alternate, so a slow spell of the machine hits all
            for key, mode, workers in contenders:
                for folder, m in ((short_run, n_short), (long_run, n)):
                    times.setdefault((key, m), []).append(
                        measure(mode, folder, workers)["seconds"])
        med = {k: statistics.median(v) for k, v in times.items()}
        whole = {k: med[(k, n)] / n * 1e3 for k, _, _ in contenders}
        marginal = {k: (med[(k, n)] - med[(k, n_short)]) / (n - n_short) * 1e3
                    for k, _, _ in contenders}
        print(f"\n(a, b) {size}² frames, ms per frame (medians of {args.repeat}); whole run = "
              f"{n} frames, marginal = frames {n_short + 1}..{n}")
        print("                          whole run   marginal")
        for key, label in (("ours", "isogap, 1 worker"), ("peer", "peer (numpy/skimage)"),
                           ("floor", "I/O floor"), ("two", "isogap, 2 workers")):
            print(f"  {label:22s} {whole[key]:9.1f}  {marginal[key]:9.1f}")
        for label, a, b in (("isogap / peer", "ours", "peer"), ("isogap / floor", "ours", "floor"),
                            ("speed-up 1 -> 2 workers", "ours", "two")):
            print(f"  {label:24s} {whole[a] / whole[b]:7.2f}  {marginal[a] / marginal[b]:9.2f}")

        lengths = (20, 100, 400) if args.full else (10, 40)
        lsize = 256
        print(f"\n(c) run length, {lsize}² frames, one worker")
        print("  frames   s/frame   peak MB")
        base = None
        for m in lengths:
            f = tmp / f"len{m}"
            make_frames(f, m, lsize, seed=1)
            r = measure("pipeline", f)
            base = base or r
            print(f"  {m:6d}   {r['seconds'] / m:7.3f}   {r['maxrss_mb']:7.0f}   "
                  f"(time/frame ×{r['seconds'] / m / (base['seconds'] / lengths[0]):.2f}, "
                  f"memory ×{r['maxrss_mb'] / base['maxrss_mb']:.2f} vs {lengths[0]})")
        r2 = measure("pipeline", f, workers=2)  # the longest run once more, on 2 workers
        print(f"  {m:6d}   {r2['seconds'] / m:7.3f}   {r2['rss_total_mb']:7.0f}   (2 workers: "
              f"whole-run speed-up {r['seconds'] / r2['seconds']:.2f}; memory: all processes)")

        sizes = (256, 512, 1024, 2048) if args.full else (256, 512, 1024)
        print("\n(d) frame size, 4 frames, one worker")
        print("  size     s/frame   s/Mpixel   peak MB")
        for s in sizes:
            f = tmp / f"size{s}"
            make_frames(f, 4, s, seed=2)
            r = measure("pipeline", f)
            print(f"  {s:5d}²  {r['seconds'] / 4:8.3f}   {r['seconds'] / 4 / (s * s / 1e6):8.3f}"
                  f"   {r['maxrss_mb']:7.0f}")


if __name__ == "__main__":
    main()
