"""Per-pixel unmixing: exact non-negative least squares and plain least squares.

For every pixel, minimise ``||y - b - M a||^2`` over the abundances ``a``,
with ``a >= 0`` (NNLS) or unconstrained (LS). ``M`` (C channels x K labels,
K <= 16) must have full column rank, so the NNLS solution is unique; a
matrix whose column-scaled condition number exceeds
:data:`unmix.matrix.CONDITION_LIMIT` (1e6) is refused.

Reduction by QR, not normal equations
-------------------------------------
The columns of M are scaled to unit length (``M = M_s D^-1``) and ``M_s =
Q R`` is factorised once (Householder QR, thin). Then for any pixel
``||y - b - M_s x||^2 = ||d - R x||^2 + const`` with ``d = Q^T (y - b)``:
the pixel's problem shrinks to K numbers ``d``, exactly, and ``a = D x``.
Everything else is a linear function of ``d`` computed from orthogonal
factors, so errors grow like cond(M), not cond(M)^2 as with the normal
equations ``M^T M a = M^T y`` (Lawson & Hanson 1974, ch. 9-10).

For every support S (the set of labels allowed to be non-zero) one K x K
table ``T[S]`` is computed once per matrix: its row j is the least-squares
abundance of label j on S (``pinv(R_S)``, from a QR factorisation of
``R_S``) when j is in S, and the gradient of the objective for label j
(``-(P_S r_j)^T``, with ``P_S`` the projector orthogonal to ``R_S``) when it
is not. ``v = T[S] d`` therefore holds everything the KKT conditions ask
(Lawson & Hanson 1974, ch. 23): S is optimal exactly when ``v >= 0``.
A value counts as negative only below the rounding error of its own row
applied to this pixel, ``tolerance[S, j] * max|d|`` (``16 K eps`` times the
row's absolute sum plus one): a tolerance scaled by the problem's own
magnitudes. The table takes ``2^K K^2`` doubles: 4.7 MB at K = 12, 134 MB at
K = 16, built in 0.08 s and about 1 s; it is shared by all pixels and threads
and kept per process for the last two matrices.

Solving the pixels
------------------
The kernels of :mod:`unmix.engine.unrolled` (one per label count, written by
:mod:`unmix.engine.codegen`, compiled with numba, releasing the GIL so that
threads run them in parallel) work on tiles of 256 pixels. They form ``d``
in float64 and the unconstrained solution ``T[full] d`` in loops vectorised
over the pixels; least squares stops there. For NNLS, with K <= 4 labels
the same loop tries every smaller support by decreasing size, each pixel
keeping the first that satisfies the KKT conditions; with more labels the
pixels whose unconstrained solution is not feasible get Lawson-Hanson
active-set iterations, each solve one table lookup (the shared cross
products of Bro & de Jong's FNNLS), warm-started from the positive part of
the unconstrained solution (:func:`unmix.engine.pixel_solver.solve_reduced`
is the same method, array by array). Measured ratios are in
``tests/benchmarks/bench_solve.py``; the agreement with
``scipy.optimize.nnls`` per condition band in
``tests/benchmarks/compare_nnls.py``. When the pixels' supports vary at
random (the benchmark's worst case) a table larger than the processor's
cache makes the lookups wait for memory (K = 12); the few supports of a real
image stay in cache.

References
----------
.. [1] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
   Prentice-Hall, 1974, ch. 9-10 (QR and the normal equations' squared
   condition number) and ch. 23 (NNLS and its KKT conditions).
.. [2] R. Bro and S. de Jong, "A fast non-negativity-constrained least
   squares algorithm", J. Chemometrics 11:393-401 (1997): cross products
   computed once and shared by many problems.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property, lru_cache

import numpy as np

from ..matrix import check_unmixable
from ..threads import map_in_threads

MAX_LABELS = 16
METHODS = ("nnls", "ls")


@dataclass(frozen=True)
class Reduction:
    """What every pixel's problem needs from one matrix (see the module docstring).

    Attributes
    ----------
    qt : ndarray (K, C)
        ``Q^T`` of the column-scaled matrix.
    r : ndarray (K, K)
        Its upper-triangular factor.
    scale : ndarray (K,)
        ``1 / ||M[:, k]||``: abundances are ``scale * x``.
    table : ndarray (2^K, K, K)
        ``table[S, m, j] = T[S][j, m]`` (transposed for contiguous updates).
    tolerance : ndarray (2^K, K)
        Rounding allowance of each row of each ``T[S]``, per unit of ``max|d|``.
    """

    qt: np.ndarray
    r: np.ndarray
    scale: np.ndarray
    table: np.ndarray
    tolerance: np.ndarray


@lru_cache(maxsize=2)
def _reduction(matrix_bytes: bytes, shape: tuple) -> Reduction:
    return reduce_matrix(np.frombuffer(matrix_bytes).reshape(shape))


def reduce_matrix(matrix: np.ndarray) -> Reduction:
    """QR of the column-scaled matrix and the table of every support's least-squares maps."""
    from .pixel_solver import ROUNDING

    m = np.asarray(matrix, dtype=np.float64)
    n_labels = m.shape[1]
    norms = np.linalg.norm(m, axis=0)
    q, r = np.linalg.qr(m / norms)
    masks = np.arange(1 << n_labels)
    members = (masks[:, None] >> np.arange(n_labels)) & 1
    sizes = members.sum(axis=1)
    # Built transposed, table[S] = T[S]^T: column j is a gradient row -(P_S r_j) off the
    # support, the least-squares row pinv(R_S)[j] = (Q_S U_S^-T)[:, j] on it.
    table = np.empty((1 << n_labels, n_labels, n_labels))
    table[0] = -r
    for size in range(1, n_labels + 1):
        chosen = np.nonzero(sizes == size)[0]
        columns = np.nonzero(members[chosen])[1].reshape(len(chosen), size)
        # Supports of one size in one batch: QR of each R_S (K x size).
        q_s, u_s = np.linalg.qr(np.swapaxes(r[:, columns], 0, 1))
        block = q_s @ (np.swapaxes(q_s, 1, 2) @ r)
        block -= r
        block[np.arange(len(chosen))[:, None], :, columns] = np.linalg.solve(u_s, np.swapaxes(q_s, 1, 2))
        table[chosen] = block
    tolerance = ROUNDING * n_labels * np.finfo(np.float64).eps * (np.abs(table).sum(axis=1) + 1.0)
    return Reduction(np.ascontiguousarray(q.T), r, 1.0 / norms, table, tolerance)


