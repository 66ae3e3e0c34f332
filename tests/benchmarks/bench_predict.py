"""Benchmark: predicting an 8-label x 32-channel set-up at 0.5 nm resolution.

Target: interactive, well under a second here (the plugin recomputes on every
change). Printed against a floor measured in the same run: sampling one
Gaussian curve per label and per channel curve on the same grid with numpy,
the least work any prediction must do.

    python tests/benchmarks/bench_predict.py
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
from timing import best_of


def description_text(n_labels: int = 8, n_channels: int = 32) -> str:
    """An invented spectral-detector set-up: four lasers, 32 detection bands of 10 nm."""
    lines = ['[description]\nformat = "unmix-description"\nversion = 1\nacquisition = "simultaneous"\n']
    for k in range(n_labels):
        peak = 420 + 35 * k
        lines.append(f'[[label]]\nname = "L{k}"\nexcitation = {{ peak_nm = {peak}, fwhm_nm = 40, shoulder = 0.2 }}\n'
                     f'emission = {{ peak_nm = {peak + 25}, fwhm_nm = 45, shoulder = 0.3 }}\n'
                     f'extinction = 80000\nquantum_yield = 0.6\n')
    lasers = (405.0, 488.0, 561.0, 640.0)
    for c in range(n_channels):
        centre = 430 + 10 * c
        lines.append(f'[[channel]]\nname = "d{c}"\nsource = {{ laser_nm = {lasers[c % 4]}, power_mw = 2.0 }}\n'
                     f'emission_filter = {{ band = "{centre}/10" }}\ndetector = {{ model = "pmt" }}\n')
    return "\n".join(lines)


def main():
    from unmix.optics.description import load_description
    from unmix.optics.prediction import predict
    from unmix.optics.spectra import Grid

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "spectral.toml"
        path.write_text(description_text())
        predict(load_description(path))  # warm imports
        total = best_of(5, lambda: predict(load_description(path)))
        description = load_description(path)
        compute = best_of(5, lambda: predict(description))
    nm = Grid().nm
    floor = best_of(5, lambda: [np.exp(-0.5 * ((nm - 500.0 - i) / 20.0) ** 2) for i in range(8 * 2 + 32 * 4)])
    print(f"8 labels x 32 channels, {nm.size} wavelengths (0.5 nm)")
    print(f"load + predict: {total * 1e3:.1f} ms; predict alone: {compute * 1e3:.1f} ms  (target: well under 1000 ms)")
    print(f"ratio predict / curve-sampling floor: {compute / floor:.1f}")


if __name__ == "__main__":
    main()
