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
def nnls_from_normal_equations(z, gram, inverses, order, out):
    """Exact NNLS per column of ``z = M^T (y - b)``, written to `out` (K, N) float32.

    Per pixel: the unconstrained solution; else the positive part of its
    support; else active-set iterations; the answer of each is accepted only
    if it satisfies the KKT conditions, and should all fail (rounding on an
    ill-conditioned M) every support is enumerated, keeping the feasible one
    of lowest objective.

    Parameters
    ----------
    z : float64 (K, N)
    gram : float64 (K, K), ``M^T M``
    inverses : float64 (2^K, K, K), inverse of G on each support, embedded
    order : int64 (2^K,), supports by decreasing size, the empty one last
    out : float32 (K, N)
    """
    n_labels, n_pixels = z.shape
    full = (1 << n_labels) - 1
    zk = np.empty(n_labels)
    a = np.empty(n_labels)
    best = np.empty(n_labels)
    spare = np.empty(n_labels)
    for i in range(n_pixels):
        scale = 0.0
        finite = True
        for j in range(n_labels):
            zk[j] = z[j, i]
            if not np.isfinite(zk[j]):
                finite = False
            scale = max(scale, abs(zk[j]))
        if not finite:
            for j in range(n_labels):
                out[j, i] = np.nan
            continue
        _solve_support(inverses, full, zk, a, n_labels)
        amax = 0.0
        positive = 0
        for j in range(n_labels):
            amax = max(amax, abs(a[j]))
            if a[j] > 0:
                positive |= 1 << j
        tol_a = _RELATIVE_TOLERANCE * amax
        tol_g = _RELATIVE_TOLERANCE * scale
        done = positive == full
        if not done and positive != 0:
            _solve_support(inverses, positive, zk, a, n_labels)
            done = _is_optimal(positive, a, zk, gram, n_labels, tol_a, tol_g)
        if not done:
            converged = _active_set(zk, gram, inverses, n_labels, tol_a, tol_g, a, spare)
            if converged:
                support = 0
                for j in range(n_labels):
                    if a[j] > 0:
                        support |= 1 << j
                done = _is_optimal(support, a, zk, gram, n_labels, tol_a, tol_g)
        if not done:
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
        for j in range(n_labels):
            out[j, i] = max(a[j], 0.0)
