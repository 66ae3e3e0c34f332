"""Compiled saturation pass over one block of a stack (numba); see :mod:`unmix.measure.levels`.

While a stack is unmixed block by block, each block is also masked where any
channel reaches its saturation level, and the top of every channel's
histogram (maximum, and how many pixels sit at it) is kept, from which the
input's own saturation level follows exactly at the end of the pass. Each
loop below is a plain vectorisable reduction or comparison in the pixel type
(about 5 times faster than numpy's passes with full-size temporaries).
"""

from __future__ import annotations

from numba import njit


@njit(cache=True, nogil=True)
def mask_and_peaks(block, levels, mask, maxima, at_maxima, counts):
    """For `block` (C, N): `mask` (N,) uint8 set to 1 where any channel is at or above its
    level; per channel the maximum of the finite pixels, the number of pixels at it and the
    number of pixels that are not NaN (NaN never compares, so NaN pixels are skipped)."""
    n_channels, n_pixels = block.shape
    for i in range(n_pixels):
        mask[i] = 0
    for c in range(n_channels):
        row = block[c]
        # Kept in the pixel type (a float accumulator would slow integer data down 5-fold);
        # `top != top` lets a NaN first pixel be replaced.
        top = row[0]
        for i in range(n_pixels):
            v = row[i]
            top = v if (v > top) | (top != top) else top
        at_top = 0
        valid = 0
        for i in range(n_pixels):
            at_top += row[i] == top
            valid += row[i] == row[i]
        level = levels[c]
        for i in range(n_pixels):
            mask[i] |= row[i] >= level
        maxima[c] = top
        at_maxima[c] = at_top
        counts[c] = valid
