"""Benchmark: `unmix apply` end to end against the I/O floor, and CLI start-up.

Targets: a batch of 8 files, each a 4-channel 16 x 1024 x 1024 uint16
OME-TIFF (1 GB in all), takes at most 1.5x the time of one Python process
that only reads the same files and writes a float32 3-channel result for each
with tifffile (the I/O floor), with peak resident memory under 1.5 GB; both
write into a fresh folder, three times in turns, and the fastest run of each
counts (apply also syncs its outputs to disk, the floor does not);
``unmix --help`` starts within 3x ``python -c 'import numpy'``. Prints ratios
measured in this run.

    python tests/benchmarks/bench_apply.py [--files 8] [--planes 16] [--size 1024]
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from timing import best_of

FLOOR = """
import sys, numpy as np, tifffile
for path in sys.argv[2:]:
    data = tifffile.imread(path)
    out = np.empty((data.shape[0], 3) + data.shape[2:], np.float32)
    out[:] = data[:, :3]
    tifffile.imwrite(sys.argv[1] + "/" + path.rsplit("/", 1)[-1] + ".floor.tif", out)
"""


def make_batch(folder: Path, files: int, planes: int, size: int) -> tuple[list[str], Path]:
    import tifffile

    from unmix.matrix import BleedThroughMatrix

    rng = np.random.default_rng(0)
    matrix = np.array([[1.0, 0.05, 0.0], [0.2, 1.0, 0.05], [0.05, 0.35, 1.0], [0.01, 0.1, 0.4]])
    channels = ["c0", "c1", "c2", "c3"]
    paths = []
    for f in range(files):
        abundances = np.maximum(rng.normal(0, 300, size=(3, planes, size, size)), 0).astype(np.float32)
        pixels = np.tensordot(matrix.astype(np.float32), abundances, axes=(1, 0)) + 100
        pixels += rng.normal(0, 8, pixels.shape).astype(np.float32)
        data = np.clip(pixels, 0, 4095).astype(np.uint16).transpose(1, 0, 2, 3)  # Z C Y X
        path = folder / f"stack_{f}.ome.tif"
        tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                         metadata={"axes": "ZCYX", "Channel": {"Name": channels}})
        paths.append(str(path))
    m = BleedThroughMatrix(kind="measured", channels=tuple(channels), labels=("A", "B", "C"),
                           primary={"A": "c0", "B": "c1", "C": "c2"}, matrix=matrix,
                           background=np.full(4, 100.0), background_source="dark",
                           saturation=np.full(4, 4095.0))
    return paths, m.save(folder / "matrix.json")


def peak_rss_of(command: list[str]) -> tuple[float, int]:
    """Wall time and peak resident memory (bytes) of a child process.

    Dirty pages left by the previous run are flushed first (not timed), so
    that no run pays for writing out another's files.
    """
    os.sync()
    start = time.perf_counter()
    completed = subprocess.run(["/usr/bin/time", "-f", "%M", *command], capture_output=True, text=True)
    elapsed = time.perf_counter() - start
    if completed.returncode != 0:
        raise RuntimeError(completed.stderr)
    return elapsed, int(completed.stderr.strip().splitlines()[-1]) * 1024


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--files", type=int, default=8)
    parser.add_argument("--planes", type=int, default=16)
    parser.add_argument("--size", type=int, default=1024)
    args = parser.parse_args()
    unmix = [sys.executable, "-m", "unmix.cli"]
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        paths, matrix = make_batch(tmp, args.files, args.planes, args.size)
        total = sum(Path(p).stat().st_size for p in paths)
        # Floor and apply take turns, each writing into a fresh folder that is removed (and the
        # removal synced) before the next run: both sides meet the same page-cache state.
        floors, runs = [], []
        for attempt in range(3):
            out = tmp / f"floor{attempt}"
            out.mkdir()
            floors.append(peak_rss_of([sys.executable, "-c", FLOOR, str(out), *paths]))
            shutil.rmtree(out)
            out = tmp / f"out{attempt}"
            runs.append(peak_rss_of([*unmix, "apply", "--matrix", str(matrix), *paths, "-o", str(out), "--quiet"]))
            shutil.rmtree(out)
        floor, floor_rss = min(t for t, _ in floors), max(r for _, r in floors)
        # For reference: the floor rewriting its own files of a run before (files that exist
        # already are often faster to write again than new ones).
        out = tmp / "rewritten"
        out.mkdir()
        rewrite = min(peak_rss_of([sys.executable, "-c", FLOOR, str(out), *paths])[0] for _ in range(3))
        apply_time = min(t for t, _ in runs)
        apply_rss = max(r for _, r in runs)
        numpy_start = best_of(3, lambda: subprocess.run([sys.executable, "-c", "import numpy"], check=True))
        help_start = best_of(3, lambda: subprocess.run([*unmix, "--help"], check=True, capture_output=True))
    print(f"batch: {args.files} files of 4 x {args.planes} x {args.size} x {args.size} uint16, {total / 2**30:.2f} GiB")
    print(f"I/O floor: {floor:.2f} s; unmix apply: {apply_time:.2f} s")
    print(f"time ratio apply / floor: {apply_time / floor:.2f}  (target <= 1.5)")
    print(f"for reference, the floor rewriting its own files: {rewrite:.2f} s, ratio {apply_time / rewrite:.2f}")
    print(f"peak resident memory of apply: {apply_rss / 2**30:.2f} GiB  (target < 1.5); floor process: "
          f"{floor_rss / 2**30:.2f} GiB")
    print(f"start-up ratio 'unmix --help' / 'import numpy': {help_start / numpy_start:.2f}  (target <= 3)")


if __name__ == "__main__":
    main()
