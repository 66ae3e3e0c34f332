"""Detector levels: background (offset, autofluorescence) and saturation.

Both are per channel and both are needed before any slope or abundance means
anything: the linear model holds only above the offset and below saturation.

Integer images are summarised by their exact histogram (one ``bincount``
pass), which gives medians, robust spreads and saturation pile-ups at once
without sorting; float images use a strided subsample for the quantiles.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

# Saturation pile-ups are looked for at the full scale of 8- to 16-bit
# converters: 2^n - 1 for n = 8..16 (the command line's contract).
SATURATION_CANDIDATES = tuple(2**n - 1 for n in range(16, 7, -1))
SATURATION_MIN_FRACTION = 1e-4  # 0.01 % of a channel's pixels
_FLOAT_SAMPLE = 1_000_000
_IQR_TO_SIGMA = 1.349  # interquartile range of a unit normal distribution (common practice)


@dataclass(frozen=True)
class ChannelSummary:
    """What one pass over one channel's pixels tells about its levels.

    Attributes
    ----------
    median : float
        Median of the finite pixels.
    mean : float
        Mean of the finite pixels.
    background : float
        Robust background level: the centre of the dominant low peak,
        found by iterative 3-sigma clipping of the median.
    noise : float
        Robust standard deviation of the background pixels.
    candidate_counts : dict
        Number of pixels exactly at each 2^n - 1 saturation candidate.
    n_pixels : int
        Number of finite pixels.
    maximum : float
        Largest finite pixel value.
    max_of_type : float
        Largest value the pixel type can hold.
    """

    median: float
    mean: float
    background: float
    noise: float
    candidate_counts: dict
    n_pixels: int
    maximum: float
    max_of_type: float


def _weighted_quantile(values: np.ndarray, weights: np.ndarray, q: float) -> float:
    cumulative = np.cumsum(weights)
    if cumulative[-1] <= 0:
        return float("nan")
    return float(values[np.searchsorted(cumulative, q * cumulative[-1], side="left")])


def _clipped_centre(values: np.ndarray, weights: np.ndarray, iterations: int = 20) -> tuple[float, float]:
    """Median and robust sigma after iterative symmetric 3-sigma clipping.

    `values` are sorted. Sigma is the interquartile range / 1.349 (normal
    distribution, common practice), which needs no second sort.
    """
    keep = weights > 0
    centre = spread = float("nan")
    for _ in range(iterations):
        v, w = values[keep], weights[keep]
        if w.sum() == 0:
            break
        centre = _weighted_quantile(v, w, 0.5)
        spread = (_weighted_quantile(v, w, 0.75) - _weighted_quantile(v, w, 0.25)) / _IQR_TO_SIGMA
        if spread == 0:
            # Quantised data with a narrow peak: fall back to the standard deviation.
            mean = np.average(v, weights=w)
            spread = float(np.sqrt(np.average((v - mean) ** 2, weights=w)))
        new_keep = (weights > 0) & (np.abs(values - centre) <= 3 * max(spread, 1e-12))
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    return centre, spread


def summarise_channel(pixels) -> ChannelSummary:
    """Summarise one channel's pixels (any shape) for background and saturation."""
    pixels = np.asarray(pixels)
    kind = pixels.dtype.kind
    if kind in "ub" or (kind == "i" and pixels.dtype.itemsize <= 2):
        from .kernels import histogram

        flat = pixels.ravel()
        offset = 0
        if kind == "i":
            offset = int(flat.min())
            flat = flat.astype(np.int64) - offset
        counts = histogram(flat, int(flat.max()) + 1)
        present = np.flatnonzero(counts)  # only occupied bins: a few thousand, not 65,536
        values = present.astype(np.float64) + offset
        weights = counts[present].astype(np.float64)
        n_pixels = int(counts.sum())
        candidate_counts = {c: int(counts[c - offset]) if 0 <= c - offset < counts.size else 0
                            for c in SATURATION_CANDIDATES}
        max_of_type = float(np.iinfo(pixels.dtype).max) if kind in "ui" else 1.0
    else:
        flat = pixels.ravel()
        finite = flat[np.isfinite(flat)] if kind == "f" else flat
        n_pixels = int(finite.size)
        step = max(1, finite.size // _FLOAT_SAMPLE)
        values = np.sort(finite[::step].astype(np.float64))
        weights = np.ones_like(values)
        if kind == "f":
            candidate_counts = {c: int(np.count_nonzero(finite == c)) for c in SATURATION_CANDIDATES}
            max_of_type = float(np.finfo(pixels.dtype).max)
        else:  # wide integers: exact counts are cheap enough
            candidate_counts = {c: int(np.count_nonzero(finite == c)) for c in SATURATION_CANDIDATES}
            max_of_type = float(np.iinfo(pixels.dtype).max)
    if n_pixels == 0:
        nan = float("nan")
        return ChannelSummary(nan, nan, nan, nan, candidate_counts, 0, nan, max_of_type)
    median = _weighted_quantile(values, weights, 0.5)
    mean = float(np.average(values, weights=weights))
    background, noise = _clipped_centre(values, weights)
    maximum = float(values[-1]) if kind in "ubi" and pixels.dtype.itemsize <= 2 else float(finite.max())
    return ChannelSummary(median, mean, background, noise, candidate_counts, n_pixels, maximum, max_of_type)


def saturation_level(summaries) -> float:
    """The saturation level of one channel from the summaries of its images.

    The largest 2^n - 1 (n = 8..16) that at least 0.01 % of the channel's
    pixels reach, else the maximum of the pixel type. A converter cannot
    report more than its full scale, so a candidate that some pixels exceed
    is not the saturation level: only the largest value present can be, and
    only when it is a pile-up of at least 0.01 % of the pixels. (Without that
    rule, any 12-bit image whose pixels pass 2047 would be called saturated
    at 2047.) Pixels at or above the level are saturated.
    """
    summaries = list(summaries)
    maximum = max((s.maximum for s in summaries if s.n_pixels), default=float("nan"))
    at_maximum = sum(s.candidate_counts.get(maximum, 0) for s in summaries)
    return level_from_peak(ChannelPeak(maximum, at_maximum, sum(s.n_pixels for s in summaries)),
                           min(s.max_of_type for s in summaries))


@dataclass(frozen=True)
class ChannelPeak:
    """The top of one channel's histogram: all that the saturation rule needs.

    Peaks of parts of a channel (blocks of a stack) combine with ``+``.
    """

    maximum: float
    at_maximum: int
    n_pixels: int

    def __add__(self, other: "ChannelPeak") -> "ChannelPeak":
        maximum = max(self.maximum, other.maximum)
        at_maximum = sum(p.at_maximum for p in (self, other) if p.maximum == maximum)
        return ChannelPeak(maximum, at_maximum, self.n_pixels + other.n_pixels)


def level_from_peak(peak: ChannelPeak, max_of_type: float) -> float:
    """The contract's saturation rule (see :func:`saturation_level`) from a channel's peak."""
    if peak.maximum in SATURATION_CANDIDATES and peak.at_maximum >= SATURATION_MIN_FRACTION * peak.n_pixels:
        return float(peak.maximum)
    return float(max_of_type)


def per_channel_levels(saturation, n_channels: int, what: str) -> np.ndarray | None:
    """Saturation levels given as one number or one per channel, as an array of `n_channels`."""
    if saturation is None:
        return None
    levels = np.atleast_1d(np.asarray(saturation, dtype=float))
    if levels.size == 1:
        levels = np.full(n_channels, levels[0])
    if levels.size != n_channels or not np.all(levels > 0):
        raise InputError(f"{what}: give one positive saturation level, or one per channel ({n_channels})")
    return levels


def reference_levels(stack: np.ndarray, where: str) -> np.ndarray:
    """Per-channel median of an unstained or dark image (channels first): the level to subtract."""
    level = np.array([summarise_channel(stack[c]).median for c in range(stack.shape[0])])
    if not np.all(np.isfinite(level)):
        raise InputError(f"{where}: a channel has no finite pixels; give a valid background image")
    return level
