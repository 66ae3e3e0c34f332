"""Benchmark: the exact NNLS kernel against the plain least-squares matmul.

Targets (C=4, K=3, 16 Mpx float32 with realistic noise): exact NNLS takes at
most 3x the time of ``pinv(M) @ Y`` on the same array, and is at least
1000x faster than a per-pixel scipy.optimize.nnls loop (extrapolated from a
sample). C=32, K=8 is reported too. Prints ratios measured in this run.

    python tests/benchmarks/bench_solve.py [--megapixels 16]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from timing import best_of
from scipy.optimize import nnls

from unmix.engine.solver import Unmixer
from unmix.threads import THREADS


def case(n_channels, n_labels, n_pixels, rng):
    matrix = np.eye(n_channels, n_labels) + 0.25 * rng.random((n_channels, n_labels))
    # Realistic: each label is absent (exactly 0) in about half of the pixels.
    abundances = np.maximum(rng.normal(0, 200, size=(n_labels, n_pixels)), 0).astype(np.float32)
    pixels = (matrix.astype(np.float32) @ abundances) + rng.normal(0, 10, (n_channels, n_pixels)).astype(np.float32)
    unmixer = Unmixer(matrix)
    pinv = np.linalg.pinv(matrix).astype(np.float32)
    unmixer.unmix(pixels[:, :1000])  # compile / load the cached kernel
    t_matmul = best_of(3, lambda: pinv @ pixels)
    # Both sides use every core: BLAS threads for the matmul, kernel threads for NNLS.
    t_nnls = best_of(3, lambda: unmixer.unmix(pixels, threads=THREADS))
    sample = 2000
    start = time.perf_counter()
    for i in range(sample):
        nnls(matrix, pixels[:, i].astype(np.float64))
    t_scipy = (time.perf_counter() - start) / sample * n_pixels
    infeasible = float(np.mean(np.any(pinv @ pixels[:, :100000] < 0, axis=0)))
    print(f"C={n_channels} K={n_labels}, {n_pixels / 1e6:.0f} Mpx float32 "
          f"({100 * infeasible:.0f} % of pixels need the constraint)")
    print(f"  pinv(M) @ Y: {t_matmul:.3f} s; exact NNLS: {t_nnls:.3f} s; scipy nnls loop (extrapolated): {t_scipy:.0f} s")
    print(f"  NNLS / matmul: {t_nnls / t_matmul:.2f} (target <= 3);  scipy loop / NNLS: {t_scipy / t_nnls:.0f} (target >= 1000)")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--megapixels", type=float, default=16)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    n = int(args.megapixels * 1e6)
    case(4, 3, n, rng)
    case(32, 8, n // 4, rng)


if __name__ == "__main__":
    main()
