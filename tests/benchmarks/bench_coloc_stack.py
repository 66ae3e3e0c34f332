"""Benchmark: colocalization of a z-stack, in 3-D, streamed plane by plane.

A 2-label, 2-channel 32 x 1024 x 1024 uint16 stack (tests/pair_scenes.py:
blurred structures, camera noise, 30 % leak). Targets, as ratios measured
in this run:

- the whole verdict (before and after coefficients, Costes thresholds, the
  noise-corrected r with matrix draws, randomisation with 200 rounds, the
  depth profile) at most 15x one ``numpy.corrcoef`` over the same voxels;
- peak memory of ``unmix coloc`` on the stack saved as an OME-TIFF: its
  resident set above that of the interpreter with the same libraries loaded,
  at most 4x the size of the stack, or bounded by a few planes when streaming
  (also printed in planes: run with several --planes to see that it does not
  grow with the stack).

    python tests/benchmarks/bench_coloc_stack.py [--planes 32] [--size 1024]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pair_scenes import measured_matrix, pair_scene  # noqa: E402
from timing import best_of  # noqa: E402


def _peak_rss_kib(command) -> int:
    """Peak resident set (KiB) of a command, from GNU time's %M (the command's own, measured after exec)."""
    run = subprocess.run(["/usr/bin/time", "-f", "%M", *command], check=True, stdout=subprocess.DEVNULL,
                         stderr=subprocess.PIPE, text=True)
    return int(run.stderr.strip().splitlines()[-1])


def main(argv=None) -> int:
    import tifffile

    from unmix.coloc.verdict import judge_pair, prepare_image

    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--planes", type=int, default=32)
    parser.add_argument("--size", type=int, default=1024)
    parser.add_argument("--rounds", type=int, default=200)
    args = parser.parse_args(argv)
    shape = (args.planes, args.size, args.size)
    start = time.perf_counter()
    scene = pair_scene(7, r=0.3, peak_a=2000, ratio=0.5, leak=0.3, shape=shape, psf_sigma=(2.5, 1.5, 1.5))
    stack = np.round(scene.raw).astype(np.uint16)
    matrix = measured_matrix(scene, 7)
    print(f"stack 2 x {shape[0]} x {shape[1]} x {shape[2]} uint16 ({stack.nbytes / 2**20:.0f} MiB), made in "
          f"{time.perf_counter() - start:.0f} s")

    baseline = best_of(2, lambda: np.corrcoef(stack[0].ravel(), stack[1].ravel())[0, 1])
    source = prepare_image(stack, matrix)
    judge_pair(prepare_image(stack[:, :1, :64, :64], matrix), ("A", "B"), rounds=19)  # load compiled kernels
    elapsed = best_of(1, lambda: judge_pair(source, ("A", "B"), rounds=args.rounds))
    result = judge_pair(source, ("A", "B"), rounds=args.rounds)
    print(f"numpy.corrcoef over the voxels: {baseline:.2f} s; 3-D verdict with {args.rounds} rounds: {elapsed:.1f} s "
          f"({result.verdict}, corrected r {result.after_corrected.r:.3f}, true {scene.true_r:.3f})")
    print(f"verdict / corrcoef: {elapsed / baseline:.1f} (target <= 15)")

    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "stack.ome.tif"
        tifffile.imwrite(path, stack, ome=True, metadata={"axes": "CZYX", "Channel": {"Name": list(matrix.channels)}})
        matrix_path = matrix.save(Path(folder) / "m.json")
        idle = _peak_rss_kib([sys.executable, "-c", "import numpy, scipy.fft, scipy.stats, skimage.filters, tifffile, zarr, dask.array, numba, "
                              "unmix.cli, unmix.coloc.verdict, unmix.engine.solver"])
        peak = _peak_rss_kib([sys.executable, "-m", "unmix.cli", "coloc", str(path), "--matrix", str(matrix_path),
                              "--labels", "A,B", "--rounds", str(args.rounds), "--quiet"])
        size_kib = path.stat().st_size / 1024
        print(f"unmix coloc peak RSS {peak / 1024:.0f} MiB, interpreter with its libraries {idle / 1024:.0f} MiB, "
              f"stack {size_kib / 1024:.0f} MiB")
        plane_kib = size_kib / args.planes
        print(f"(peak - interpreter) / stack: {(peak - idle) / size_kib:.2f} (target <= 4); in planes of the stack: "
              f"{(peak - idle) / plane_kib:.0f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
