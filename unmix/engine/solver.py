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
matrices.

The kernels (:mod:`unmix.engine.unrolled`, written by
:mod:`unmix.engine.codegen`, one per label count, compiled with numba and
releasing the GIL so that threads run them in parallel) work on tiles of
1024 pixels. Per tile they form ``z`` in float64, four channels per pass, then
in one loop vectorised over the pixels (SIMD lanes) compute the
unconstrained solution and, for up to four labels, try every smaller
support by decreasing size, each pixel keeping the first that satisfies
the KKT conditions; the loop has no branches, only selects. Pixels left
over (rounding on an ill-conditioned M; every constrained pixel when K > 4)
go to the per-pixel exact solver of :mod:`unmix.engine.pixel_solver`: the
positive part of the unconstrained support, then Lawson-Hanson active-set
iterations on the precomputed inverses (Bro & de Jong's FNNLS), and should
those fail their KKT test, every support enumerated keeping the feasible
one of lowest objective. No residual is formed.

Why this form (``tests/benchmarks/bench_solve.py``, C=4, K=3, 16 Mpx of
float32 with realistic noise, 61 % of pixels constrained, two threads):
1.4-1.7x the time of the plain ``pinv(M) @ Y`` product and 1300-1550 times
faster than a per-pixel ``scipy.optimize.nnls`` loop. The per-pixel solver alone
(branching per pixel, scalar code) was 9-16x the matmul: a compiler cannot
vectorise a loop whose body branches on each pixel's support or keeps its
values in scratch arrays, which is why the label count is fixed per kernel.
For K > 4 the enumeration grows as 3^K and the per-pixel solver takes the
constrained pixels (C=32, K=8: about 15x the matmul).

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

from ..threads import map_in_threads

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
        from .unrolled import KERNELS

        offset = self.matrix.T @ b
        abundances = np.empty((self.n_labels, y.shape[1]), np.float32)
        if y.dtype not in (np.float32, np.float64, np.uint16, np.uint8):
            y = y.astype(np.float64)
        constrained = self.method == "nnls"
        mt = np.ascontiguousarray(self.matrix.T)
        bounds = np.linspace(0, y.shape[1], max(1, threads) + 1).astype(int)
        # The kernel releases the GIL: split the pixels among threads.
        y = np.ascontiguousarray(y)
        map_in_threads(KERNELS[self.n_labels], [
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
