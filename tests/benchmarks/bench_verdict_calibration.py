"""Calibration of the colocalization verdict by simulation with known truth.

A seeded grid of simulated two-label fields (``tests/pair_scenes.py``: blurred
non-negative structures at least as large as the PSF, a camera with Poisson
shot noise, read noise, gain and offset) over

- brightness ratio B/A: 1, 0.1, 0.02
- leak of A into B's channel: 0, 0.1, 0.3, 0.6 (and 0.02 of B into A's,
  except with no leak at all)
- signal level (A's peak, electrons): low 100, mid 1,000, high 10,000
- true correlation of the labels: -0.2, 0, 0.2, 0.4

each with a matrix "measured" with a stated error (3 % + 0.002 per
coefficient) and a noise model off by 3 %. Every field goes through the
whole verdict (``unmix.coloc.verdict.analyse_pair``, alpha 0.05, min r 0.1).

True classes: "independent" (true r <= 0: any overlap verdict is false
overlap); "overlap, inflated" (true r >= 0.2 and bleed-through raises the
noise-free raw r by at least 0.05 above the true r); "overlap, not inflated"
(it raises it by less than 0.005); in between "overlap, slightly inflated"
(either answer is defensible; reported, not scored).

Prints the confusion table, the false-overlap rate on independent pairs
(target: at most alpha, with its binomial 95 % interval), the power to call
inflation, the coverage of the corrected r's interval, and the median and
worst |corrected after-r - true r| where the weaker label's structure SNR is
at least 10 (target: at most 0.05).

    python tests/benchmarks/bench_verdict_calibration.py [--seeds 6] [--size 256]
"""

from __future__ import annotations

import argparse
import itertools
import sys
import time
from collections import Counter, defaultdict
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pair_scenes import measured_matrix, mixed_truth_r, pair_scene, structure_snr  # noqa: E402

from unmix.coloc.verdict import VERDICTS, analyse_pair  # noqa: E402

RATIOS = (1.0, 0.1, 0.02)
LEAKS = (0.0, 0.1, 0.3, 0.6)
LEVELS = {"low": 100.0, "mid": 1000.0, "high": 10000.0}
TRUE_R = (-0.2, 0.0, 0.2, 0.4)
OVERLAP = {"persists", "inflated", "revealed"}


def true_class(r: float, inflation: float) -> str:
    if r <= 0:
        return "independent"
    if inflation >= 0.05:
        return "overlap, inflated"
    if inflation < 0.005:
        return "overlap, not inflated"
    return "overlap, slightly inflated"


