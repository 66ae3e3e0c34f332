"""The detector's noise model: variance = read variance + gain x signal (photon transfer).

Each pixel's variance in a linear detector is its read (electronic) variance
plus its shot-noise variance, which in input units grows in proportion to
the background-subtracted signal: ``var = read_variance + gain * signal``
(Janesick 2007). Colocalization after unmixing needs this line for every
channel: it gives the noise covariance of the unmixed labels, which is
subtracted before a correlation is read as the labels' own.

The line is fitted from single images (Foi et al. 2008): a detail filter
that cancels every locally quadratic signal (the outer product of two
second differences, unit L2 norm, so white noise passes with its variance
unchanged) isolates the noise; pixels are grouped by their local level
(the signal weighted as the detail's variance weights it, made independent
of the detail's own noise),
and in each group the robust spread (median absolute deviation x 1.4826,
common practice) of the detail is its noise standard deviation. Sharp
structures still leak into the detail at curved places, so within each
group only the half of the pixels where a smoothed copy of the image is
least curved is used. In simulations of blurred structures with a PSF
sigma of 1.5 pixels and more, the fitted gain is within about 10 % of the
truth; with sharper structures it errs on the high side. A dark frame,
having no structure, gives the read variance exactly.

References
----------
.. [1] J. R. Janesick, *Photon Transfer: DN -> lambda*, SPIE Press (2007)
   (from memory).
.. [2] A. Foi, M. Trimeche, V. Katkovnik and K. Egiazarian, "Practical
   Poissonian-Gaussian noise modeling and fitting for single-image raw-data",
   IEEE Trans. Image Process. 17:1737-1754 (2008) (from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Second difference along y times along x, normalised to unit L2 norm: zero response to any
# locally quadratic surface, white noise passes with its variance.
_DETAIL = np.outer([1.0, -2.0, 1.0], [1.0, -2.0, 1.0]) / 6.0
# The detail's variance is read variance + gain x (sum of DETAIL^2 x signal). This weighting minus
# DETAIL / 6 has the same mean for any locally quadratic signal and, unlike DETAIL^2 itself, noise
# uncorrelated with the detail's (sum of DETAIL^3 = 1/6): grouping pixels by it does not select
# their detail.
_LEVEL = _DETAIL**2 - _DETAIL / 6.0
_MAD_TO_SIGMA = 1.4826  # normal distribution (common practice)
_LEVEL_GROUPS = 20
_MIN_GROUP = 100


@dataclass(frozen=True)
class NoiseLine:
    """``variance = read_variance + gain * signal`` for one channel, input units."""

    read_variance: float
    gain: float

    def variance(self, signal):
        return self.read_variance + self.gain * np.maximum(signal, 0.0)


def _detail_and_level(plane: np.ndarray):
    from scipy import ndimage

    plane = np.asarray(plane, dtype=np.float64)
    detail = ndimage.convolve(plane, _DETAIL, mode="reflect")
    level = ndimage.convolve(plane, _LEVEL, mode="reflect")
    smooth = ndimage.gaussian_filter(plane, 1.5, mode="reflect")
    curvature = np.abs(ndimage.convolve(smooth, _DETAIL, mode="reflect")) + np.abs(ndimage.laplace(smooth))
    return detail, level, curvature


def _robust_variance(values: np.ndarray) -> float:
    return float((_MAD_TO_SIGMA * np.median(np.abs(values - np.median(values)))) ** 2)


def level_variances(planes, masks=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Noise variance against signal level, pooled over `planes` (background-subtracted 2-D arrays).

    Returns ``(levels, variances, counts)``, one entry per group of pixels of
    similar local level; the pixels of each group are those of least local
    curvature (see the module docstring).
    """
    details, levels, curvatures = [], [], []
    for i, plane in enumerate(planes):
        detail, level, curvature = _detail_and_level(plane)
        keep = np.isfinite(detail) & np.isfinite(level)
        if masks is not None and masks[i] is not None:
            keep &= np.asarray(masks[i], dtype=bool)
        # The filters reach one pixel beyond the edge: leave the border out.
        keep[:2], keep[-2:], keep[:, :2], keep[:, -2:] = False, False, False, False
        details.append(detail[keep])
        levels.append(level[keep])
        curvatures.append(curvature[keep])
    detail, level, curvature = (np.concatenate(a) if a else np.zeros(0) for a in (details, levels, curvatures))
    if detail.size < 2 * _MIN_GROUP:
        return np.zeros(0), np.zeros(0), np.zeros(0, dtype=int)
    # Half the groups split the pixels evenly, half split the range of levels evenly on a square-root
    # scale (where Poisson spreads are even): a field that is mostly background still gives groups
    # all along its signal range.
    top = np.quantile(level, 0.999)
    spaced = np.linspace(0, np.sqrt(max(top, 0)), _LEVEL_GROUPS // 2 + 1) ** 2
    edges = np.unique(np.concatenate([np.quantile(level, np.linspace(0, 1, _LEVEL_GROUPS // 2 + 1)),
                                      spaced[(spaced > level.min()) & (spaced < level.max())]]))
    group = np.clip(np.searchsorted(edges, level, side="right") - 1, 0, len(edges) - 2)
    centres, variances, counts = [], [], []
    for g in range(len(edges) - 1):
        inside = group == g
        if inside.sum() < 2 * _MIN_GROUP:
            continue
        flat = curvature[inside] <= np.median(curvature[inside])
        centres.append(float(np.median(level[inside][flat])))
        variances.append(_robust_variance(detail[inside][flat]))
        counts.append(int(flat.sum()))
    return np.array(centres), np.array(variances), np.array(counts)


def fit_noise_line(levels, variances, counts, read_variance: float | None = None) -> NoiseLine | None:
    """Weighted straight-line fit of variance against level; None without enough groups.

    The spread of a variance estimate from n normal values is about
    variance x sqrt(2 / n), so each group is weighted by n / variance^2.
    With `read_variance` given (from a dark frame), only the gain is fitted.
    """
    levels, variances, counts = (np.asarray(a, dtype=float) for a in (levels, variances, counts))
    ok = np.isfinite(levels) & np.isfinite(variances) & (variances > 0) & (counts > 0)
    levels, variances, counts = levels[ok], variances[ok], counts[ok]
    if levels.size < (1 if read_variance is not None else 2) or np.ptp(levels) <= 0:
        return None
    weights = counts / variances**2
    if read_variance is not None:
        gain = float(np.sum(weights * levels * (variances - read_variance)) / np.sum(weights * levels**2))
        return NoiseLine(float(read_variance), max(gain, 0.0))
    design = np.stack([np.ones_like(levels), levels], axis=1)
    w = np.sqrt(weights)
    (read, gain), *_ = np.linalg.lstsq(design * w[:, None], variances * w, rcond=None)
    if gain < 0:  # no signal dependence visible: a constant variance
        return NoiseLine(float(np.average(variances, weights=weights)), 0.0)
    if read < 0:  # the line crosses zero above no signal: refit through a small positive floor
        gain = float(np.sum(weights * levels * variances) / np.sum(weights * levels**2))
        return NoiseLine(0.0, max(gain, 0.0))
    return NoiseLine(float(read), float(gain))


def dark_read_variance(plane) -> float:
    """Read variance of a dark frame (or any image without structure): robust spread of the detail."""
    detail, _, _ = _detail_and_level(plane)
    inner = detail[2:-2, 2:-2]
    inner = inner[np.isfinite(inner)]
    return _robust_variance(inner) if inner.size else float("nan")


def photon_transfer(planes, masks=None, read_variance: float | None = None) -> NoiseLine | None:
    """The noise line of one channel from its background-subtracted planes (see the module docstring)."""
    return fit_noise_line(*level_variances(planes, masks), read_variance=read_variance)


# Lag-1 autocorrelation of the background noise above which the neighbour-mean instrument is not
# trusted (a rule of this tool; white noise gives about 0, see neighbour_correlation).
NEIGHBOUR_CORRELATION_LIMIT = 0.1
_CORRELATION_WINDOW = 256
_MIN_PAIRS = 2000
_STRUCTURE_LAG = 4
_STRUCTURE_CORRELATION = 0.1  # pixels 4 apart: about 0 for noise smoothed by up to 1 px, 0.25-0.3 for structure


def neighbour_correlation(plane, background: float, noise: float) -> float:
    """Lag-1 autocorrelation of the background noise of one plane: the larger of along rows and
    along columns; NaN with fewer than 2,000 background pixel pairs.

    Independent pixel noise gives about 0; deconvolution, denoising, lossy
    compression, interpolation or line filtering smooth the noise over
    neighbours and raise it (noise smoothed by a Gaussian of sigma 0.5, 0.7
    and 1 pixel gave 0.24, 0.55 and 0.73 in simulations, white noise -0.02
    to 0.00). Only background pixels of the plane's central window (at most
    256 x 256) are used, so that structures do not count as correlated
    noise: a pixel is background when its neighbourhood (Gaussian sigma 2,
    then 2 pixels further) stays below the background + noise / 2, and its
    residual is its value minus the mean of the background pixels within 7
    pixels.
    """
    from scipy import ndimage

    plane = np.asarray(plane)
    ny, nx = plane.shape
    y0, x0 = max(0, (ny - _CORRELATION_WINDOW) // 2), max(0, (nx - _CORRELATION_WINDOW) // 2)
    window = np.asarray(plane[y0:y0 + _CORRELATION_WINDOW, x0:x0 + _CORRELATION_WINDOW], dtype=np.float64)
    finite = np.isfinite(window)
    if not finite.all():
        window = np.where(finite, window, background)
    quiet = finite & (ndimage.gaussian_filter(window, 2.0, mode="reflect") < background + noise / 2)
    quiet = ~ndimage.binary_dilation(~quiet, iterations=2)
    quiet[:7], quiet[-7:], quiet[:, :7], quiet[:, -7:] = False, False, False, False
    weight = quiet.astype(np.float64)
    local = ndimage.uniform_filter(window * weight, 15, mode="reflect") / np.maximum(
        ndimage.uniform_filter(weight, 15, mode="reflect"), 1e-12)
    residual = window - local
    def correlation(lag):
        values = []
        for a, b, both in ((residual[:, :-lag], residual[:, lag:], quiet[:, :-lag] & quiet[:, lag:]),
                           (residual[:-lag], residual[lag:], quiet[:-lag] & quiet[lag:])):
            if both.sum() >= _MIN_PAIRS:
                u, v = a[both], b[both]
                values.append(float(np.sum(u * v) / np.sqrt(np.sum(u * u) * np.sum(v * v))))
        return max(values) if values else float("nan")

    # Structures are correlated over their whole size, noise from processing over a pixel or two:
    # where pixels 4 apart still correlate, the "background" holds structure and cannot tell.
    if not correlation(_STRUCTURE_LAG) <= _STRUCTURE_CORRELATION:
        return float("nan")
    return correlation(1)


def independent_stride(correlation: float, most: int = 4) -> int:
    """The grid step at which neighbours' noise is nearly independent: the smallest s >= 2 with
    correlation^(s^2) <= 0.1, assuming a Gaussian-shaped correlation (what smoothing leaves), at
    most `most`. A longer step would weaken the instrument more than the leftover correlation
    biases it (in simulations of dim controls)."""
    for stride in range(2, most):
        if max(correlation, 0.0) ** (stride * stride) <= 0.1:
            return stride
    return most


def noise_arrays(noise: dict, n_channels: int) -> tuple[np.ndarray, np.ndarray]:
    """(read_variance, gain) of a noise model ``{"read_variance": (C,), "gain": (C,), ...}``, checked."""
    read = np.asarray(noise["read_variance"], dtype=np.float64)
    gain = np.asarray(noise["gain"], dtype=np.float64)
    if read.shape != (n_channels,) or gain.shape != (n_channels,):
        raise ValueError(f"noise model needs {n_channels} read variances and gains (one per channel)")
    if not (np.all(np.isfinite(read)) and np.all(np.isfinite(gain)) and read.min() >= 0 and gain.min() >= 0):
        raise ValueError("noise model read variances and gains must be finite and >= 0")
    return read, gain
