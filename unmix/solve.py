"""Per-pixel unmixing: exact non-negative least squares and plain least squares.

For every pixel, minimise ``||y - b - M a||^2`` over the abundances ``a``,
with ``a >= 0`` (NNLS) or unconstrained (LS). ``M`` (C channels x K labels)
must have full column rank, so the NNLS solution is unique.

The exact NNLS solver
---------------------
With ``G = M^T M`` and ``z = M^T (y - b)``, the solution restricted to a
support set S is ``a_S = (G_SS)^-1 z_S``; it is the NNLS optimum exactly
when ``a_S >= 0`` and the gradient ``G a - z`` is ``>= 0`` outside S (the
Karush-Kuhn-Tucker conditions). With K <= 8 labels there are at most 255
supports, so all their inverses are computed once, embedded in K x K
matrices. Per pixel the solver tries

1. the full set (the unconstrained solution; most pixels stop here),
2. the positive part of that solution's support (most of the rest stop here),
3. Lawson-Hanson active-set iterations on the normal equations (Bro & de
   Jong's FNNLS), each solve a lookup of a precomputed support inverse,
4. should all of these fail their KKT test (rounding on an ill-conditioned
   M), every support by decreasing size.

Among supports whose solution is non-negative, the optimum has the lowest
objective ``-z_S . a_S / 2``; the enumeration keeps the best such candidate,
so even there the answer is the exact enumeration optimum, never an iterate.
No residual is formed.

The compiled kernel (numba, releasing the GIL so that threads run it in
parallel) forms ``z`` per pixel from the stored pixel values, in float64,
with no temporary arrays, then does K x K work per pixel. Why this form
(``tests/benchmarks/bench_solve.py``, C=4, K=3, 16 Mpx of float32 with
realistic noise, 61 % of pixels constrained): about 25 ns per pixel where the
unconstrained solution is already non-negative and 58 ns per pixel overall;
a per-pixel ``scipy.optimize.nnls`` loop is 200-400 times slower, a numpy
scheme grouping pixels by support was about 4 times slower, and a tiled
branch-free numba variant 2 times slower. It is still 12-16 times the plain
``pinv(M) @ Y`` product, which remains the target to close.

References
----------
.. [1] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
   Prentice-Hall, 1974, ch. 23 (NNLS and its KKT conditions).
.. [2] R. Bro and S. de Jong, "A fast non-negativity-constrained least
   squares algorithm", J. Chemometrics 11:393-401 (1997): precomputed
   cross products ``M^T M`` and ``M^T y`` shared by many problems.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .threads import map_in_threads

MAX_LABELS = 8
METHODS = ("nnls", "ls")


@dataclass(frozen=True)
class Unmixer:
    """Precomputed solver for one matrix.

    Parameters
    ----------
    matrix : ndarray, shape (C, K)
        Bleed-through matrix, C >= K, full column rank, K <= 8.
    method : {"nnls", "ls"}
    """

    matrix: np.ndarray
    method: str = "nnls"

    def __post_init__(self):
        m = np.asarray(self.matrix, dtype=np.float64)
        if m.ndim != 2:
            raise ValueError("matrix must be 2-D (channels x labels)")
        n_channels, n_labels = m.shape
        if n_labels > MAX_LABELS:
            raise ValueError(f"matrix has {n_labels} labels; at most {MAX_LABELS} are supported")
        if n_channels < n_labels:
            raise ValueError(f"matrix has fewer channels ({n_channels}) than labels ({n_labels})")
        if np.linalg.matrix_rank(m) < n_labels:
            raise ValueError("matrix is rank-deficient: some labels cannot be told apart")
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}")
        object.__setattr__(self, "matrix", m)

    @property
    def n_labels(self) -> int:
        return self.matrix.shape[1]

    @cached_property
    def gram(self) -> np.ndarray:
        return self.matrix.T @ self.matrix

    @cached_property
    def support_inverses(self) -> np.ndarray:
        """``inverses[mask]``: (G_SS)^-1 embedded in K x K zeros, for every support bitmask."""
        k = self.n_labels
        inverses = np.zeros((1 << k, k, k))
        for mask in range(1, 1 << k):
            members = [j for j in range(k) if mask >> j & 1]
            inverses[mask][np.ix_(members, members)] = np.linalg.inv(self.gram[np.ix_(members, members)])
        return inverses

    @cached_property
    def support_order(self) -> np.ndarray:
        """All non-empty supports, largest first (then the empty one)."""
        k = self.n_labels
        masks = sorted(range(1, 1 << k), key=lambda m: (-bin(m).count("1"), m))
        return np.array(masks + [0], dtype=np.int64)

    def unmix(self, pixels: np.ndarray, background=None, threads: int = 1) -> np.ndarray:
        """Abundances for pixels given channel-first, shape (C, ...) -> (K, ...), float32.

        Pixels with a NaN in any channel give NaN in every label. `threads`
        splits the pixels among threads (leave 1 inside dask tasks, which are
        already parallel).
        """
        pixels = np.asarray(pixels)
        shape = pixels.shape[1:]
        y = pixels.reshape(pixels.shape[0], -1)
        if y.shape[0] != self.matrix.shape[0]:
            raise ValueError(f"pixels have {y.shape[0]} channels, the matrix {self.matrix.shape[0]}")
        b = np.zeros(self.matrix.shape[0]) if background is None else np.asarray(background, dtype=np.float64)
        from .solve_kernels import unmix_pixels

        offset = self.matrix.T @ b
        abundances = np.empty((self.n_labels, y.shape[1]), np.float32)
        if y.dtype not in (np.float32, np.float64, np.uint16, np.uint8):
            y = y.astype(np.float64)
        constrained = self.method == "nnls"
        mt = np.ascontiguousarray(self.matrix.T)
        bounds = np.linspace(0, y.shape[1], max(1, threads) + 1).astype(int)
        # The kernel releases the GIL: split the pixels among threads.
        y = np.ascontiguousarray(y)
        map_in_threads(unmix_pixels, [
            (y, mt, offset, self.gram, self.support_inverses, self.support_order, constrained, abundances,
             int(lo), int(hi)) for lo, hi in zip(bounds[:-1], bounds[1:]) if hi > lo])
        return abundances.reshape((self.n_labels,) + shape)

    def residual(self, pixels: np.ndarray, abundances: np.ndarray, background=None) -> np.ndarray:
        """Root-mean-square misfit per pixel, ``||y - b - M a|| / sqrt(C)``, float32."""
        pixels = np.asarray(pixels, dtype=np.float64)
        c = pixels.shape[0]
        b = np.zeros(c) if background is None else np.asarray(background, dtype=np.float64)
        fitted = np.tensordot(self.matrix, np.asarray(abundances, dtype=np.float64), axes=(1, 0))
        misfit = pixels - b.reshape((c,) + (1,) * (pixels.ndim - 1)) - fitted
        return np.sqrt(np.mean(misfit**2, axis=0)).astype(np.float32)
