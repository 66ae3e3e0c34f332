"""Benchmark: chromatic registration of four 2048 x 2048 channels of a bead image.

Target: measuring the registration (bead counting in every channel, the
windows' phase correlations, the shift's error from the windows' quarters)
takes at most 5x the time of reading the file, both timed in this process
(best of several runs). Prints the ratio.

    python tests/benchmarks/bench_registration.py [--size 2048]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
from timing import best_of

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))


def main() -> None:
    import tifffile

    from fault_scenes import bead_field
    from unmix.io.images import read_image
    from unmix.measure.registration import fit_from_beads

    parser = argparse.ArgumentParser()
    parser.add_argument("--size", type=int, default=2048)
    args = parser.parse_args()
    shifts = [(0.0, 0.0), (0.43, -0.71), (1.27, 0.18), (-0.62, 2.09)]
    data = bead_field(0, shifts, shape=(args.size, args.size), beads=args.size * args.size // 20000)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "beads.ome.tif"
        tifffile.imwrite(path, data, ome=True, metadata={"axes": "CYX", "Channel": {"Name": list("abcd")}})
        image = read_image(path)  # also warms the page cache
        fit_from_beads([image])   # and the first-call imports
        read = best_of(10, lambda: read_image(path))
        fit = best_of(10, lambda: fit_from_beads([image]))
        registration = fit_from_beads([image])
    error = np.abs(registration.shifts[:, 1:] + np.array(shifts)).max()
    print(f"bead image: 4 x {args.size} x {args.size} uint16, {data.nbytes / 2**20:.0f} MiB")
    print(f"read: {read:.3f} s; registration: {fit:.3f} s; largest error of a shift: {error:.3f} px")
    print(f"time ratio registration / read: {fit / read:.2f}  (target <= 5)")


if __name__ == "__main__":
    main()
