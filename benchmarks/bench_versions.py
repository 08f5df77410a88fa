"""This checkout against another git revision: the full pipeline on the same frames, side by side.

The other revision is checked out into a temporary git worktree; each contender runs in its own
subprocess with ``PYTHONPATH`` pointing at its tree (one BLAS thread per process), alternating,
``--repeat`` times, on 1 and 2 workers. Prints the median whole-run time per frame and the
ratio other/this (above 1: this checkout is faster).

Usage::

    python benchmarks/bench_versions.py --against HEAD~5
    python benchmarks/bench_versions.py --against 6952c1c --frames 24 --size 512 --repeat 3
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

from bench_pipeline import ONE_THREAD, make_frames  # the same frames, one thread each

HERE = Path(__file__).resolve()
ROOT = HERE.parents[1]
BENCH = HERE.parent / "bench_pipeline.py"


def _seconds(tree: Path, folder: Path, workers: int) -> float:
    with tempfile.TemporaryDirectory() as tmp:
        res = subprocess.run(
            [sys.executable, str(BENCH), "--child", "pipeline", str(folder), f"{tmp}/s.h5",
             str(workers)], capture_output=True, text=True,
            env={**os.environ, **ONE_THREAD, "PYTHONPATH": str(tree)})
    if res.returncode != 0:
        raise SystemExit(f"{tree}: pipeline failed\n{res.stderr[-3000:]}")
    return float(json.loads(res.stdout.strip().splitlines()[-1])["seconds"])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--against", required=True, help="git revision to compare with")
    ap.add_argument("--frames", type=int, default=24)
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        other = Path(tmp) / "other"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", "-q", str(other),
                        args.against], check=True)
        try:
            folder = Path(tmp) / "frames"
            make_frames(folder, args.frames, args.size)
            times: dict[tuple[str, int], list[float]] = {}
            for _ in range(args.repeat):
                for name, tree in (("other", other), ("this", ROOT)):
                    for workers in (1, 2):
                        times.setdefault((name, workers), []).append(
                            _seconds(tree, folder, workers))
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force",
                            str(other)], check=False)
    med = {k: statistics.median(v) / args.frames * 1e3 for k, v in times.items()}
    print(f"\n{args.frames} frames of {args.size}², ms per frame (whole run, medians of "
          f"{args.repeat})")
    print(f"  workers   {args.against:>12s}   this checkout   {args.against}/this")
    for workers in (1, 2):
        a, b = med[("other", workers)], med[("this", workers)]
        print(f"  {workers:7d}   {a:12.1f}   {b:13.1f}   {a / b:8.2f}")


if __name__ == "__main__":
    main()
