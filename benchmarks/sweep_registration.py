"""Frame-pair registration on varied simulated surfaces: how often it is right, used, or wrong.

    OPENBLAS_NUM_THREADS=1 python benchmarks/sweep_registration.py [--pairs 80] [--seed 1000]

An accuracy sweep, not a timing. Each pair is two consecutive simulated 256² constant-current
frames (30 nm) of one random Au(111)-like staircase, drawn per pair: 1-3 steps, 0/2/5/10/20/40
adsorbates on the 60 nm surface (a quarter of them in the window), an atomic corrugation of
0, 10, 20 or 40 pm, 1, 2 or 5 pm z noise and a drift of up to ±30 pm/s on each axis. The true
shift is the simulator's drift times the frame interval. A registration counts as right within
0.15 px of it, and as used at a confidence of at least the drift model's default cut (0.3).
Printed per adsorbate count: pairs, right, used, right and used, and wrong but used (the case
that must not happen: such a pair enters the drift model), with the wrong-but-used pairs
listed with their errors in units of the reported standard uncertainties.
"""

from __future__ import annotations

import argparse

import numpy as np

RIGHT_PX = 0.15
ADSORBATES = (0, 2, 5, 10, 20, 40)


def pair(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Two z maps, the true feature displacement (px) and the adsorbate count of one pair."""
    from pipeline.simulate import random_surface, simulate_frame_pair

    rng = np.random.default_rng(seed)
    n_ads = int(rng.choice(ADSORBATES))
    v = tuple(float(c) for c in rng.uniform(-3e-11, 3e-11, 2))
    corrugation = float(rng.choice([0.0, 1e-11, 2e-11, 4e-11]))
    z_noise = float(rng.choice([1e-12, 2e-12, 5e-12]))
    surface = random_surface(rng, extent_m=(-30e-9, 30e-9, -30e-9, 30e-9),
                             n_steps=int(rng.integers(1, 4)), corrugation_m=corrugation,
                             n_adsorbates=n_ads)
    a, b, truth = simulate_frame_pair(surface, rng, drift_velocity_m_per_s=v, z_noise_m=z_noise)
    return a, b, truth, n_ads


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--pairs", type=int, default=80)
    ap.add_argument("--seed", type=int, default=1000, help="seed of the first pair")
    args = ap.parse_args()

    from pipeline.config import DriftConfig
    from pipeline.stages.registration import register_images

    cut = DriftConfig().min_confidence
    counts = {n: np.zeros(5, int) for n in ADSORBATES}
    wrong_used = []
    for seed in range(args.seed, args.seed + args.pairs):
        a, b, truth, n_ads = pair(seed)
        r = register_images(a, b, upsample_factor=20)
        err = np.subtract(r.shift_px, truth)
        right = bool(np.hypot(*err) < RIGHT_PX)
        used = r.confidence >= cut
        counts[n_ads] += [1, right, used, right and used, (not right) and used]
        if used and not right:
            sigma = err / np.array([r.uncertainty_y_px, r.uncertainty_x_px])
            wrong_used.append(f"seed {seed}: error {np.hypot(*err):.2f} px "
                              f"({sigma[0]:+.1f}, {sigma[1]:+.1f} sd), confidence "
                              f"{r.confidence:.2f}")
    print(f"{'adsorbates':>10} {'pairs':>6} {'right':>6} {'used':>6} {'right+used':>11} "
          f"{'wrong+used':>11}")
    for n, c in counts.items():
        print(f"{n:>10} {c[0]:>6} {c[1]:>6} {c[2]:>6} {c[3]:>11} {c[4]:>11}")
    total = sum(counts.values())
    print(f"{'all':>10} {total[0]:>6} {total[1]:>6} {total[2]:>6} {total[3]:>11} {total[4]:>11}")
    for line in wrong_used:
        print("  wrong but used:", line)


if __name__ == "__main__":
    main()
