"""Calibration: how often the non-linearity check flags linear controls of a textured specimen.

The check (slope over the bright half / slope over the dim half, flagged when its bootstrap 95 %
interval excludes 1 and it is off 1 by more than 5 %) is calibrated in tests/test_measure.py on
controls whose only signal is the label. Here the controls are the demo scenario's (a linear
camera; nuclei, filaments and puncta; uneven illumination; shot and read noise), simulated with
new seeds, with and without its diffuse autofluorescence, a smooth texture present in every channel
that no label models. Each measurement has six off-primary coefficients; the table counts how many
of them are flagged, with the Clopper-Pearson 95 % interval of the rate (Clopper & Pearson 1934,
Biometrika 26:404), and which coefficients they were.

    python tests/benchmarks/bench_linearity_specimen.py [--seeds 20] [--boot 200]
"""

from __future__ import annotations

import argparse
import collections

import numpy as np
from scipy import stats

from unmix.demo.scenario import _camera, load_scenario, simulate
from unmix.io.images import Image
from unmix.measure.controls import MeasureSettings, measure_matrix

FLAG = "slope over the bright half"


def controls_of(scenario, rng, autofluorescence: bool) -> tuple[dict, Image, Image]:
    """The demo's controls (three fields per label), unstained specimen and dark frame, from `rng`."""
    setup, camera = scenario.raw["scenario"], scenario.raw["camera"]
    shape, channels = tuple(setup["control_shape"]), tuple(scenario.channels)

    def image(data):
        return Image(data, "CYX", channels)

    controls = {label: [image(simulate(scenario, shape, [label], rng, autofluorescence=autofluorescence)[0])
                        for _ in range(setup["control_fields"])] for label in scenario.labels}
    unstained = image(simulate(scenario, shape, [], rng, autofluorescence=autofluorescence)[0])
    dark = image(np.stack([_camera(rng, np.zeros(shape), camera, shot_noise=False) for _ in channels]))
    return controls, unstained, dark


def clopper_pearson(k: int, n: int) -> tuple[float, float]:
    low = 0.0 if k == 0 else stats.beta.ppf(0.025, k, n - k + 1)
    high = 1.0 if k == n else stats.beta.ppf(0.975, k + 1, n - k)
    return float(low), float(high)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--boot", type=int, default=200)
    args = parser.parse_args()
    scenario = load_scenario()
    n_off = len(scenario.channels) * len(scenario.labels) - len(scenario.labels)
    print(f"{args.seeds} measurements per condition, {n_off} off-primary coefficients each, "
          f"{args.boot} bootstrap replicates")
    print(f"{'specimen':<34} {'flagged':>9} {'rate':>6}  {'95 % interval':<15} which")
    for autofluorescence in (False, True):
        flagged, which = 0, collections.Counter()
        for seed in range(args.seeds):
            rng = np.random.default_rng(1000 + seed)
            controls, unstained, dark = controls_of(scenario, rng, autofluorescence)
            matrix = measure_matrix(controls, unstained=unstained, dark=dark,
                                    settings=MeasureSettings(n_boot=args.boot, seed=seed))
            flags = [f for f in matrix.qc["flags"] if FLAG in f]
            flagged += len(flags)
            which.update(f.split(":")[0] for f in flags)
        total = args.seeds * n_off
        low, high = clopper_pearson(flagged, total)
        name = "structured autofluorescence" if autofluorescence else "no autofluorescence"
        print(f"{name:<34} {flagged:>4}/{total:<4} {flagged / total:6.3f}  {low:.3f}-{high:.3f}    "
              + ", ".join(f"{k} {v}" for k, v in which.most_common()))


if __name__ == "__main__":
    main()
