"""Compiled per-pixel NNLS on the normal equations (numba); see :mod:`unmix.solve`."""

from __future__ import annotations

import numpy as np
from numba import njit

_RELATIVE_TOLERANCE = 1e-9


@njit(cache=True, nogil=True, inline="always")
def _solve_support(inverses, mask, zk, a, n_labels):
    # Index the 3-D array directly: a 2-D view per call would cost reference
    # counting in the hot loop.
    for j in range(n_labels):
        total = 0.0
        for m in range(n_labels):
            total += inverses[mask, j, m] * zk[m]
        a[j] = total


@njit(cache=True, nogil=True, inline="always")
def _is_optimal(mask, a, zk, gram, n_labels, tol_a, tol_g):
    """KKT conditions: a >= 0 on the support, gradient G a - z >= 0 off it."""
    for j in range(n_labels):
        if mask >> j & 1:
            if a[j] < -tol_a:
                return False
        else:
            gradient = -zk[j]
            for m in range(n_labels):
                gradient += gram[j, m] * a[m]
            if gradient < -tol_g:
                return False
    return True


@njit(cache=True, nogil=True, inline="always")
def _is_feasible(mask, a, n_labels, tol_a):
    for j in range(n_labels):
        if mask >> j & 1 and a[j] < -tol_a:
            return False
    return True


@njit(cache=True, nogil=True)
def _active_set(zk, gram, inverses, n_labels, tol_a, tol_g, x, s):
    """Lawson-Hanson active-set iterations on the normal equations (Bro & de Jong's FNNLS),
    each solve a lookup of the precomputed support inverse. Returns True on convergence."""
    for j in range(n_labels):
        x[j] = 0.0
    passive = 0
    for _ in range(4 * n_labels):
        best_j = -1
        best_w = tol_g
        for j in range(n_labels):
            if not passive >> j & 1:
                w = zk[j]
                for m in range(n_labels):
                    w -= gram[j, m] * x[m]
                if w > best_w:
                    best_w = w
                    best_j = j
        if best_j < 0:
            return True
        passive |= 1 << best_j
        for _ in range(4 * n_labels):
            _solve_support(inverses, passive, zk, s, n_labels)
            feasible = True
            for j in range(n_labels):
                if passive >> j & 1 and s[j] <= tol_a:
                    feasible = False
            if feasible:
                for j in range(n_labels):
                    x[j] = s[j]
                break
            alpha = 1.0
            for j in range(n_labels):
                if passive >> j & 1 and s[j] <= tol_a:
                    alpha = min(alpha, x[j] / (x[j] - s[j]))
            for j in range(n_labels):
                x[j] += alpha * (s[j] - x[j])
                if passive >> j & 1 and x[j] <= tol_a:
                    passive &= ~(1 << j)
                    x[j] = 0.0
            if passive == 0:
                break
    return False


@njit(cache=True, nogil=True)
def _solve_pixel(zk, gram, inverses, order, a, best, spare):
    """Exact NNLS for one pixel's ``z`` (finite), into `a`.

    The unconstrained solution; else the positive part of its support; else
    active-set iterations; each accepted only if it satisfies the KKT
    conditions. Should all fail (rounding on an ill-conditioned M), every
    support is enumerated, keeping the feasible one of lowest objective.
    """
    n_labels = zk.size
    full = (1 << n_labels) - 1
    scale = 0.0
    for j in range(n_labels):
        scale = max(scale, abs(zk[j]))
    _solve_support(inverses, full, zk, a, n_labels)
    amax = 0.0
    positive = 0
    for j in range(n_labels):
        amax = max(amax, abs(a[j]))
        if a[j] > 0:
            positive |= 1 << j
    tol_a = _RELATIVE_TOLERANCE * amax
    tol_g = _RELATIVE_TOLERANCE * scale
    if positive == full:
        return
    if positive != 0:
        _solve_support(inverses, positive, zk, a, n_labels)
        if _is_optimal(positive, a, zk, gram, n_labels, tol_a, tol_g):
            return
    if _active_set(zk, gram, inverses, n_labels, tol_a, tol_g, a, spare):
        support = 0
        for j in range(n_labels):
            if a[j] > 0:
                support |= 1 << j
        if _is_optimal(support, a, zk, gram, n_labels, tol_a, tol_g):
            return
    # Enumerate supports; keep the feasible one of lowest objective
    # (-z.a/2 at each support's optimum); the empty support gives 0.
    best_objective = 0.0
    for j in range(n_labels):
        best[j] = 0.0
    for s in range(order.size):
        mask = order[s]
        _solve_support(inverses, mask, zk, a, n_labels)
        if not _is_feasible(mask, a, n_labels, tol_a):
            continue
        objective = 0.0
        for j in range(n_labels):
            objective -= 0.5 * zk[j] * a[j]
        if objective < best_objective:
            best_objective = objective
            for j in range(n_labels):
                best[j] = a[j]
        if _is_optimal(mask, a, zk, gram, n_labels, tol_a, tol_g):
            break
    for j in range(n_labels):
        a[j] = best[j]


