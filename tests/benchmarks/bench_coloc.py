"""Benchmark: Costes thresholds and the randomisation test on a 2048 x 2048 float32 pair.

Targets, as ratios to one Pearson r by ``numpy.corrcoef`` on the same pair
(measured in this run): the Costes threshold search <= 10x; one
randomisation round <= 3x (all toroidal shifts come from one FFT
cross-correlation, so a round's cost is that work shared by the default 200
rounds, plus the correlation length).

    python tests/benchmarks/bench_coloc.py [--size 2048] [--rounds 200]
"""

from __future__ import annotations

import argparse

import numpy as np
from timing import best_of


def main():
    from scipy import ndimage

    from unmix.coloc import statistics as coloc
    parser = argparse.ArgumentParser()
    parser.add_argument("--size", type=int, default=2048)
    parser.add_argument("--rounds", type=int, default=200)
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    shape = (args.size, args.size)
    common = ndimage.gaussian_filter(rng.normal(size=shape), 4).astype(np.float32)
    a = (100 + 4000 * common + rng.normal(0, 5, shape)).astype(np.float32)
    b = (80 + 3000 * common + 3000 * ndimage.gaussian_filter(rng.normal(size=shape), 4)
         + rng.normal(0, 5, shape)).astype(np.float32)
    coloc.costes_thresholds(a[:64, :64], b[:64, :64])  # compile / load the cached kernel
    pearson_time = best_of(3, lambda: np.corrcoef(a.ravel(), b.ravel())[0, 1])
    costes_time = best_of(3, lambda: coloc.costes_thresholds(a, b))
    randomisation_time = best_of(2, lambda: coloc.randomisation_p_value(a, b, rounds=args.rounds, seed=0))
    per_round = randomisation_time / args.rounds
    print(f"{args.size} x {args.size} float32 pair")
    print(f"numpy.corrcoef Pearson r: {pearson_time * 1e3:.1f} ms; Costes search: {costes_time * 1e3:.1f} ms; "
          f"randomisation, {args.rounds} rounds: {randomisation_time * 1e3:.0f} ms")
    print(f"Costes / Pearson: {costes_time / pearson_time:.2f} (target <= 10)")
    print(f"one randomisation round / Pearson: {per_round / pearson_time:.2f} (target <= 3)")


if __name__ == "__main__":
    main()
