"""Benchmark: `measure` on four 4 x 2048 x 2048 uint16 controls.

Targets: measuring (bootstrap included) takes at most 10x the time of just
reading the same files, both timed in one process; peak memory above the
import baseline stays under 6x the size of one control. Prints the ratios.

    python tests/benchmarks/bench_measure.py [--size 2048]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from timing import best_of

CHANNELS = ("c0", "c1", "c2", "c3")


def make_controls(folder: Path, size: int) -> dict:
    """Four simulated single-label controls (invented data), uncompressed OME-TIFF."""
    import tifffile
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(0)
    matrix = np.array([[1, .05, .01, 0], [.2, 1, .08, .01], [.05, .3, 1, .1], [.01, .05, .25, 1]])
    controls = {}
    for k in range(4):
        spots = np.zeros((size, size), np.float32)
        n = size * size // 400
        spots[rng.integers(0, size, n), rng.integers(0, size, n)] = rng.uniform(0.5, 1.5, n)
        truth = gaussian_filter(spots, 1.5)
        truth *= 1500 / truth.max()
        data = np.empty((4, size, size), np.uint16)
        for c in range(4):
            expected = 100 + matrix[c, k] * truth
            data[c] = np.clip(rng.poisson(expected) + rng.normal(0, 5, expected.shape), 0, 4095)
        path = folder / f"control_{k}.ome.tif"
        tifffile.imwrite(path, data, ome=True, metadata={"axes": "CYX", "Channel": {"Name": list(CHANNELS)}})
        controls[f"L{k}"] = [str(path)]
    return controls


def _status_kib(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def peak_memory_child(controls_json: str) -> None:
    """Run in a fresh process: print the peak RSS above the baseline, in bytes.

    The baseline is taken after importing the library and compiling its
    kernels on a tiny control (start-up cost, not measuring cost); the peak
    resident set size (VmHWM) is reset to it through /proc/self/clear_refs.
    """
    import tifffile  # noqa: F401

    from unmix.io.images import Image
    from unmix.measure.controls import MeasureSettings, measure_files, measure_matrix

    rng = np.random.default_rng(1)
    tiny = np.zeros((4, 64, 64))
    tiny[:, 20:40, 20:40] = 1000
    warm = Image((100 + tiny + rng.normal(0, 5, tiny.shape)).astype(np.uint16), "CYX", CHANNELS)
    measure_matrix({"L": [warm]}, settings=MeasureSettings(n_boot=100, min_pixels=10))
    Path("/proc/self/clear_refs").write_text("5")
    baseline = _status_kib("VmRSS") * 1024
    measure_files(json.loads(controls_json))
    peak = _status_kib("VmHWM") * 1024
    print(peak - baseline)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--size", type=int, default=2048)
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        peak_memory_child(args.child)
        return
    import tifffile

    from unmix.measure.controls import measure_files

    with tempfile.TemporaryDirectory() as tmp:
        controls = make_controls(Path(tmp), args.size)
        paths = [p for ps in controls.values() for p in ps]
        control_bytes = 4 * args.size * args.size * 2
        # Warm the page cache, then time plain reading against measuring.
        for path in paths:
            tifffile.imread(path)
        read = best_of(3, lambda: [tifffile.imread(p) for p in paths])
        measure = best_of(2, lambda: measure_files(controls))
        child = subprocess.run([sys.executable, __file__, "--child", json.dumps(controls)],
                               capture_output=True, text=True, check=True)
        extra = int(child.stdout.strip().splitlines()[-1])
    print(f"controls: 4 x (4 x {args.size} x {args.size}) uint16, {control_bytes / 2**20:.0f} MiB each")
    print(f"read all four: {read:.3f} s; measure (1000 bootstrap replicates): {measure:.3f} s")
    print(f"time ratio measure / read: {measure / read:.2f}  (target <= 10)")
    print(f"peak memory above import baseline: {extra / 2**20:.0f} MiB = "
          f"{extra / control_bytes:.2f} x one control  (target < 6)")


if __name__ == "__main__":
    main()
