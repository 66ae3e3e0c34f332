"""Benchmark: peak resident memory of `unmix apply` on one large input.

Target: a 4 GB input (4 channels x 128 x 2048 x 2048 uint16 by default) is
processed with peak resident memory under 1.5 GB. The input is written plane
by plane, so making it needs little memory either.

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


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--planes", type=int, default=128)
    parser.add_argument("--size", type=int, default=2048)
    args = parser.parse_args()
    from unmix.matrix import BleedThroughMatrix

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        source = tmp / "large.ome.tif"
        make_input(source, args.planes, args.size)
        matrix = BleedThroughMatrix(
            kind="measured", channels=("c0", "c1", "c2", "c3"), labels=("A", "B", "C"),
            primary={"A": "c0", "B": "c1", "C": "c2"},
            matrix=np.array([[1.0, 0.05, 0.0], [0.2, 1.0, 0.05], [0.05, 0.35, 1.0], [0.01, 0.1, 0.4]]),
            background=np.full(4, 100.0), background_source="dark", saturation=np.full(4, 4095.0))
        matrix_path = matrix.save(tmp / "matrix.json")
        start = time.perf_counter()
        run = subprocess.run(["/usr/bin/time", "-f", "%M", sys.executable, "-m", "unmix.cli", "apply", "--matrix",
                              str(matrix_path), str(source), "-o", str(tmp / "out"), "--quiet"],
                             capture_output=True, text=True)
        elapsed = time.perf_counter() - start
        if run.returncode != 0:
            raise SystemExit(run.stderr)
        peak = int(run.stderr.strip().splitlines()[-1]) * 1024
        size = source.stat().st_size
    print(f"input: {size / 2**30:.2f} GiB; apply: {elapsed:.0f} s")
    print(f"peak resident memory: {peak / 2**30:.2f} GiB = {peak / size:.2f} x the input  (target < 1.5 GB)")


if __name__ == "__main__":
    main()
