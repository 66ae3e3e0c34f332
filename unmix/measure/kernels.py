"""Compiled per-pixel passes of the measurement (numba).

Measuring is a few arithmetic operations per pixel, so in numpy it is
dominated by temporaries: every mask, shifted sum and gathered column is a
full-size array, and accumulating ~9 + 6C block sums costs one ``bincount``
pass each. One fused loop instead reads each pixel once, flags it, computes
its proxy and adds it to its block's sums, with no full-size temporary; it
brought measuring four 4 x 2048 x 2048 controls from about 60x to about 11x
the time of reading them (``tests/benchmarks/bench_measure.py``).

The kernels are compiled on first use and cached on disk (``cache=True``).
The statistics they compute are those described in :mod:`unmix.measure.controls`.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def field_statistics(stack, background, levels, primary, threshold, check_finite, row_start, row_stop,
                     edges, block_size, n_stats, per_channel_start):
    """One pass over rows [row_start, row_stop) of every plane: selection and block sums together.

    Flags saturated and non-finite pixels, sums every channel over the valid
    pixels, computes the neighbour-mean proxy of the primary channel, and adds
    each usable pixel (proxy above `threshold`, valid) to the sums of its
    spatial block. Rows outside the range are only read as neighbours, so the
    rows of a stack can be split among threads (the kernel releases the GIL).

    Block columns (see ``unmix.measure.controls``): n, Sz, Sx, Szx, Sxx, then n_g, Sx_g
    for the groups g = 0, 1, 2 of pixels whose proxy lies below `edges[0]`, between
    `edges[0]` and `edges[1]`, between `edges[1]` and `edges[2]` (group 3, above, is the
    total minus these), then per channel blocks of C columns: Sy, Szy, Sxy, Syy, Sy_0,
    Sy_1, Sy_2.

    Returns
    -------
    stats : float64 (n_blocks, n_stats), blocks in raster order over (Y, X)
    n_signal : int   pixels whose proxy is above the threshold
    saturated_signal : int64 (C,) signal pixels at or above each channel's level
    channel_sums : float64 (C,) background-subtracted sums over valid pixels
    n_valid : int    pixels finite and unsaturated in every channel
    n_nonfinite : int
    """
    n_channels, n_planes, ny, nx = stack.shape
    n_rows = row_stop - row_start
    blocks_x = (nx + block_size - 1) // block_size
    blocks_y = (ny + block_size - 1) // block_size
    stats = np.zeros((blocks_y * blocks_x, n_stats), np.float64)
    saturated_signal = np.zeros(n_channels, np.int64)
    channel_sums = np.zeros(n_channels, np.float64)
    # Per pixel: 0 valid, 1 saturated in some channel, >= 2 non-finite in some channel.
    state = np.zeros((n_rows, nx), np.uint8)
    column = np.empty(nx, np.float64)
    n_signal = 0
    n_valid = 0
    n_nonfinite = 0
    bp = background[primary]
    for plane in range(n_planes):
        state[:, :] = 0
        # Branch-free flagging and full sums over contiguous rows vectorise;
        # the invalid pixels (few) are taken off the sums afterwards.
        for c in range(n_channels):
            level = levels[c]
            if check_finite:
                total = 0.0
                for i in range(n_rows):
                    row = stack[c, plane, row_start + i]
                    flags = state[i]
                    for x in range(nx):
                        v = row[x]
                        if np.isfinite(v):
                            flags[x] |= np.uint8(v >= level)
                            total += v
                        else:
                            flags[x] |= np.uint8(2)
                channel_sums[c] += total
            else:
                # Integer pixels: compare and add in integers (3x faster than in floats).
                integer_level = np.int64(np.ceil(min(level, 4.0e18)))
                integer_total = np.int64(0)
                for i in range(n_rows):
                    row = stack[c, plane, row_start + i]
                    flags = state[i]
                    for x in range(nx):
                        v = np.int64(row[x])
                        flags[x] |= np.uint8(v >= integer_level)
                        integer_total += v
                channel_sums[c] += float(integer_total)
        plane_valid = 0
        for i in range(n_rows):
            flags = state[i]
            for x in range(nx):
                if flags[x] == 0:
                    plane_valid += 1
                elif flags[x] >= 2:
                    n_nonfinite += 1
                else:
                    for c in range(n_channels):
                        channel_sums[c] -= stack[c, plane, row_start + i, x]
        n_valid += plane_valid
        for c in range(n_channels):
            channel_sums[c] -= background[c] * plane_valid
        for y in range(max(row_start, 1), min(row_stop, ny - 1)):
            above = stack[primary, plane, y - 1]
            centre = stack[primary, plane, y]
            below = stack[primary, plane, y + 1]
            flags = state[y - row_start]
            block_row = (y // block_size) * blocks_x
            # Column sums of the 3 rows (a vectorised loop), then a 3-wide window.
            for x in range(nx):
                column[x] = float(above[x]) + centre[x] + below[x]
            for x in range(1, nx - 1):
                z = (column[x - 1] + column[x] + column[x + 1] - centre[x]) / 8.0 - bp
                if not z > threshold or flags[x] >= 2:
                    continue
                if check_finite and not np.isfinite(z):  # a NaN/inf neighbour
                    continue
                n_signal += 1
                if flags[x] != 0:
                    for c in range(n_channels):
                        if stack[c, plane, y, x] >= levels[c]:
                            saturated_signal[c] += 1
                    continue
                block = block_row + x // block_size
                p = centre[x] - bp
                group = (z >= edges[0]) + (z >= edges[1]) + (z >= edges[2])
                stats[block, 0] += 1.0
                stats[block, 1] += z
                stats[block, 2] += p
                stats[block, 3] += z * p
                stats[block, 4] += p * p
                if group < 3:
                    stats[block, 5 + 2 * group] += 1.0
                    stats[block, 6 + 2 * group] += p
                for c in range(n_channels):
                    yc = stack[c, plane, y, x] - background[c]
                    base = per_channel_start + c
                    stats[block, base] += yc
                    stats[block, base + n_channels] += z * yc
                    stats[block, base + 2 * n_channels] += p * yc
                    stats[block, base + 3 * n_channels] += yc * yc
                    if group < 3:
                        stats[block, base + (4 + group) * n_channels] += yc
    return stats, n_signal, saturated_signal, channel_sums, n_valid, n_nonfinite


@njit(cache=True, nogil=True)
def proxy_sample(stack, background, primary, threshold, row_step):
    """Neighbour-mean proxies above `threshold` on every `row_step`-th row: a sample
    for the edges of the intensity groups, cheap next to the full pass."""
    n_channels, n_planes, ny, nx = stack.shape
    out = np.empty(n_planes * (ny // row_step + 1) * nx, np.float64)
    n = 0
    bp = background[primary]
    for plane in range(n_planes):
        for y in range(1, ny - 1, row_step):
            for x in range(1, nx - 1):
                total = (float(stack[primary, plane, y - 1, x - 1]) + stack[primary, plane, y - 1, x]
                         + stack[primary, plane, y - 1, x + 1] + stack[primary, plane, y, x - 1]
                         + stack[primary, plane, y, x + 1] + stack[primary, plane, y + 1, x - 1]
                         + stack[primary, plane, y + 1, x] + stack[primary, plane, y + 1, x + 1])
                z = total / 8.0 - bp
                if z > threshold and np.isfinite(z):
                    out[n] = z
                    n += 1
    return out[:n].copy()


@njit(cache=True, nogil=True)
def histogram(values, n_bins):
    """Counts of each value of a flat array of small non-negative integers."""
    counts = np.zeros(n_bins, np.int64)
    for v in values:
        counts[v] += 1
    return counts


@njit(cache=True, nogil=True)
def block_weights(copies, n_blocks, random_bits):
    """Bootstrap weights: for replicate r, ``copies[r] * n_blocks`` blocks drawn with replacement.

    The draw counts of one replicate are a multinomial sample. Each draw takes
    32 random bits from `random_bits` (uint64 words from numpy's bit
    generator, so the result is reproducible from the caller's seed) and maps
    them to a block by multiply-shift (Lemire 2019, ACM TOMACS 29:3, bias
    below n_blocks / 2^32). This is several times faster than numpy's
    ``Generator.multinomial`` for thousands of categories.
    """
    weights = np.zeros((copies.size, n_blocks), np.float64)
    word = 0
    half = 0
    for r in range(copies.size):
        for _ in range(copies[r] * n_blocks):
            bits = random_bits[word]
            if half == 0:
                low = bits & np.uint64(0xFFFFFFFF)
                half = 1
            else:
                low = bits >> np.uint64(32)
                half = 0
                word += 1
            weights[r, (low * np.uint64(n_blocks)) >> np.uint64(32)] += 1.0
    return weights


@njit(cache=True, nogil=True)
def block_maxima(plane, block):
    """Maximum of every `block` x `block` tile of a 2-D plane (partial tiles at the edges dropped), in
    one pass over the rows."""
    ny, nx = plane.shape[0] // block, plane.shape[1] // block
    out = np.empty((ny, nx), plane.dtype)
    for by in range(ny):
        for bx in range(nx):
            out[by, bx] = plane[by * block, bx * block]
        for y in range(by * block, by * block + block):
            row = plane[y]
            for bx in range(nx):
                best = out[by, bx]
                for x in range(bx * block, bx * block + block):
                    if row[x] > best:
                        best = row[x]
                out[by, bx] = best
    return out
