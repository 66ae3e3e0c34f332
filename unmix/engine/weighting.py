"""Noise-weighted unmixing: weighted least squares with the detector's photon-transfer variance.

Plain (N)NLS weighs every channel alike. A camera or photomultiplier adds
read noise and shot noise, so a channel's variance is ``read_variance +
gain x signal`` (the matrix file's ``noise_model``): a bright channel is
noisier than a dim one, and the least-squares estimate with weights ``1 /
variance`` has the smallest variance of all linear unbiased estimates
(Gauss-Markov; weighted spectral unmixing: Neher & Neher 2004). The
variance must come from the signal without the pixel's own noise, else
pixels whose noise went up get less weight and the fit is biased low: the
weights use the fit of a first, unweighted pass (one reweighting step of
iteratively reweighted least squares). Non-negativity is kept exactly, per
pixel, as in :mod:`unmix.engine.solver`.

References
----------
.. [1] E. Neher and R. Neher, "Applying spectral fingerprinting to the
   analysis of FRET images", J. Microsc. 213:46 (2004).
.. [2] C. L. Lawson and R. J. Hanson, *Solving Least Squares Problems*,
   Prentice-Hall, 1974 (weighted least squares by whitening, ch. 25).
"""

from __future__ import annotations

import numpy as np

from ..threads import map_in_threads
from ..measure.noise import noise_arrays
from .solver import Unmixer, support_groups

# Pixels weighted per pass: bounds the memory of the per-pixel channel variances.
_CHUNK = 1 << 16
# Pixels per batch of per-pixel C x C matrices (the matrix part of the errors).
_GROUP = 2048


def channel_variance(matrix: np.ndarray, read: np.ndarray, gain: np.ndarray, abundances: np.ndarray) -> np.ndarray:
    """Photon-transfer variance (C, N) of the fitted signal ``M a`` (N pixels): ``read + gain x
    max(M a, 0)``, at least 1e-6 of the pixel's largest channel variance (a channel with neither
    read noise nor signal must not take all the weight). NaN where an abundance is NaN."""
    variance = read[:, None] + gain[:, None] * np.maximum(matrix @ abundances, 0.0)
    floor = 1e-6 * np.maximum(variance.max(axis=0), read.max()) + 1e-300
    return np.maximum(variance, floor)


def unmix_weighted(unmixer: Unmixer, pixels: np.ndarray, noise: dict, background=None, threads: int = 1,
                   column_covariance=None):
    """Noise-weighted abundances (K, ...) float32 and their standard errors (K, ...) float32.

    Parameters
    ----------
    unmixer : Unmixer
        The matrix and the method ("nnls" exact non-negative, or "ls").
    pixels : ndarray (C, ...)
    noise : dict
        ``{"read_variance": (C,), "gain": (C,)}``: variance of a pixel =
        read_variance + gain x background-subtracted signal (input units).
    background : per-channel levels subtracted first.
    threads : pixels split among this many threads.
    column_covariance : ndarray (K, C, C), optional
        Covariance of each label's column of the matrix: its first-order
        effect on the weighted estimate is added to the errors (as in
        :mod:`unmix.engine.uncertainty`, with the pixel's own weights).

    Returns
    -------
    abundances : ndarray (K, ...) float32
    errors : ndarray (K, ...) float32
        Per pixel and label, the standard error of the weighted estimate:
        ``[(M_S^T W M_S)^-1]_kk`` on the support S of the pixel (for a label
        at zero, on S with it added), plus the matrix part. NaN where a pixel
        is not finite.
    """
    from .weighted_solver import unmix_weighted as kernel

    pixels = np.asarray(pixels)
    shape = pixels.shape[1:]
    matrix = unmixer.matrix
    n_channels, n_labels = matrix.shape
    y = np.ascontiguousarray(pixels.reshape(n_channels, -1))
    if y.dtype not in (np.float32, np.float64, np.uint16, np.uint8):
        y = y.astype(np.float64)
    read, gain = noise_arrays(noise, n_channels)
    b = np.zeros(n_channels) if background is None else np.asarray(background, dtype=np.float64)
    scale = unmixer.reduction.scale
    abundances = np.empty((n_labels, y.shape[1]), np.float32)
    variance = np.empty((n_labels, y.shape[1]))
    for lo in range(0, y.shape[1], _CHUNK):
        hi = min(lo + _CHUNK, y.shape[1])
        part = np.ascontiguousarray(y[:, lo:hi])
        weights_from = channel_variance(matrix, read, gain, unmixer.unmix(part, b, threads=threads, dtype=np.float64))
        out = abundances[:, lo:hi]
        out_variance = variance[:, lo:hi]
        bounds = np.linspace(0, hi - lo, max(1, threads) + 1).astype(int)
        solved = [np.empty((n_labels, hi - lo), np.float32), np.empty((n_labels, hi - lo))]
        map_in_threads(kernel, [
            (part, matrix * scale, b, weights_from, scale, unmixer.method == "nnls", *solved, int(start), int(stop))
            for start, stop in zip(bounds[:-1], bounds[1:]) if stop > start])
        out[...] = solved[0]
        out_variance[...] = solved[1]
        if column_covariance is not None:
            out_variance += _matrix_variance(matrix, weights_from, solved[0], column_covariance,
                                             unmixer.method == "nnls")
    errors = np.sqrt(variance).astype(np.float32)
    return abundances.reshape((n_labels,) + shape), errors.reshape((n_labels,) + shape)


def _matrix_variance(matrix, weights_from, abundances, column_covariance, constrained) -> np.ndarray:
    """First-order variance (K, N) of the weighted estimate from the matrix's column covariance:
    ``sum_k a_k^2 l_j Cov_k l_j^T`` with ``l_j`` the pixel's weighted estimator row of label j on
    its support (with j added when j is at zero). Pixels are grouped by support; the rows come
    from a QR factorisation of each pixel's whitened support columns."""
    cov = np.asarray(column_covariance, dtype=np.float64)
    n_labels = matrix.shape[1]
    a = np.asarray(abundances, dtype=np.float64)
    variance = np.zeros(a.shape)
    bits = 1 << np.arange(n_labels)
    for support, same in support_groups(a, constrained):
        for start in range(0, same.size, _GROUP):
            group = same[start:start + _GROUP]
            whiten = 1.0 / np.sqrt(weights_from[:, group].T)  # (n, C)
            combined = np.einsum("kn,kcd->ncd", a[:, group] ** 2, cov)  # sum_k a_k^2 Cov_k per pixel
            for j in range(n_labels):
                columns = np.flatnonzero((support | bits[j]) & bits)
                q, r = np.linalg.qr(matrix[None, :, columns] * whiten[:, :, None])
                row = np.linalg.solve(r, np.swapaxes(q, 1, 2))[:, list(columns).index(j), :] * whiten
                variance[j, group] = np.einsum("nc,ncd,nd->n", row, combined, row)
    return variance
