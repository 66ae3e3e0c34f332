"""Compiled exact NNLS for one pixel on the normal equations (numba); see :mod:`unmix.engine.solver`.

The vectorised kernels of :mod:`unmix.engine.unrolled` hand over the pixels
they do not resolve themselves.
"""

from __future__ import annotations

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
