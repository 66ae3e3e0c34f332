"""Detector levels: background (offset, autofluorescence), saturation, and a clipped offset.

All are per channel and all are needed before any slope or abundance means
anything: the linear model holds only above the offset and below saturation.

Integer images are summarised by their exact histogram (one ``bincount``
pass), which gives medians, robust spreads and pile-ups at once without
sorting; float images use a strided subsample for the quantiles.

A pile-up is a value held by far more pixels than the values next to it: a
detector or converter that cannot report beyond a limit puts every pixel
beyond it at the limit. At the top of the range it is saturation (at full
scale, 2^n - 1, or at any level: a converter range set below full scale, a
clipped float export); at the bottom it is an offset set so low that the
background's noise is cut at the minimum (common on point-scanning systems
whose offset is set for a black background). Both bias slopes: pixels near
the limit no longer follow the linear model.
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
_HALF_WIDTH_TO_SIGMA = 0.6745  # 75th - 50th percentile of a unit normal distribution (common practice)
# A pile-up: at least PILEUP_MIN_PIXELS pixels and 0.01 % of the channel at one value, and at least
# PILEUP_RATIO times as many as at any of the next three values present (a rule of this tool: a
# clipped normal distribution piles up more than 2.5x its neighbours once 1 % of it is clipped).
PILEUP_RATIO = 2.0
PILEUP_MIN_PIXELS = 10
_NEIGHBOURS = 3


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
    minimum : float
        Smallest finite pixel value.
    at_minimum, at_maximum : int
        Pixels exactly at the minimum / maximum.
    near_minimum, near_maximum : int
        The largest count among the next three values present above the
        minimum / below the maximum (the histogram beside a pile-up).
    """

    median: float
    mean: float
    background: float
    noise: float
    candidate_counts: dict
    n_pixels: int
    maximum: float
    max_of_type: float
    minimum: float = float("nan")
    at_minimum: int = 0
    near_minimum: int = 0
    at_maximum: int = 0
    near_maximum: int = 0

    @property
    def clipped_low(self) -> bool:
        """A pile-up at the channel's smallest value, at or below its background: a clipped offset."""
        return bool(is_pileup(self.at_minimum, self.near_minimum, self.n_pixels)
                    and self.minimum <= self.background)

    @property
    def clipped_fraction(self) -> float:
        """Share of the pixels at the clipped minimum (0 when the offset is not clipped)."""
        return self.at_minimum / self.n_pixels if self.clipped_low else 0.0


def _weighted_quantile(values: np.ndarray, weights: np.ndarray, q: float) -> float:
    cumulative = np.cumsum(weights)
    if cumulative[-1] <= 0:
        return float("nan")
    return float(values[np.searchsorted(cumulative, q * cumulative[-1], side="left")])


def _clipped_centre(values: np.ndarray, weights: np.ndarray, iterations: int = 20,
                    upper_half: bool = False) -> tuple[float, float]:
    """Median and robust sigma after iterative symmetric 3-sigma clipping.

    `values` are sorted. Sigma is the interquartile range / 1.349 (normal
    distribution, common practice), which needs no second sort; with
    `upper_half`, the 50th-75th percentile width / 0.6745 (for a peak
    clipped from below).
    """
    keep = weights > 0
    centre = spread = float("nan")
    for _ in range(iterations):
        v, w = values[keep], weights[keep]
        if w.sum() == 0:
            break
        centre = _weighted_quantile(v, w, 0.5)
        if upper_half:
            spread = (_weighted_quantile(v, w, 0.75) - centre) / _HALF_WIDTH_TO_SIGMA
        else:
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
    """Summarise one channel's pixels (any shape) for background, saturation and a clipped offset."""
    pixels = np.asarray(pixels)
    kind = pixels.dtype.kind
    exact = kind in "ub" or (kind == "i" and pixels.dtype.itemsize <= 2)
    if exact:
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
        candidate_counts = {c: int(np.count_nonzero(finite == c)) for c in SATURATION_CANDIDATES}
        max_of_type = float(np.finfo(pixels.dtype).max if kind == "f" else np.iinfo(pixels.dtype).max)
    if n_pixels == 0:
        nan = float("nan")
        return ChannelSummary(nan, nan, nan, nan, candidate_counts, 0, nan, max_of_type)
    median = _weighted_quantile(values, weights, 0.5)
    mean = float(np.average(values, weights=weights))
    if exact:
        minimum, maximum = float(values[0]), float(values[-1])
        at_minimum, at_maximum = int(weights[0]), int(weights[-1])
        near_minimum = int(weights[1:1 + _NEIGHBOURS].max(initial=0))
        near_maximum = int(weights[-1 - _NEIGHBOURS:-1].max(initial=0))
    else:
        minimum, maximum = float(finite.min()), float(finite.max())
        at_minimum, at_maximum = (int(np.count_nonzero(finite == v)) for v in (minimum, maximum))
        # The values beside the extremes, from the sorted sample (scaled to the whole channel).
        distinct, repeats = np.unique(values[(values > minimum)][:_NEIGHBOURS * 64], return_counts=True)
        near_minimum = int(repeats[:_NEIGHBOURS].max(initial=0)) * step
        distinct, repeats = np.unique(values[(values < maximum)][-_NEIGHBOURS * 64:], return_counts=True)
        near_maximum = int(repeats[-_NEIGHBOURS:].max(initial=0)) * step
    background, noise = _clipped_centre(values, weights)
    if is_pileup(at_minimum, near_minimum, n_pixels) and minimum <= background:
        # Clipped from below: the lower quartile may sit on the pile-up; the upper half of the
        # background peak is untouched while less than half of it is clipped.
        background, noise = _clipped_centre(values, weights, upper_half=True)
    return ChannelSummary(median, mean, background, noise, candidate_counts, n_pixels, maximum, max_of_type,
                          minimum, at_minimum, near_minimum, at_maximum, near_maximum)


