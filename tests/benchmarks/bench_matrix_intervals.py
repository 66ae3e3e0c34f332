"""Coverage of the measured matrix's 95 % intervals when control fields differ.

Simulated single-label controls (tests/pair_scenes.py's structures and camera)
whose leak coefficient varies between fields with a standard deviation of 10 %
of its value (specimen and focus differences), measured with 2, 3 and 5 fields
per label. A correct 95 % interval of the coefficient (the mean over fields)
covers it in about 95 of 100 repetitions (binomial range 90 to 99). With
fewer than 3 fields the interval covers within-field sampling error only (the
matrix file says so), and is expected to fall short.

    python tests/benchmarks/bench_matrix_intervals.py [--repeats 100]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pair_scenes import control_fields  # noqa: E402

from unmix.measure.controls import MeasureSettings, measure_matrix  # noqa: E402


def coverage(n_fields: int, repeats: int, between_sd: float, leak: float = 0.3) -> tuple[int, float]:
    inside = 0
    widths = []
    for repeat in range(repeats):
        fields = control_fields(repeat * 100 + n_fields, n_fields, leak=leak, between_sd=between_sd)
        matrix = measure_matrix({"A": fields}, settings=MeasureSettings(n_boot=400, seed=repeat))
        low, high = matrix.ci95_low[1, 0], matrix.ci95_high[1, 0]
        inside += low <= leak <= high
        widths.append(high - low)
    return inside, float(np.mean(widths))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeats", type=int, default=100)
    args = parser.parse_args(argv)
    print(f"Leak 0.3, between-field SD 10 % of it; {args.repeats} repetitions each; target 90-99 covered\n")
    print("fields   covered   mean width   interval covers")
    for n_fields in (2, 3, 5):
        start = time.perf_counter()
        inside, width = coverage(n_fields, args.repeats, 0.1)
        scope = "sampling error only" if n_fields < 3 else "between-field variation too"
        print(f"{n_fields:>6}   {inside:>4}/{args.repeats}   {width:10.4f}   {scope}   ({time.perf_counter() - start:.0f} s)")
    inside, width = coverage(5, args.repeats, 0.0)
    print(f"\nNo between-field variation, 5 fields: {inside}/{args.repeats} covered, mean width {width:.4f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
