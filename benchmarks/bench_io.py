"""Frame I/O, side by side in one run: xarray's netCDF backend against the h5py fast path.

A processed frame is written three times and read four times on its way through a batch (see
``pipeline/io/h5grid.py``). This prints, for one processed frame and one raw frame of each size,
the median time of writing and reading it through ``xarray`` (``to_netcdf`` /
``open_dataset(...).load()``, engine h5netcdf) and through :mod:`pipeline.io.h5grid`, and the
ratio; both paths give identical datasets (``tests/io/test_h5grid.py``).

Usage::

    OPENBLAS_NUM_THREADS=1 python benchmarks/bench_io.py            # 256², 512², 1024²
    python benchmarks/bench_io.py --sizes 512 --repeat 20
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline.io.h5grid import read_grid_file, write_grid_file
from pipeline.io.staging import netcdf_safe
from pipeline.model import make_height_frame, make_raw_frame, validate_raw_frame


def _frames(size: int) -> tuple[xr.Dataset, xr.Dataset]:
    """A raw frame (four float64 channels) and a processed frame with 60 attributes."""
    rng = np.random.default_rng(size)
    shape = (size, size)
    raw = validate_raw_frame(make_raw_frame(
        z=rng.normal(0, 1e-10, shape), current=1e-10 * (1 + 0.02 * rng.normal(size=shape)),
        z_backward=rng.normal(0, 1e-10, shape),
        current_backward=1e-10 * (1 + 0.02 * rng.normal(size=shape)),
        attrs={"mode": "constant-current", "bias_V": 0.5, "setpoint_A": 1e-10,
               "scan_size_x_m": 3e-8, "scan_size_y_m": 3e-8, "line_time_s": 0.08,
               "start_time": "2026-03-14T22:00:00", "frame_id": "f"}), source="f.nc")
    extra = {f"attr_{k:02d}_m": float(k) * 1e-10 for k in range(40)}
    extra.update({"status": "ok", "source_sha256": "ab" * 32, "work_function_eV": 4.6,
                  "terrace_offsets_m": np.array([0.0, 2.35e-10, 4.7e-10])})
    done = make_height_frame(raw, raw["z"].values, uncertainty=np.full(shape, 2e-12),
                             flags=np.zeros(shape, np.uint8), attrs=extra)
    return netcdf_safe(raw), netcdf_safe(done)


def _median_ms(fn: Callable[[], object], repeat: int) -> float:
    fn()
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times) * 1e3


def _xr_read(path: Path) -> xr.Dataset:
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        return ds.load()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[256, 512, 1024])
    ap.add_argument("--repeat", type=int, default=10)
    args = ap.parse_args()
    print("median ms per frame         xarray    h5grid   xarray/h5grid")
    with tempfile.TemporaryDirectory() as tmp:
        for size in args.sizes:
            for kind, ds in zip(("raw", "processed"), _frames(size), strict=True):
                a, b = Path(tmp) / "xr.nc", Path(tmp) / "fast.nc"
                rows = (
                    ("write", lambda ds=ds, a=a: ds.to_netcdf(a, engine="h5netcdf"),
                     lambda ds=ds, b=b: write_grid_file(b, ds)),
                    ("read", lambda a=a: _xr_read(a), lambda b=b: read_grid_file(b)),
                )
                for what, slow, fast in rows:
                    t_slow, t_fast = _median_ms(slow, args.repeat), _median_ms(fast, args.repeat)
                    print(f"  {size:4d}² {kind:9s} {what:5s}  {t_slow:8.1f}  {t_fast:8.1f}   "
                          f"{t_slow / t_fast:6.1f}")


if __name__ == "__main__":
    main()