def is_pileup(at_value: int, beside: int, n_pixels: int) -> bool:
    """True when `at_value` pixels at one value are a pile-up next to `beside` at the next values
    (see PILEUP_RATIO)."""
    return bool(n_pixels and at_value >= max(PILEUP_MIN_PIXELS, SATURATION_MIN_FRACTION * n_pixels)
                and at_value >= PILEUP_RATIO * max(beside, 1))


def saturation_level(summaries) -> float:
    """The saturation level of one channel from the summaries of its images.

    The largest 2^n - 1 (n = 8..16) that at least 0.01 % of the channel's
    pixels reach; else the channel's maximum when it is a pile-up (see
    :func:`is_pileup`) well above the background (a converter range or an
    export clipped below full scale); else the maximum of the pixel type. A
    converter cannot report more than its full scale, so a candidate that
    some pixels exceed is not the saturation level: only the largest value
    present can be, and only when at least 0.01 % of the pixels hold it.
    (Without that rule, any 12-bit image whose pixels pass 2047 would be
    called saturated at 2047.) Pixels at or above the level are saturated.
    """
    summaries = [s for s in summaries]
    maximum = max((s.maximum for s in summaries if s.n_pixels), default=float("nan"))
    at_maximum = sum(s.candidate_counts.get(maximum, 0) for s in summaries)
    n_pixels = sum(s.n_pixels for s in summaries)
    max_of_type = min(s.max_of_type for s in summaries)
    level = level_from_peak(ChannelPeak(maximum, at_maximum, n_pixels), max_of_type)
    if level < max_of_type or not np.isfinite(maximum):
        return level
    top = [s for s in summaries if s.n_pixels and s.maximum == maximum]
    piled = is_pileup(sum(s.at_maximum for s in top), sum(s.near_maximum for s in top), n_pixels)
    clear_of_background = all(maximum > s.background + 10 * s.noise and s.noise > 0 for s in top)
    return float(maximum) if piled and clear_of_background else level


def clipped_offset(summaries) -> tuple[float, float] | None:
    """(level, share of pixels) of a channel clipped at the bottom of its range, pooled over images;
    None when no image of the channel piles up at its minimum."""
    clipped = [s for s in summaries if s.n_pixels and s.clipped_low]
    if not clipped:
        return None
    n_pixels = sum(s.n_pixels for s in summaries)
    return float(max(s.minimum for s in clipped)), sum(s.at_minimum for s in clipped) / max(n_pixels, 1)


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


def reference_levels_outside(stack: np.ndarray, mask: np.ndarray, where: str) -> np.ndarray:
    """Per-channel median of an unstained image (channels first) outside `mask` (its cells): the level
    between the cells, offset plus whatever fluoresces outside them."""
    outside = ~np.broadcast_to(mask, stack.shape[1:])
    if not outside.any():
        raise InputError(f"{where}: the cells cover the whole image; give a field with space between cells "
                         "(or a mask of the cells)")
    level = np.array([float(np.median(stack[c][outside])) for c in range(stack.shape[0])])
    if not np.all(np.isfinite(level)):
        raise InputError(f"{where}: a channel has no finite pixels between the cells; give a valid unstained image")
    return level