@njit(cache=True, nogil=True)
def unmix_pixels(y, mt, offset, gram, inverses, order, constrained, out, start, stop):
    """Abundances for columns [start, stop) of `y` (C, N), written to `out` (K, N) float32.

    Whole arrays and a column range, not slices, are passed so that threads
    share C-contiguous arrays (numba compiles slower code for strided views).

    ``z = M^T y - M^T b`` is formed per pixel in float64 (`mt` = M^T,
    `offset` = M^T b), then solved exactly with ``a >= 0`` (`constrained`)
    or without. A pixel with a NaN in any channel gives NaN in every label.
    """
    n_labels = mt.shape[0]
    n_channels, n_pixels = y.shape
    full = (1 << n_labels) - 1
    zk = np.empty(n_labels)
    a = np.empty(n_labels)
    best = np.empty(n_labels)
    spare = np.empty(n_labels)
    for i in range(start, stop):
        finite = True
        for j in range(n_labels):
            total = -offset[j]
            for c in range(n_channels):
                total += mt[j, c] * y[c, i]
            zk[j] = total
            if not np.isfinite(total):
                finite = False
        if not finite:
            for j in range(n_labels):
                out[j, i] = np.nan
            continue
        # The unconstrained solution, written out directly: with LS, or with
        # NNLS when it is already non-negative (the most common case).
        negative = False
        for j in range(n_labels):
            total = 0.0
            for m in range(n_labels):
                total += inverses[full, j, m] * zk[m]
            out[j, i] = total
            negative |= total < 0.0
        if not (constrained and negative):
            continue
        # Most of the rest: the positive part of the unconstrained support.
        positive = 0
        amax = 0.0
        scale = 0.0
        for j in range(n_labels):
            value = out[j, i]
            amax = max(amax, abs(value))
            scale = max(scale, abs(zk[j]))
            if value > 0:
                positive |= 1 << j
        if positive != 0:
            # Written out rather than through the helpers: in this loop every
            # helper call binding arrays costs reference counting (~50 ns).
            tol_a = _RELATIVE_TOLERANCE * amax
            tol_g = _RELATIVE_TOLERANCE * scale
            optimal = True
            for j in range(n_labels):
                total = 0.0
                for m in range(n_labels):
                    total += inverses[positive, j, m] * zk[m]
                a[j] = total
                if positive >> j & 1 and total < -tol_a:
                    optimal = False
            if optimal:
                for j in range(n_labels):
                    if not positive >> j & 1:
                        gradient = -zk[j]
                        for m in range(n_labels):
                            gradient += gram[j, m] * a[m]
                        if gradient < -tol_g:
                            optimal = False
            if optimal:
                for j in range(n_labels):
                    out[j, i] = max(a[j], 0.0)
                continue
        _solve_pixel(zk, gram, inverses, order, a, best, spare)
        for j in range(n_labels):
            out[j, i] = max(a[j], 0.0)