@dataclass(frozen=True)
class Unmixer:
    """Precomputed solver for one matrix.

    Parameters
    ----------
    matrix : ndarray, shape (C, K)
        Bleed-through matrix, C >= K, K <= 16, scaled condition number at most
        :data:`unmix.matrix.CONDITION_LIMIT`.
    method : {"nnls", "ls"}
    labels : sequence of str, optional
        Label names, to name them when the matrix is refused.
    noise : dict, optional
        ``{"read_variance": (C,), "gain": (C,)}``, the detector's photon-transfer
        line (variance = read_variance + gain x signal, input units): for
        `weighted` and for the noise part of the standard errors.
    column_covariance : ndarray (K, C, C), optional
        Covariance of each label's column of the matrix: the matrix part of
        the standard errors.
    weighted : bool
        :meth:`solve` weighs each channel of each pixel by ``1 / variance``
        (:mod:`unmix.engine.weighting`); needs `noise`.

    Raises
    ------
    InputError
        (a ValueError) when the matrix cannot be unmixed with, naming the labels.
    """

    matrix: np.ndarray
    method: str = "nnls"
    labels: tuple | None = None
    noise: dict | None = None
    column_covariance: np.ndarray | None = None
    weighted: bool = False

    def __post_init__(self):
        m = np.asarray(self.matrix, dtype=np.float64)
        if m.ndim != 2:
            raise ValueError("matrix must be 2-D (channels x labels)")
        if not np.all(np.isfinite(m)):
            raise ValueError("matrix holds NaN or infinite values")
        if m.shape[1] > MAX_LABELS:
            raise ValueError(f"matrix has {m.shape[1]} labels; at most {MAX_LABELS} are supported")
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}")
        check_unmixable(m, self.labels, warn=False)
        object.__setattr__(self, "matrix", m)
        if self.noise is not None:
            from ..measure.noise import noise_arrays

            noise_arrays(self.noise, m.shape[0])
        elif self.weighted:
            raise ValueError("noise weighting needs a noise model (read variance and gain per channel)")
        if self.column_covariance is not None and np.shape(self.column_covariance) != (m.shape[1],) + m.shape[:1] * 2:
            raise ValueError(f"column covariance must be {m.shape[1]} matrices of {m.shape[0]} x {m.shape[0]}")

    def __getstate__(self):
        # Tasks sent to other processes carry the matrix only; the table is rebuilt there.
        return {key: getattr(self, key) for key in ("matrix", "method", "labels", "noise", "column_covariance",
                                                    "weighted")}

    def __setstate__(self, state):
        for key, value in state.items():
            object.__setattr__(self, key, value)

    @classmethod
    def for_matrix(cls, matrix, method: str = "nnls", weights: str = "none", uncertainty: bool = False,
                   warn: bool = False) -> "Unmixer":
        """The unmixer of a :class:`unmix.matrix.BleedThroughMatrix` with what its file offers:
        its labels, and for ``weights="noise"`` or `uncertainty` its noise model and column
        covariance (:func:`unmix.engine.uncertainty.error_sources` says what is used, and warns
        when `warn`)."""
        from .uncertainty import error_sources

        # Before error_sources, which inverts the matrix: a refused matrix must fail with its own message.
        matrix.check_unmixable(warn=False)
        noise, covariance, _ = error_sources(matrix, weights, uncertainty, warn=warn)
        return cls(matrix.matrix, method=method, labels=matrix.labels, noise=noise, column_covariance=covariance,
                   weighted=weights == "noise" and noise is not None)

    @property
    def n_labels(self) -> int:
        return self.matrix.shape[1]

    @cached_property
    def reduction(self) -> Reduction:
        return _reduction(self.matrix.tobytes(), self.matrix.shape)

    def unmix(self, pixels: np.ndarray, background=None, threads: int = 1, dtype=np.float32) -> np.ndarray:
        """Abundances for pixels given channel-first, shape (C, ...) -> (K, ...), float32.

        Pixels with a NaN or infinity in any channel give NaN in every label.
        `threads` splits the pixels among threads (leave 1 inside dask tasks,
        which are already parallel). `dtype` float64 keeps the solver's full
        precision (for checks against reference solvers).
        """
        pixels = np.asarray(pixels)
        shape = pixels.shape[1:]
        y = pixels.reshape(pixels.shape[0], -1)
        if y.shape[0] != self.matrix.shape[0]:
            raise ValueError(f"pixels have {y.shape[0]} channels, the matrix {self.matrix.shape[0]}")
        if y.dtype not in (np.float32, np.float64, np.uint16, np.uint8):
            y = y.astype(np.float64)
        y = np.ascontiguousarray(y)
        b = np.zeros(self.matrix.shape[0]) if background is None else np.asarray(background, dtype=np.float64)
        red = self.reduction
        offset = red.qt @ b
        abundances = np.empty((self.n_labels, y.shape[1]), dtype)
        kernel = _kernel(self.n_labels)
        bounds = np.linspace(0, y.shape[1], max(1, threads) + 1).astype(int)
        # The kernel releases the GIL: split the pixels among threads.
        map_in_threads(kernel, [
            (y, red.qt, offset, red.scale, red.table, red.tolerance, self.method == "nnls", abundances,
             int(lo), int(hi)) for lo, hi in zip(bounds[:-1], bounds[1:]) if hi > lo])
        return abundances.reshape((self.n_labels,) + shape)

    def solve(self, pixels: np.ndarray, background=None, threads: int = 1, errors: bool = False):
        """Abundances (K, ...) float32 as configured (noise-weighted when `weighted`) and, with
        `errors`, their standard errors (K, ...) float32 (:mod:`unmix.engine.uncertainty`), else None."""
        if self.weighted:
            from .weighting import unmix_weighted

            abundances, standard_errors = unmix_weighted(self, pixels, self.noise, background, threads,
                                                         self.column_covariance)
            return abundances, standard_errors if errors else None
        abundances = self.unmix(pixels, background, threads)
        if not errors:
            return abundances, None
        from .uncertainty import standard_errors

        return abundances, standard_errors(self, abundances, self.noise, self.column_covariance)

    def residual(self, pixels: np.ndarray, abundances: np.ndarray, background=None) -> np.ndarray:
        """Root-mean-square misfit per pixel, ``||y - b - M a|| / sqrt(C)``, float32."""
        pixels = np.asarray(pixels, dtype=np.float64)
        c = pixels.shape[0]
        b = np.zeros(c) if background is None else np.asarray(background, dtype=np.float64)
        fitted = np.tensordot(self.matrix, np.asarray(abundances, dtype=np.float64), axes=(1, 0))
        misfit = pixels - b.reshape((c,) + (1,) * (pixels.ndim - 1)) - fitted
        return np.sqrt(np.mean(misfit**2, axis=0)).astype(np.float32)


def support_groups(abundances: np.ndarray, constrained: bool):
    """Yield (support bitmask, pixel indices) for the pixels of `abundances` (K, N) by the set of
    labels above zero (all labels when not `constrained`); pixels with a NaN are left out."""
    a = np.asarray(abundances)
    bits = 1 << np.arange(a.shape[0])
    finite = np.all(np.isfinite(a), axis=0)
    supports = np.where(finite, ((a > 0) * bits[:, None]).sum(axis=0) if constrained else bits.sum(), -1)
    order = np.argsort(supports, kind="stable")
    for group in np.split(order, np.flatnonzero(np.diff(supports[order])) + 1):
        if group.size and supports[group[0]] >= 0:
            yield int(supports[group[0]]), group


def _kernel(n_labels: int):
    from .unrolled import KERNELS

    return KERNELS[n_labels]
