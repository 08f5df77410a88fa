"""Registration speed and accuracy against scikit-image, measured side by side in one run.

    python benchmarks/bench_registration.py [--size 256] [--upsample 20] [--repeat 7]

Peer: ``skimage.registration.phase_cross_correlation`` (the published upsampled-DFT method,
Guizar-Sicairos et al., Opt. Lett. 33, 156 (2008)) on the same inputs at the same upsample
factor. Ours is timed twice: the default (coarse pass on binned images + windowed normalised
template match, lattice peaks removed) and the like-for-like single pass (``refine=False``).

Two inputs with a known shift: ``periodic`` (a periodic random surface translated exactly by a
Fourier phase ramp, 5 % noise: the case the peer is built for, where the shifts must agree) and
``crops`` (two noisy crops of one larger smooth surface: edges do not wrap, as in real frames).
Printed per input and method: time per call, its ratio to the peer, the error against the known
shift and the difference from the peer's shift.

Times are the best of ``--repeat`` rounds of ``--calls`` calls, the methods interleaved round by
round so that machine load hits all alike. Set OPENBLAS_NUM_THREADS=1 on a shared machine: the
matrix-multiply DFTs use BLAS, and BLAS threads fighting over busy cores make single calls
erratic (for both programs).
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from scipy import ndimage as ndi
from skimage.registration import phase_cross_correlation

from pipeline.stages.registration import register_images

SHIFT = (7.35, -4.62)


def _periodic(size: int, shift: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """A periodic red-spectrum surface and its exact Fourier translation, both with noise."""
    rng = np.random.default_rng(1)
    k = np.hypot(np.fft.fftfreq(size)[:, None], np.fft.fftfreq(size)[None, :])
    z = np.fft.ifft2(np.fft.fft2(rng.normal(size=(size, size))) / (1 + (k / 0.05) ** 2) ** 0.5)
    ref = z.real / z.real.std()
    ky, kx = np.fft.fftfreq(size)[:, None], np.fft.fftfreq(size)[None, :]
    mov = np.fft.ifft2(np.fft.fft2(ref) * np.exp(-2j * np.pi * (ky * shift[0] + kx * shift[1])))
    return ref + rng.normal(0, 0.05, ref.shape), mov.real + rng.normal(0, 0.05, ref.shape)


def _crops(size: int, shift: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """Two noisy crops of one smooth random surface, the second displaced by ``shift``."""
    rng = np.random.default_rng(1)
    field = ndi.gaussian_filter(rng.normal(size=(4 * size, 4 * size)), 3.0, mode="wrap")
    coef = ndi.spline_filter(field / field.std(), order=3, mode="grid-wrap")
    yy, xx = np.mgrid[0:size, 0:size].astype(float)

    def crop(dy: float, dx: float) -> np.ndarray:
        z = ndi.map_coordinates(coef, [(yy - dy) / 2 + size, (xx - dx) / 2 + size], order=3,
                                mode="grid-wrap", prefilter=False)
        return z + rng.normal(0, 0.05, z.shape)

    return crop(0.0, 0.0), crop(*shift)


def _best_times(runners: dict[str, Callable[[], object]], repeat: int,
                calls: int) -> dict[str, float]:
    for fn in runners.values():  # warm caches (windows, kernels, FFT plans)
        fn()
    best = dict.fromkeys(runners, np.inf)
    for _ in range(repeat):
        for name, fn in runners.items():
            t0 = time.perf_counter()
            for _ in range(calls):
                fn()
            best[name] = min(best[name], (time.perf_counter() - t0) / calls)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=256)
    parser.add_argument("--upsample", type=int, default=20)
    parser.add_argument("--repeat", type=int, default=7)
    parser.add_argument("--calls", type=int, default=20)
    args = parser.parse_args()
    u = args.upsample
    print(f"{args.size} x {args.size}, upsample_factor {u}, true shift {SHIFT} px, "
          f"best of {args.repeat} x {args.calls} calls")
    print(f"{'input':9s} {'method':33s} {'ms/call':>8s} {'vs skimage':>10s} "
          f"{'|err| px':>9s} {'|d skimage| px':>14s}")
    for label, make in (("crops", _crops), ("periodic", _periodic)):
        ref, mov = make(args.size, SHIFT)
        methods: dict[str, Callable[[], tuple[float, float]]] = {
            # sign: skimage returns the shift that moves the moving image back (DESIGN.md §7)
            "skimage phase_cross_correlation": lambda r=ref, m=mov: tuple(
                -phase_cross_correlation(r, m, upsample_factor=u)[0]),
            "ours, default (refined)": lambda r=ref, m=mov: register_images(
                r, m, upsample_factor=u).shift_px,
            "ours, single pass (refine=False)": lambda r=ref, m=mov: register_images(
                r, m, upsample_factor=u, refine=False).shift_px,
        }
        best = _best_times(methods, args.repeat, args.calls)
        shifts = {name: np.asarray(fn()) for name, fn in methods.items()}
        peer = shifts["skimage phase_cross_correlation"]
        t_peer = best["skimage phase_cross_correlation"]
        for name, t in best.items():
            err = float(np.hypot(*(shifts[name] - SHIFT)))
            diff = float(np.hypot(*(shifts[name] - peer)))
            print(f"{label:9s} {name:33s} {1e3 * t:8.2f} {t / t_peer:9.2f}x {err:9.4f} "
                  f"{diff:14.4f}")


if __name__ == "__main__":
    main()
