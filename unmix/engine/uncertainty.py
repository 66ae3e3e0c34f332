"""Per-pixel standard errors of the abundances: detector noise plus the matrix's own uncertainty.

First-order propagation (the delta method) of both sources of error through
the estimator, on the pixel's active support S (the labels above zero; all
labels for least squares), where the NNLS estimate is the least-squares one
``a_S = L_S (y - b)``, ``L_S = pinv(M_S)``:

- noise: ``Var(a_S) = L_S Sigma L_S^T`` with ``Sigma = diag(read_variance +
  gain x max(M a, 0))``, the detector's photon-transfer variance of the fitted
  signal (with noise weighting, :mod:`unmix.engine.weighting`, the weighted
  estimator's own ``(M_S^T W M_S)^-1`` and its rows in the matrix part);
- matrix: a change ``dm_k`` of column k moves the estimate by ``-L_S dm_k a_k``
  (the term in the residual is a product of two small errors and left out);
  columns are independent with covariance ``column_covariance[k]``, so the
  variance adds ``sum_k a_k^2 L_S Cov_k L_S^T``.

A label at zero (off the support) gets the standard error it would have on
the support with it added: its true abundance is then likely below about
twice that value. The result is ``sqrt`` of the diagonal, per label.

References
----------
.. [1] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
   Prentice-Hall, 1974, ch. 7 (covariance of least-squares estimates).
.. [2] Joint Committee for Guides in Metrology, *Evaluation of measurement
   data - Guide to the expression of uncertainty in measurement*, JCGM
   100:2008, section 5 (first-order propagation of uncertainty).
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError, InputWarning
from ..matrix import BleedThroughMatrix
from .solver import Unmixer, support_groups
from ..measure.noise import noise_arrays

_CHUNK = 1 << 16


def standard_errors(unmixer: Unmixer, abundances: np.ndarray, noise: dict | None = None,
                    column_covariance=None) -> np.ndarray:
    """Standard error (K, ...) float32 of each abundance of `abundances` (K, ...) from `unmixer`.

    Parameters
    ----------
    unmixer : Unmixer
        The solver that produced `abundances` (its method decides the support).
    abundances : ndarray (K, ...)
    noise : dict, optional
        ``{"read_variance": (C,), "gain": (C,)}`` for the noise part.
    column_covariance : ndarray (K, C, C), optional
        Covariance of each label's column of the matrix, for the matrix part.

    NaN where an abundance is NaN. Without any source of error, a ValueError.
    Noise-weighted abundances come with their own errors
    (:func:`unmix.engine.weighting.unmix_weighted`).
    """
    if noise is None and column_covariance is None:
        raise ValueError("standard errors need a noise model, the matrix's column covariance, or both")
    matrix = unmixer.matrix
    n_channels, n_labels = matrix.shape
    shape = np.shape(abundances)[1:]
    a = np.asarray(abundances, dtype=np.float64).reshape(n_labels, -1)
    variance = np.zeros(a.shape)
    read, gain = noise_arrays(noise, n_channels) if noise is not None else (None, None)
    cov = None if column_covariance is None else np.asarray(column_covariance, dtype=np.float64)
    if cov is not None and cov.shape != (n_labels, n_channels, n_channels):
        raise ValueError(f"column covariance must be {n_labels} matrices of {n_channels} x {n_channels}")
    for support, group in support_groups(a, unmixer.method == "nnls"):
        rows = estimator_rows(unmixer, support)
        spread = None if cov is None else np.einsum("jc,kcd,jd->jk", rows, cov, rows)
        for start in range(0, group.size, _CHUNK):
            pixels = group[start:start + _CHUNK]
            part = a[:, pixels]
            if read is not None:
                signal = np.maximum(matrix @ part, 0.0)
                variance[:, pixels] += (rows**2) @ (read[:, None] + gain[:, None] * signal)
            if spread is not None:
                variance[:, pixels] += spread @ part**2
    errors = np.sqrt(variance)
    errors[:, ~np.all(np.isfinite(a), axis=0)] = np.nan
    return errors.astype(np.float32).reshape((n_labels,) + shape)


def estimator_rows(unmixer: Unmixer, support: int) -> np.ndarray:
    """(K, C): row j is the least-squares estimator of label j on `support`, or on `support` with
    j added when j is not in it (from the solver's table: ``scale_j T[S]_j Q^T``)."""
    red = unmixer.reduction
    n_labels = unmixer.n_labels
    masks = support | (1 << np.arange(n_labels))
    return red.scale[:, None] * np.einsum("jm,mc->jc", red.table[masks, :, np.arange(n_labels)], red.qt)


def error_sources(matrix: BleedThroughMatrix, weights: str = "none", uncertainty: bool = False, warn: bool = False,
                  where: str = "matrix"):
    """What noise weighting and standard errors can use from a matrix file, and a record of it.

    Returns ``(noise, column_covariance, record)``: the noise model (None if
    the matrix has none), the column covariance for the errors (the matrix's;
    for a matrix with 95 % intervals but no covariance, independent
    coefficients of standard deviation half-width / 1.96; None without
    either), and for the outputs' metadata what was asked for and what was
    used, with the spillover-spreading figures when there is a noise model
    (:mod:`unmix.measure.spreading`). Weights asked for without a noise model
    fall back to equal weights, and errors without one of the two sources
    use the other, each with a warning (`warn`); errors without either are
    an InputError.
    """
    import warnings

    from ..measure.spreading import spreading_record

    if weights not in ("none", "noise"):
        raise InputError(f"--weights {weights}: use none or noise")
    noise = matrix.noise_model
    record = {"weights": {"requested": weights, "used": weights if noise is not None else "none"}}
    if weights == "noise" and noise is None:
        record["weights"]["reason"] = "the matrix has no noise model"
        if warn:
            warnings.warn(f"{where}: has no noise model (predicted, or measured before noise models were stored); "
                          "--weights noise falls back to equal weights: re-measure the matrix to weight by noise",
                          InputWarning, stacklevel=2)
    covariance, covariance_source = matrix.column_covariance, "column covariance"
    if covariance is None and matrix.ci95_low is not None:
        sd = (matrix.ci95_high - matrix.ci95_low) / (2 * 1.96)
        covariance = np.stack([np.diag(sd[:, k] ** 2) for k in range(len(matrix.labels))])
        covariance_source = "95 % intervals, coefficients taken as independent"
    if uncertainty:
        if noise is None and covariance is None:
            raise InputError(f"{where}: --uncertainty needs the matrix's noise model or its intervals, and this "
                             "matrix has neither; use a measured matrix (re-measure it with this version)")
        missing = "noise model" if noise is None else "intervals" if covariance is None else None
        if missing and warn:
            warnings.warn(f"{where}: has no {missing}; the standard errors leave out the "
                          f"{'detector noise' if noise is None else 'uncertainty of the matrix'} (recorded in the "
                          "output's metadata)", InputWarning, stacklevel=2)
        record["uncertainty"] = {
            "output": "standard error of each abundance (first-order propagation on the active support)",
            "noise": None if noise is None else f"noise model ({noise['source']})",
            "matrix": None if covariance is None else covariance_source}
    if noise is not None:
        record["spreading"] = spreading_record(matrix.matrix, matrix.labels, noise)
    return noise, covariance, record