def binomial_interval(k: int, n: int) -> tuple[float, float]:
    """Clopper-Pearson 95 % interval of a proportion (scipy.stats.beta)."""
    low = stats.beta.ppf(0.025, k, n - k + 1) if k else 0.0
    high = stats.beta.ppf(0.975, k + 1, n - k) if k < n else 1.0
    return float(low), float(high)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=6, help="fields per grid cell (6)")
    parser.add_argument("--size", type=int, default=256, help="field side in pixels (256)")
    parser.add_argument("--alpha", type=float, default=0.05)
    parser.add_argument("--min-r", type=float, default=0.1)
    args = parser.parse_args(argv)

    rows = []
    start = time.perf_counter()
    cells = list(itertools.product(RATIOS, LEAKS, LEVELS.items(), TRUE_R))
    for index, (ratio, leak, (level_name, peak), r) in enumerate(cells):
        for seed in range(args.seeds):
            run = 10_000 * index + seed
            scene = pair_scene(run, r=r, peak_a=peak, ratio=ratio, leak=leak, reverse_leak=0.02 if leak else 0.0,
                               shape=(args.size, args.size))
            matrix = measured_matrix(scene, run)
            result = analyse_pair(scene.raw, matrix, ("A", "B"), seed=run, alpha=args.alpha, min_r=args.min_r)
            corrected = result.after_corrected
            rows.append({
                "ratio": ratio, "leak": leak, "level": level_name, "r": r, "true_r": scene.true_r,
                "class": true_class(r, mixed_truth_r(scene) - scene.true_r), "verdict": result.verdict,
                "snr": structure_snr(scene), "corrected": corrected.r, "interval": corrected.interval,
            })
    elapsed = time.perf_counter() - start

    print(f"{len(rows)} simulated fields ({len(cells)} cells x {args.seeds} seeds, {args.size}^2 px) in "
          f"{elapsed:.0f} s; alpha {args.alpha}, min r {args.min_r}\n")
    verdicts = list(VERDICTS)
    classes = ["independent", "overlap, not inflated", "overlap, slightly inflated", "overlap, inflated"]
    table = defaultdict(Counter)
    for row in rows:
        table[row["class"]][row["verdict"]] += 1
    width = max(len(c) for c in classes)
    print("Confusion table (true class x verdict):")
    print(" " * width + "  " + "  ".join(f"{v:>18}" for v in verdicts) + "   total")
    for name in classes:
        counts = table[name]
        print(f"{name:<{width}}  " + "  ".join(f"{counts[v]:>18}" for v in verdicts) + f"   {sum(counts.values()):>5}")

    independent = [row for row in rows if row["class"] == "independent"]
    false = sum(row["verdict"] in OVERLAP for row in independent)
    low, high = binomial_interval(false, len(independent))
    print(f"\nFalse overlap on independent pairs: {false} of {len(independent)} = {false / len(independent):.3f} "
          f"(95 % {low:.3f} to {high:.3f}); target at most alpha = {args.alpha}")
    bright_dim = [row for row in independent if row["ratio"] == 0.02 and row["leak"] >= 0.3]
    false_bd = sum(row["verdict"] in OVERLAP for row in bright_dim)
    print(f"  of which bright into dim (B/A 0.02, leak >= 0.3): {false_bd} of {len(bright_dim)}")
    for level in LEVELS:
        subset = [row for row in independent if row["level"] == level]
        print(f"  signal {level}: {sum(row['verdict'] in OVERLAP for row in subset)} of {len(subset)}")

    inflated = [row for row in rows if row["class"] == "overlap, inflated"]
    called = sum(row["verdict"] == "inflated" for row in inflated)
    print(f"\nPower to call inflation (true class 'overlap, inflated'): {called} of {len(inflated)} = "
          f"{called / max(len(inflated), 1):.3f}")
    for level in LEVELS:
        subset = [row for row in inflated if row["level"] == level]
        if subset:
            print(f"  signal {level}: {sum(row['verdict'] == 'inflated' for row in subset)} of {len(subset)}; "
                  f"inconclusive {sum(row['verdict'] == 'inconclusive' for row in subset)}")
    for ratio in RATIOS:
        subset = [row for row in inflated if row["ratio"] == ratio]
        if subset:
            print(f"  B/A {ratio:g}: {sum(row['verdict'] == 'inflated' for row in subset)} of {len(subset)}; "
                  f"inconclusive {sum(row['verdict'] == 'inconclusive' for row in subset)}")
    kept = [row for row in rows if row["class"] == "overlap, not inflated"]
    wrongly = sum(row["verdict"] == "inflated" for row in kept)
    print(f"Overlap not inflated but called inflated: {wrongly} of {len(kept)}")

    with_interval = [row for row in rows if row["interval"] is not None]
    covered = sum(row["interval"][0] <= row["true_r"] <= row["interval"][1] for row in with_interval)
    low, high = binomial_interval(covered, len(with_interval))
    print(f"\nCorrected r's 95 % interval covers the field's true r: {covered} of {len(with_interval)} = "
          f"{covered / len(with_interval):.3f} (95 % {low:.3f} to {high:.3f})")
    for band, (lo, hi) in (("SNR < 3", (0, 3)), ("SNR 3-10", (3, 10)), ("SNR >= 10", (10, np.inf))):
        subset = [row for row in with_interval if lo <= row["snr"] < hi]
        if subset:
            inside = sum(row["interval"][0] <= row["true_r"] <= row["interval"][1] for row in subset)
            print(f"  {band}: {inside} of {len(subset)} = {inside / len(subset):.3f}")
    good = [row for row in rows if row["snr"] >= 10 and row["corrected"] is not None]
    errors = np.abs([row["corrected"] - row["true_r"] for row in good])
    print(f"\n|corrected after-r - true r| where SNR >= 10 ({len(good)} fields): median {np.median(errors):.4f}, "
          f"worst {errors.max():.4f} (target at most 0.05)")
    undefined = sum(row["corrected"] is None for row in rows)
    inconclusive = sum(row["verdict"] == "inconclusive" for row in rows)
    print(f"Corrected r undefined (a label without variance above its noise): {undefined}; inconclusive verdicts: "
          f"{inconclusive} of {len(rows)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
