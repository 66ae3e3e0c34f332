"""Shared timing helper of the benchmark scripts."""

from __future__ import annotations

import time


def best_of(repeats, function):
    """Shortest wall time of `repeats` calls: the least disturbed by other load on a shared machine."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)
