"""Benchmark: throughput of the unmixing kernel on one and on two Dask worker processes.

Target: two worker processes with one thread each give >= 1.6x the
throughput of one such worker on the kernel-bound case. Each task makes its
own pixels on the worker (so no data crosses the network) and unmixes them
several times (so the kernel, not the random numbers, dominates).

    python tests/benchmarks/bench_scaling.py [--tasks 16] [--megapixels 2]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

UNMIX_REPEATS = 8


def kernel_task(seed: int, megapixels: float) -> float:
    from unmix.engine.solver import Unmixer

    rng = np.random.default_rng(seed)
    matrix = np.array([[1.0, 0.3, 0.02], [0.12, 1.0, 0.35], [0.0, 0.04, 1.0], [0.05, 0.2, 0.5]])
    n = int(megapixels * 1e6)
    abundances = np.maximum(rng.normal(0, 200, size=(3, n)), 0).astype(np.float32)
    pixels = matrix.astype(np.float32) @ abundances + rng.normal(0, 10, (4, n)).astype(np.float32)
    unmixer = Unmixer(matrix)
    return float(sum(unmixer.unmix(pixels).sum() for _ in range(UNMIX_REPEATS)))


def throughput(n_workers: int, tasks: int, megapixels: float) -> float:
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        client.gather(client.map(kernel_task, range(n_workers), megapixels=0.01, pure=False))  # warm up
        start = time.perf_counter()
        client.gather(client.map(kernel_task, range(tasks), megapixels=megapixels, pure=False))
        return tasks * megapixels * UNMIX_REPEATS / (time.perf_counter() - start)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--tasks", type=int, default=16)
    parser.add_argument("--megapixels", type=float, default=2.0)
    args = parser.parse_args()
    one = throughput(1, args.tasks, args.megapixels)
    two = throughput(2, args.tasks, args.megapixels)
    print(f"one worker: {one:.1f} Mpx/s; two workers: {two:.1f} Mpx/s")
    print(f"scaling two / one: {two / one:.2f}  (target >= 1.6)")


if __name__ == "__main__":
    main()
