"""Benchmark: the exact NNLS kernels against the plain least-squares matmul.

Targets (float32 pixels with realistic noise, each label absent in about
half of the pixels): exact NNLS takes at most 2x the time of ``pinv(M) @ Y``
on the same array at C=4, K=3 (16 Mpx), at most 5x at C=32, K=8 and at most
8x at C=32, K=12 (4 Mpx); C=64, K=16 (1 Mpx) is reported. At C=4, K=3 it is
also at least 1000x faster than a per-pixel scipy.optimize.nnls loop
(extrapolated from a sample). Both sides use every core (BLAS threads for the
matmul, kernel threads for NNLS); each time is the best of several runs.
Prints ratios measured in this run.

    python tests/benchmarks/bench_solve.py [--megapixels 16] [--repeats 5]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from timing import best_of
from scipy.optimize import nnls

from unmix.engine.solver import Unmixer
from unmix.threads import THREADS

CASES = [  # channels, labels, share of --megapixels, target ratio to the matmul
    (4, 3, 1.0, 2.0),
    (32, 8, 0.25, 5.0),
    (32, 12, 0.25, 8.0),
    (64, 16, 1 / 16, None),
]


def case(n_channels, n_labels, n_pixels, target, repeats, rng):
    matrix = np.eye(n_channels, n_labels) + 0.25 * rng.random((n_channels, n_labels))
    abundances = np.maximum(rng.normal(0, 200, size=(n_labels, n_pixels)), 0).astype(np.float32)
    pixels = (matrix.astype(np.float32) @ abundances) + rng.normal(0, 10, (n_channels, n_pixels)).astype(np.float32)
    start = time.perf_counter()
    unmixer = Unmixer(matrix)
    unmixer.unmix(pixels[:, :1000])  # the support table, and the cached kernel loaded
    t_setup = time.perf_counter() - start
    pinv = np.linalg.pinv(matrix).astype(np.float32)
    t_matmul = best_of(repeats, lambda: pinv @ pixels)
    t_nnls = best_of(repeats, lambda: unmixer.unmix(pixels, threads=THREADS))
    infeasible = float(np.mean(np.any(pinv @ pixels[:, :100000] < 0, axis=0)))
    print(f"C={n_channels} K={n_labels}, {n_pixels / 1e6:g} Mpx float32 ({100 * infeasible:.0f} % of pixels need "
          f"the constraint); solver set-up {t_setup:.2f} s")
    goal = f" (target <= {target:g})" if target else ""
    print(f"  pinv(M) @ Y: {t_matmul:.3f} s; exact NNLS: {t_nnls:.3f} s; NNLS / matmul: {t_nnls / t_matmul:.2f}{goal}")
    if n_labels == 3:
        sample = 2000
        start = time.perf_counter()
        for i in range(sample):
            nnls(matrix, pixels[:, i].astype(np.float64))
        t_scipy = (time.perf_counter() - start) / sample * n_pixels
        print(f"  scipy nnls loop (extrapolated): {t_scipy:.0f} s; scipy loop / NNLS: {t_scipy / t_nnls:.0f} "
              "(target >= 1000)")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--megapixels", type=float, default=16)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    for n_channels, n_labels, share, target in CASES:
        case(n_channels, n_labels, int(args.megapixels * 1e6 * share), target, args.repeats, rng)


if __name__ == "__main__":
    main()
