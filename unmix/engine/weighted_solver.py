"""Compiled noise-weighted NNLS / LS per pixel (numba); see :mod:`unmix.engine.weighting`.

Each pixel has its own weights, so nothing is shared between pixels: the
whitened matrix ``W^1/2 M_s`` (with the pixel's right-hand side) is reduced
by Householder QR to ``R x = d`` (K values), then solved exactly as in
:func:`unmix.engine.pixel_solver.solve_reduced`, each support by a
factorisation of its own ``R_S``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .pixel_solver import factored_values, solve_reduced


@njit(cache=True, nogil=True)
def _householder(a, n_reduced):
    """Householder QR of the first `n_reduced` columns of `a` (rows x columns) in place, the
    reflectors applied to the later columns too: R in the upper triangle of the first
    `n_reduced` rows, ``Q^T`` times each later column in that column (Golub & Van Loan,
    *Matrix Computations*, 5.2)."""
    n_rows, n_cols = a.shape
    for k in range(n_reduced):
        norm = 0.0
        for i in range(k, n_rows):
            norm += a[i, k] ** 2
        norm = np.sqrt(norm)
        if norm == 0.0:
            continue
        alpha = -norm if a[k, k] >= 0.0 else norm
        v0 = a[k, k] - alpha
        # Reflector v = (v0, a[k+1:, k]); H = I - 2 v v^T / (v^T v).
        vv = v0 * v0
        for i in range(k + 1, n_rows):
            vv += a[i, k] ** 2
        for col in range(k + 1, n_cols):
            dot = v0 * a[k, col]
            for i in range(k + 1, n_rows):
                dot += a[i, k] * a[i, col]
            f = 2.0 * dot / vv
            a[k, col] -= f * v0
            for i in range(k + 1, n_rows):
                a[i, col] -= f * a[i, k]
        a[k, k] = alpha
        for i in range(k + 1, n_rows):
            a[i, k] = 0.0


@njit(cache=True, nogil=True)
def unmix_weighted(y, ms, background, channel_variance, scale, constrained, out, variance, start, stop):
    """Weighted abundances of pixels ``start:stop`` of `y` into `out` (K, N), and their noise variance.

    Channel c of pixel i weighs ``1 / channel_variance[c, i]``; `ms` is the column-scaled matrix
    (abundances are ``scale * x``). `variance` (K, N) receives ``[(M_S^T W M_S)^-1]_jj`` for
    labels on the final support S (the covariance of weighted least squares when the weights
    are right), and for a label at zero the variance it would have on S with it added.
    Non-finite pixels give NaN.
    """
    n_channels, n_labels = ms.shape
    # The whitened matrix with the whitened pixel as its last column.
    a = np.empty((n_channels, n_labels + 1))
    r = np.empty((n_labels, n_labels))
    d = np.empty(n_labels)
    x = np.empty(n_labels)
    v = np.empty(n_labels)
    tol = np.empty(n_labels)
    var = np.empty(n_labels)
    work = np.empty((3, n_labels, n_labels))
    no_table = np.empty((0, n_labels, n_labels))
    no_tolerance = np.empty((0, n_labels))
    full = (1 << n_labels) - 1
    for i in range(start, stop):
        finite = True
        for c in range(n_channels):
            finite &= np.isfinite(np.float64(y[c, i])) & np.isfinite(channel_variance[c, i])
        if not finite:
            for k in range(n_labels):
                out[k, i] = np.nan
                variance[k, i] = np.nan
            continue
        for c in range(n_channels):
            weight = 1.0 / np.sqrt(channel_variance[c, i])
            for k in range(n_labels):
                a[c, k] = ms[c, k] * weight
            a[c, n_labels] = (np.float64(y[c, i]) - background[c]) * weight
        _householder(a, n_labels)
        for j in range(n_labels):
            d[j] = a[j, n_labels]
            for k in range(n_labels):
                r[j, k] = a[j, k] if k >= j else 0.0
        if constrained:
            solve_reduced(d, no_table, no_tolerance, r, work, x, v, tol, var)
            support = 0
            for j in range(n_labels):
                if x[j] > 0.0:
                    support |= 1 << j
            factored_values(r, d, support, v, tol, var, work)
        else:
            factored_values(r, d, full, x, tol, var, work)
        for j in range(n_labels):
            out[j, i] = scale[j] * x[j]
            variance[j, i] = scale[j] ** 2 * var[j]
