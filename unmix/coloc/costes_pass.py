"""Compiled pass of the Costes threshold search (numba); see :mod:`unmix.coloc.statistics`."""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def below_threshold_sums(entry, a, b, first, step, n_candidates):
    """Per candidate threshold T_j = first + j step: the sums (n, a, b, a^2, b^2, ab) of the pixels
    that enter the "below both thresholds" set at T_j, i.e. with T_(j-1) <= entry < T_j.

    A pixel is below both thresholds for T when entry < T; cumulative sums of
    the rows give each candidate's set, so every candidate's Pearson r costs
    O(1) after this single pass.
    """
    sums = np.zeros((n_candidates, 6))
    for i in range(entry.size):
        # entry < T_j  <=>  j >= floor((entry - first) / step) + 1
        j = int(np.floor((entry[i] - first) / step)) + 1
        if j < 0:
            j = 0
        if j >= n_candidates:
            continue  # above every candidate: never below both thresholds
        x = a[i]
        y = b[i]
        sums[j, 0] += 1.0
        sums[j, 1] += x
        sums[j, 2] += y
        sums[j, 3] += x * x
        sums[j, 4] += y * y
        sums[j, 5] += x * y
    return sums
