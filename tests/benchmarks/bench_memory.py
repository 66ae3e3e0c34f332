"""Benchmark: peak resident memory of `unmix apply` on one large input.

Target: a 4 GB input (4 channels x 128 x 2048 x 2048 uint16 by default) is
processed with peak resident memory under 1.5 GB. The input is written plane
by plane, so making it needs little memory either.

Then two checks of the memory budget (``--memory``): the peak of a 1.5 GiB
stack with the machine's cores reported as 2 and as 16 (ratio near 1: the
budget, not the core count, bounds the blocks in flight), and one plane of
3 x 8192 x 8192 (400 MB) under ``--memory`` 32M, 128M and 512M (cut into
strips): the peak above that of a tiny input (the libraries alone) stays
within the budget.

    python tests/benchmarks/bench_memory.py [--planes 128] [--size 2048]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def make_input(path: Path, planes: int, size: int) -> None:
    import tifffile

    rng = np.random.default_rng(0)

    def pages():
        for _ in range(planes):
            for _ in range(4):
                yield rng.integers(90, 3000, size=(size, size), dtype=np.uint16)

    tifffile.imwrite(path, pages(), shape=(planes, 4, size, size), dtype=np.uint16, ome=True, bigtiff=True,
                     photometric="minisblack", metadata={"axes": "ZCYX", "Channel": {"Name": ["c0", "c1", "c2", "c3"]}})


MATRIX = dict(kind="measured", labels=("A", "B", "C"), primary={"A": "c0", "B": "c1", "C": "c2"},
              background_source="dark")


def peak_of_apply(matrix_path: Path, source: Path, out: Path, *extra, cores: int | None = None) -> tuple[int, float]:
    """Peak resident bytes and seconds of one `unmix apply` run (with os.cpu_count() reporting `cores`)."""
    run_cli = "import runpy; runpy.run_module('unmix.cli', run_name='__main__')"
    if cores is not None:
        run_cli = f"import os; os.cpu_count = lambda: {cores}; " + run_cli
    start = time.perf_counter()
    run = subprocess.run(["/usr/bin/time", "-f", "%M", sys.executable, "-c", run_cli, "apply", "--matrix",
                          str(matrix_path), str(source), "-o", str(out), "--quiet", *extra],
                         capture_output=True, text=True)
    elapsed = time.perf_counter() - start
    if run.returncode != 0:
        raise SystemExit(run.stderr)
    return int(run.stderr.strip().splitlines()[-1]) * 1024, elapsed


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--planes", type=int, default=128)
    parser.add_argument("--size", type=int, default=2048)
    args = parser.parse_args()
    import tifffile

    from unmix.matrix import BleedThroughMatrix

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        source = tmp / "large.ome.tif"
        make_input(source, args.planes, args.size)
        matrix = BleedThroughMatrix(
            channels=("c0", "c1", "c2", "c3"),
            matrix=np.array([[1.0, 0.05, 0.0], [0.2, 1.0, 0.05], [0.05, 0.35, 1.0], [0.01, 0.1, 0.4]]),
            background=np.full(4, 100.0), saturation=np.full(4, 4095.0), **MATRIX)
        matrix_path = matrix.save(tmp / "matrix.json")
        peak, elapsed = peak_of_apply(matrix_path, source, tmp / "out")
        size = source.stat().st_size
        print(f"input: {size / 2**30:.2f} GiB; apply: {elapsed:.0f} s")
        print(f"peak resident memory: {peak / 2**30:.2f} GiB = {peak / size:.2f} x the input  (target < 1.5 GB)")
        source.unlink()

        stack = tmp / "stack.ome.tif"
        make_input(stack, 48, 2048)
        peaks = {cores: peak_of_apply(matrix_path, stack, tmp / f"cores{cores}", cores=cores)[0]
                 for cores in (2, 16)}
        print(f"{stack.stat().st_size / 2**20:.0f} MiB stack: peak {peaks[2] / 2**30:.2f} GiB with 2 cores, "
              f"{peaks[16] / 2**30:.2f} GiB with 16: ratio {peaks[16] / peaks[2]:.2f} (target near 1)")
        stack.unlink()

        plane = tmp / "plane.ome.tif"
        rng = np.random.default_rng(1)
        tifffile.imwrite(plane, (rng.integers(90, 3000, size=(8192, 8192), dtype=np.uint16) for _ in range(3)),
                         shape=(3, 8192, 8192), dtype=np.uint16, ome=True, photometric="minisblack",
                         metadata={"axes": "CYX", "Channel": {"Name": ["c0", "c1", "c2"]}})
        three = BleedThroughMatrix(channels=("c0", "c1", "c2"),
                                   matrix=np.array([[1.0, 0.05, 0.0], [0.2, 1.0, 0.05], [0.05, 0.35, 1.0]]),
                                   background=np.full(3, 100.0), saturation=np.full(3, 4095.0), **MATRIX)
        three_path = three.save(tmp / "three.json")
        tiny = tmp / "tiny.ome.tif"
        tifffile.imwrite(tiny, np.full((3, 16, 16), 100, np.uint16), ome=True, photometric="minisblack",
                         metadata={"axes": "CYX", "Channel": {"Name": ["c0", "c1", "c2"]}})
        baseline = min(peak_of_apply(three_path, tiny, tmp / f"tiny{i}")[0] for i in range(2))  # libraries alone
        for budget in (32, 128, 512):
            peak, _ = peak_of_apply(three_path, plane, tmp / f"plane{budget}", "--memory", f"{budget}M")
            print(f"one 3 x 8192^2 plane ({plane.stat().st_size / 2**20:.0f} MiB) under --memory {budget}M: peak "
                  f"{peak / 2**20:.0f} MiB, {(peak - baseline) / 2**20:.0f} MiB above a 16 x 16 input's "
                  f"{baseline / 2**20:.0f} MiB: {(peak - baseline) / (budget << 20):.2f} x the budget (target <= 1)")


if __name__ == "__main__":
    main()
