"""Randomised comparison of the exact NNLS solver with scipy.optimize.nnls, per condition band.

Problems: random C x K matrices (C 2 to 64, K 1 to 16) with a chosen
column-scaled condition number from 1 to the limit 1e6 and columns given
random scales over four decades; pixels that mix non-negative abundances
(many exactly zero) with noise, plus a zero pixel, one negative in every
channel and one of noise alone per matrix; float32 and float64 pixels. Our
abundances are kept in float64 (``dtype=np.float64``) so that the solver,
not the output type, is compared. Reported per decade of the condition
number:

- objective mismatches: our ``||y - M a||^2`` above scipy's by more than
  ``10 cond eps ||y||^2`` (the rounding a backward-stable solver is allowed);
- scipy worse: the same the other way round (scipy's answer not optimal);
- solution mismatches: ``||D (a - a_scipy)||`` (D the column norms) above
  ``100 eps cond (||D a|| + cond ||r||)``, the least-squares perturbation
  bound of the answer itself (Lawson & Hanson 1974, ch. 9);
- negative abundances (there must be none).

    python tests/benchmarks/compare_nnls.py [--matrices 600] [--pixels 20] [--seed 0]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.optimize import nnls

from unmix.engine.solver import MAX_LABELS, Unmixer
from unmix.matrix import CONDITION_LIMIT, scaled_condition_number

EPS = np.finfo(np.float64).eps


def random_matrix(rng, n_channels, n_labels, condition):
    u, _ = np.linalg.qr(rng.normal(size=(n_channels, n_channels)))
    v, _ = np.linalg.qr(rng.normal(size=(n_labels, n_labels)))
    matrix = u[:, :n_labels] @ np.diag(np.geomspace(1.0, 1.0 / condition, n_labels)) @ v.T
    return matrix * 10.0 ** rng.uniform(-2, 2, n_labels)


def random_pixels(rng, matrix, n):
    k = matrix.shape[1]
    norms = np.linalg.norm(matrix, axis=0)
    abundances = np.maximum(rng.normal(0.3, 1.0, size=(k, n)), 0) * 100 / norms[:, None]
    pixels = matrix @ abundances + rng.normal(0, 3.0, size=(matrix.shape[0], n))
    pixels[:, 0] = 0.0
    pixels[:, 1] = -np.abs(pixels[:, 1])
    pixels[:, 2] = rng.normal(0, 3.0, matrix.shape[0])
    return pixels


def compare(rng, matrices: int, pixels: int, label_counts, pixel_types, output=np.float64) -> dict:
    """Counts per decade of the condition number: problems, objective and solution mismatches,
    scipy worse, negative abundances. `output` float32 adds to the allowed objective excess
    what moving the optimum to float32 costs (first order vanishes at the optimum: the square
    of the change of M a)."""
    rows = {}
    for index in range(matrices):
        k = int(rng.choice(label_counts))
        c = int(rng.integers(max(k, 2), 65))
        matrix = random_matrix(rng, c, k, 10 ** rng.uniform(0, 6) if k > 1 else 1.0)
        condition = scaled_condition_number(matrix)
        if condition > CONDITION_LIMIT:
            continue
        y_all = random_pixels(rng, matrix, pixels).astype(pixel_types[index % len(pixel_types)])
        ours = Unmixer(matrix).unmix(y_all, dtype=output).astype(np.float64)
        norms = np.linalg.norm(matrix, axis=0)
        row = rows.setdefault(int(np.log10(condition)), dict.fromkeys(
            ("problems", "objective", "scipy worse", "solution", "negative"), 0))
        for i in range(y_all.shape[1]):
            y = y_all[:, i].astype(np.float64)
            reference, _ = nnls(matrix, y, maxiter=100 * k)
            f_ours = float(np.sum((y - matrix @ ours[:, i]) ** 2))
            f_ref = float(np.sum((y - matrix @ reference) ** 2))
            rounding = np.linalg.norm(matrix, 2) * np.linalg.norm(reference) * np.finfo(output).eps
            allowed = 10 * condition * EPS * float(y @ y) + (4 * rounding**2 if output != np.float64 else 0.0) + 1e-300
            residual = np.linalg.norm(y - matrix @ reference)
            bound = (100 * condition * (EPS * (np.linalg.norm(norms * reference) + condition * residual))
                     + 4 * np.finfo(output).eps * np.linalg.norm(norms * reference) + 1e-300)
            row["problems"] += 1
            row["objective"] += f_ours - f_ref > allowed
            row["scipy worse"] += f_ref - f_ours > allowed
            row["solution"] += np.linalg.norm(norms * (ours[:, i] - reference)) > bound
            row["negative"] += bool(ours[:, i].min() < 0)
    return rows


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--matrices", type=int, default=600)
    parser.add_argument("--pixels", type=int, default=20)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    start = time.perf_counter()
    rows = compare(np.random.default_rng(args.seed), args.matrices, args.pixels, range(1, MAX_LABELS + 1),
                   (np.float32, np.float64))
    elapsed = time.perf_counter() - start
    print(f"{sum(r['problems'] for r in rows.values())} problems (seed {args.seed}), {elapsed:.0f} s")
    print(f"{'cond band':>14} {'problems':>9} {'objective':>10} {'scipy worse':>12} {'solution':>9} {'negative':>9}")
    for band in sorted(rows):
        r = rows[band]
        print(f"{f'1e{band}-1e{band + 1}':>14} {r['problems']:>9} {r['objective']:>10} {r['scipy worse']:>12} "
              f"{r['solution']:>9} {r['negative']:>9}")


if __name__ == "__main__":
    main()
