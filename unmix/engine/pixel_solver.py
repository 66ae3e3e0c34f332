"""Compiled exact NNLS of one pixel's reduced problem (numba); see :mod:`unmix.engine.solver`.

The generated kernels (:mod:`unmix.engine.unrolled`) write these steps out
with scalars for speed; the functions here serve the noise-weighted solver
(:mod:`unmix.engine.weighted_solver`), whose pixels each have their own
factorisation, and keep the shared constants. Every function here works in
the reduced problem of the solver: ``d``
(K values per pixel, ``Q^T (y - b)``), and the support table ``T[S]`` whose
row ``j`` gives, as a linear function of ``d``, the abundance of label ``j``
when ``j`` is in the support ``S`` and the gradient of the objective for
label ``j`` when it is not. The table is stored transposed
(``table[S, m, j]``) so that ``T[S] d`` is K contiguous multiply-adds per
value of ``d``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

TILE = 256
# Table lookups allowed per pixel before the active-set iterations are cut short.
# Never reached in the randomised comparison with scipy (tests/benchmarks/compare_nnls.py).
LOOKUPS_PER_LABEL = 8
# Rounding allowance of a row of T[S], in units of K machine epsilons times (the row's absolute
# sum + 1): the error of applying it to d in float64, with margin.
ROUNDING = 16.0


@njit(cache=True, nogil=True, inline="always")
def _table_times(table, mask, d, v, n_labels):
    """``v = T[mask] d``: the abundances on the support, the gradient off it."""
    for j in range(n_labels):
        v[j] = 0.0
    for m in range(n_labels):
        dm = d[m]
        for j in range(n_labels):
            v[j] += table[mask, m, j] * dm


@njit(cache=True, nogil=True)
def factored_values(r, d, mask, v, tol, var, work):
    """``v = T[mask] d`` for an upper-triangular `r` of its own (no table), with each row's
    rounding allowance `tol` (per unit of max|d|, as the table's) and `var`, the variance of each
    value for unit white noise in ``d``: ``[(R_S^T R_S)^-1]_jj`` on the support, and off it the
    variance label j would have on the support with it added, ``1 / ||P_S r_j||^2``.

    ``R_S = Q U`` by Gram-Schmidt with reorthogonalisation (orthogonal to rounding for these
    sizes), ``pinv(R_S) = U^-1 Q^T``. `work` is scratch of shape (3, K, K).
    """
    n_labels = d.size
    q = work[0]
    u = work[1]
    p = work[2]
    size = 0
    for j in range(n_labels):
        if mask >> j & 1:
            for i in range(n_labels):
                q[i, size] = r[i, j]
            for t in range(size + 1):
                u[t, size] = 0.0
            for _ in range(2):
                for t in range(size):
                    dot = 0.0
                    for i in range(n_labels):
                        dot += q[i, t] * q[i, size]
                    u[t, size] += dot
                    for i in range(n_labels):
                        q[i, size] -= dot * q[i, t]
            norm = 0.0
            for i in range(n_labels):
                norm += q[i, size] ** 2
            norm = max(np.sqrt(norm), 1e-300)
            u[size, size] = norm
            for i in range(n_labels):
                q[i, size] /= norm
            size += 1
    # p = U^-1 Q^T by back substitution, one column of Q^T at a time.
    for m in range(n_labels):
        for t in range(size - 1, -1, -1):
            total = q[m, t]
            for s in range(t + 1, size):
                total -= u[t, s] * p[s, m]
            p[t, m] = total / u[t, t]
    t = 0
    for j in range(n_labels):
        total = 0.0
        magnitude = 0.0
        square = 0.0
        if mask >> j & 1:
            for m in range(n_labels):
                total += p[t, m] * d[m]
                magnitude += abs(p[t, m])
                square += p[t, m] ** 2
            v[j] = total
            var[j] = square
            t += 1
        else:
            for i in range(n_labels):
                h = r[i, j]
                for s in range(size):
                    dot = 0.0
                    for m in range(n_labels):
                        dot += q[m, s] * r[m, j]
                    h -= q[i, s] * dot
                total -= h * d[i]
                magnitude += abs(h)
                square += h * h
            v[j] = total
            var[j] = 1.0 / max(square, 1e-300)
        tol[j] = ROUNDING * n_labels * np.finfo(np.float64).eps * (magnitude + 1.0)


@njit(cache=True, nogil=True, inline="always")
def _values(d, table, tolerance, r, work, mask, v, tol, var, n_labels):
    """``v = T[mask] d`` and its rounding allowances: from the shared table when there is one
    (``table.shape[0] > 0``), else by factorising ``R_S`` (:func:`factored_values`)."""
    if table.shape[0] > 0:
        _table_times(table, mask, d, v, n_labels)
        for j in range(n_labels):
            tol[j] = tolerance[mask, j]
    else:
        factored_values(r, d, mask, v, tol, var, work)


@njit(cache=True, nogil=True)
def solve_reduced(d, table, tolerance, r, work, x, v, tol, var):
    """Exact NNLS of one pixel's reduced problem, into `x` (scaled abundances, >= 0).

    Lawson-Hanson active-set iterations (Lawson & Hanson 1974, ch. 23), each
    least-squares solve a lookup in the shared support table (Bro & de Jong
    1997) or, without a table, a factorisation of the pixel's own `r`;
    warm-started from the positive part of the unconstrained solution. A
    value counts as negative below ``-tol_j * max|d|``: the rounding error of
    its row applied to this pixel. `v`, `tol`, `var` are scratch of K values.

    Returns the number of lookups, negated when the iterations were cut
    short (`x` is then feasible and the objective no worse than at the start).
    """
    n_labels = d.size
    dmax = 0.0
    for j in range(n_labels):
        dmax = max(dmax, abs(d[j]))
    full = (1 << n_labels) - 1
    _values(d, table, tolerance, r, work, full, v, tol, var, n_labels)
    support = 0
    optimal = True
    for j in range(n_labels):
        if v[j] > 0.0:
            support |= 1 << j
            x[j] = v[j]
        else:
            x[j] = 0.0
            if v[j] < -tol[j] * dmax:
                optimal = False
    lookups = 1
    if optimal:
        return lookups
    most = LOOKUPS_PER_LABEL * n_labels
    entered = -1
    while lookups < most:
        # Inner loop: move from x towards the optimum on the support, dropping labels that
        # reach zero on the way, until that optimum is feasible.
        while lookups < most:
            _values(d, table, tolerance, r, work, support, v, tol, var, n_labels)
            lookups += 1
            alpha = 2.0
            leaving = -1
            for j in range(n_labels):
                if support >> j & 1 and v[j] < -tol[j] * dmax:
                    ratio = x[j] / (x[j] - v[j])
                    if ratio < alpha:
                        alpha = ratio
                        leaving = j
            if leaving < 0:
                for j in range(n_labels):
                    x[j] = max(v[j], 0.0) if support >> j & 1 else 0.0
                break
            if leaving == entered and alpha == 0.0:
                # The label just added is negative at once: its gradient was within
                # rounding of zero, so the previous support was optimal.
                return lookups
            for j in range(n_labels):
                if support >> j & 1:
                    x[j] += alpha * (v[j] - x[j])
                    if j == leaving or x[j] <= 0.0:
                        support &= ~(1 << j)
                        x[j] = 0.0
            entered = -1
        # x is the optimum on its support: add the label whose gradient is most negative.
        entered = -1
        steepest = 0.0
        for j in range(n_labels):
            if not support >> j & 1 and v[j] < -tol[j] * dmax and v[j] < steepest:
                steepest = v[j]
                entered = j
        if entered < 0:
            return lookups
        support |= 1 << entered
    return -lookups
