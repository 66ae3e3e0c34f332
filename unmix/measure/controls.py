"""Measuring the bleed-through matrix from single-label controls.

For each label, every control field is reduced to per-block sufficient
statistics in one pass, and both the coefficients and their bootstrap
intervals are computed from those sums, so the bootstrap never touches the
pixels again.

The slope of each channel against the primary channel
-----------------------------------------------------
Both axes carry noise, and selecting pixels by thresholding the noisy primary
value keeps pixels whose noise happened to be upward, which biases any slope
low. Both problems are solved by one instrument: the mean of the 8
neighbours of each pixel in the primary channel (centre excluded). Its noise
is independent of the centre pixel's noise in every channel, while the
optical blur makes it follow the centre's true signal. Pixels are selected on
that proxy, and the slope is the instrumental-variable estimate

    m_c = cov(z, y_c) / cov(z, y_p)

with z the proxy, y_c the channel and y_p the primary (both background
subtracted), covariances taken within each field, so that every field has a
free intercept (reported as a quality figure: it should be near 0 after good
background subtraction). The estimator is consistent with noise on both
axes and unequal (shot-noise) variances.

Uncertainty
-----------
Fields (and specimens) are the unit of replication: coefficients differ
more between fields than pixels within a field suggest. With three or more
fields per label, each field gets its own estimate and its own block
bootstrap variance, and the interval is that of a random-effects
meta-analysis of the fields: the between-field variance by DerSimonian and
Laird, the interval by Hartung and Knapp (a t-interval on k - 1 degrees of
freedom, never narrower than the plain random-effects one). With one or two
fields the between-field variance cannot be estimated; the interval is then
the 95 % percentile interval of a two-stage bootstrap (fields resampled,
then square spatial blocks within each field, since neighbouring pixels are
correlated by the structures and the blur) and covers sampling error within
those fields only, which the matrix file says. Because ``k`` independent
block resamples of one field add up to one multinomial draw of ``k`` times
as many blocks, each replicate is a single weighted sum of block statistics.

Each label's column of coefficients is stored with its covariance (the
bootstrap's correlation between channels, scaled to the interval widths),
so that later stages can draw whole matrices.

The detector's noise line per channel (variance = read variance + gain x
signal, :mod:`unmix.measure.noise`) is fitted on a window of every control
field, with the read variance from the dark frame when one is given.

Checks of the controls
----------------------
Faults that bias coefficients beyond their own intervals with no other sign
are looked for: an offset clipped at the bottom of the range (coefficients
then measured only where the leak stands clear of the clip, or the control
refused), a non-linear detector (the chord slopes of the dimmer and the
brighter quarters of the pixels differ), noise correlated between
neighbours (the proxy then taken on a coarser grid), lateral and axial
misregistration (refused above SHIFT_LIMIT unless a registration is given),
swapped controls and fields that disagree with each other. The sensitivity
of each rule is measured by simulation in the tests.

References
----------
.. [1] O. Reiersøl, "Confluence analysis by means of instrumental sets of
   variables", Arkiv för Matematik, Astronomi och Fysik 32A (1945)
   (from memory).
.. [2] J. Durbin, "Errors in variables", Rev. Int. Stat. Inst. 22:23-32
   (1954) (from memory).
.. [3] E. Carlstein, "The use of subseries values for estimating the variance
   of a general statistic from a stationary sequence", Ann. Statist.
   14:1171-1179 (1986): non-overlapping block resampling (from memory).
.. [4] B. Efron and R. Tibshirani, *An Introduction to the Bootstrap*,
   Chapman & Hall (1993): percentile intervals (from memory).
.. [5] R. DerSimonian and N. Laird, "Meta-analysis in clinical trials",
   Control. Clin. Trials 7:177-188 (1986).
.. [6] J. Hartung and G. Knapp, "A refined method for the meta-analysis of
   controlled clinical trials with binary outcome", Stat. Med. 20:3875-3889
   (2001); the ad hoc variance correction (never below the random-effects
   variance): C. Röver, G. Knapp and T. Friede, BMC Med. Res. Methodol.
   15:99 (2015) (from memory).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from ..errors import InputError, InputWarning
from ..io.images import Image, read_images
from .levels import (ChannelSummary, clipped_offset, per_channel_levels, reference_levels, reference_levels_outside,
                     saturation_level, summarise_channel)
from ..matrix import BleedThroughMatrix
from ..threads import THREADS, map_in_threads


@dataclass(frozen=True)
class MeasureSettings:
    """Parameters of the measurement (recorded in the matrix provenance).

    Attributes
    ----------
    n_boot : int
        Bootstrap replicates for the 95 % intervals.
    block_size : int
        Smallest side of the square spatial blocks resampled by the
        bootstrap, in pixels; should exceed the size of the structures
        (common practice). Large fields are resampled in larger blocks
        (side doubled until at most `max_blocks` remain), which only makes
        the blocks more independent and keeps the bootstrap cheap.
    max_blocks : int
        Most blocks per field that the bootstrap resamples.
    min_snr : float
        A pixel is signal when its neighbour-mean proxy exceeds the field's
        background by this many background noise standard deviations.
    min_pixels : int
        Fewest usable pixels a label needs.
    warn_saturated_fraction, max_saturated_fraction : float
        Share of a control's signal pixels saturated in its primary channel
        above which a warning is given / the control is refused.
    seed : int
        Seed of the bootstrap.
    """

    n_boot: int = 1000
    block_size: int = 32
    max_blocks: int = 1024
    min_snr: float = 3.0
    min_pixels: int = 200
    warn_saturated_fraction: float = 0.01
    max_saturated_fraction: float = 0.25
    seed: int = 0

    def __post_init__(self):
        if self.n_boot < 100:
            raise ValueError("n_boot must be at least 100 for a 95 % interval")
        if self.block_size < 4:
            raise ValueError("block_size must be at least 4 pixels")
        if not self.min_snr > 0:
            raise ValueError("min_snr must be positive")
        if not 0 < self.warn_saturated_fraction <= self.max_saturated_fraction <= 1:
            raise ValueError("need 0 < warn_saturated_fraction <= max_saturated_fraction <= 1")


# Column layout of the per-block statistics: scalars first, then per-channel blocks.
# Groups 0-2 are the pixels in the lower three quarters of the proxy (see kernels.field_statistics).
_N, _SZ, _SX, _SZX, _SXX = range(5)
_GROUPS = 3
_N_SCALARS = 5 + 2 * _GROUPS
_PER_CHANNEL = ("sy", "szy", "sxy", "syy", "sy0", "sy1", "sy2")


def _channel_column(name: str, c: int, n_channels: int) -> int:
    return _N_SCALARS + _PER_CHANNEL.index(name) * n_channels + c


@dataclass
class _FieldResult:
    source: str
    primary: int
    levels: np.ndarray        # saturation levels used
    background: np.ndarray    # background subtracted
    summaries: list           # ChannelSummary per channel
    block_stats: np.ndarray   # (n_blocks, n_stats), blocks with usable pixels only
    n_signal: int
    n_usable: int
    n_nonfinite: int
    saturated_signal: np.ndarray  # per channel: signal pixels at/above saturation
    channel_sums: np.ndarray      # per channel: background-subtracted sum over valid pixels
    n_valid: int
    noise: float
    shift: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))  # per channel (dz, dy, dx)
    shift_error: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))  # its standard error
    noise_groups: list = field(default_factory=list)  # per channel: (levels, variances, counts)
    noise_correlation: np.ndarray = field(default_factory=lambda: np.zeros(0))  # per channel, lag 1
    stride: int = 1               # grid step of the neighbour proxy (> 1 where the noise is correlated)
    min_proxy: float = -np.inf    # raised proxy threshold (above a clipped offset), else -inf


def _as_field_images(source, read_options: dict) -> list[Image]:
    if isinstance(source, Image):
        return [source]
    return read_images(source, **read_options)


def _matched(image: Image, channels: Sequence[str], what: str) -> Image:
    if set(image.channel_names) != set(channels) or len(image.channel_names) != len(channels):
        raise InputError(
            f"{image.name}: {what} has channels {list(image.channel_names)} but the first control has "
            f"{list(channels)}; image every control in the same channels (or fix --channel-names)"
        )
    return image if tuple(image.channel_names) == tuple(channels) else image.select_channels(channels)


def _stack(image: Image) -> np.ndarray:
    """Pixels as (C, P, Y, X): channels first, all other leading axes merged."""
    data = np.asarray(image.data)
    data = np.moveaxis(data, image.channel_axis, 0)
    return data.reshape(data.shape[0], -1, data.shape[-2], data.shape[-1])


_MIN_PLANES_FOR_AXIAL = 4


def _summaries(stack: np.ndarray) -> list[ChannelSummary]:
    """Level summaries of every channel of a (C, ...) stack, channels in threads."""
    return map_in_threads(summarise_channel, [(stack[c],) for c in range(stack.shape[0])])


def _merge_blocks(stats: np.ndarray, blocks_y: int, blocks_x: int, max_blocks: int) -> np.ndarray:
    """Sum 2 x 2 neighbouring blocks until at most `max_blocks` remain (sums add exactly)."""
    grid = stats.reshape(blocks_y, blocks_x, -1)
    while grid.shape[0] * grid.shape[1] > max_blocks and max(grid.shape[:2]) > 1:
        ny, nx = grid.shape[:2]
        padded = np.zeros((ny + ny % 2, nx + nx % 2, grid.shape[2]))
        padded[:ny, :nx] = grid
        grid = padded.reshape(padded.shape[0] // 2, 2, padded.shape[1] // 2, 2, -1).sum(axis=(1, 3))
    return grid.reshape(-1, stats.shape[1])


def _crop_for_registration(shape, usable_per_block: np.ndarray, block_size: int, size: int = 192):
    """A window of at most `size` pixels centred on the block with most usable pixels."""
    ny, nx = shape
    by, bx = np.unravel_index(int(np.argmax(usable_per_block)), usable_per_block.shape)
    cy, cx = by * block_size + block_size // 2, bx * block_size + block_size // 2
    y0 = min(max(cy - size // 2, 0), max(ny - size, 0))
    x0 = min(max(cx - size // 2, 0), max(nx - size, 0))
    return slice(y0, y0 + size), slice(x0, x0 + size)


def _field_statistics(image: Image, primary: int, levels: np.ndarray, background: np.ndarray | None,
                      settings: MeasureSettings, allow_nonfinite: bool,
                      summaries: list | None = None, min_proxy: float = -np.inf, registration=None,
                      mask: np.ndarray | None = None) -> _FieldResult:
    stack = _stack(image)
    if summaries is None:
        summaries = _summaries(stack)  # levels, clipping and saturation are judged on the pixels as acquired
    # Non-finite pixels as acquired (the mask and the registration below add NaNs of their own).
    n_nonfinite = int(np.count_nonzero(~np.all(np.isfinite(stack), axis=0))) if stack.dtype.kind == "f" else 0
    if n_nonfinite and not allow_nonfinite:
        raise InputError(
            f"{image.name}: {n_nonfinite} NaN/inf pixels; fix the control or pass --allow-nonfinite to exclude them"
        )
    prepared = mask is not None
    if mask is not None:
        # Only the pixels of `mask` (an unstained specimen's cells) count: the others become NaN,
        # which the pass excludes (with every pixel whose neighbours they are).
        stack = np.where(np.broadcast_to(mask, stack.shape[1:]), stack, np.nan).astype(np.float32)
    n_z = image.data.shape[image.axes.index("Z")] if "Z" in image.axes else 1
    if registration is not None:
        from .registration import register_stack

        registration.check(image.channel_names, stack.shape, image.name, "this control")
        n_times = stack.shape[1] // n_z
        stack = register_stack(stack, image.channel_names, registration, n_z, levels)
        prepared = True
        n_z = stack.shape[1] // n_times  # the planes that every channel covers
    n_channels, n_planes, ny, nx = stack.shape
    if ny < 3 or nx < 3:
        raise InputError(f"{image.name}: image is only {ny} x {nx} pixels; a control needs at least 3 x 3")
    if background is None:
        background = np.array([s.background for s in summaries])
    if not np.all(np.isfinite(background)):
        raise InputError(f"{image.name}: a channel has no finite pixels; check the control")
    background = np.asarray(background, dtype=np.float64)
    levels = np.asarray(levels, dtype=np.float64)
    noise = summaries[primary].noise
    threshold = (summaries[primary].background - background[primary]) + settings.min_snr * noise
    threshold = max(threshold, min_proxy)

    # The neighbour-mean instrument needs noise independent between neighbours: where it is not
    # (processed data), neighbours are taken on a coarser grid, s pixels apart.
    from .noise import NEIGHBOUR_CORRELATION_LIMIT, independent_stride, neighbour_correlation

    correlation = np.array([neighbour_correlation(stack[c, n_planes // 2], summaries[c].background,
                                                  summaries[c].noise) for c in range(n_channels)])
    worst = np.nanmax(correlation) if np.isfinite(correlation).any() else np.nan
    stride = independent_stride(worst) if worst > NEIGHBOUR_CORRELATION_LIMIT else 1
    block = settings.block_size if stride == 1 else stride * max(2, settings.block_size // stride)
    blocks_y, blocks_x = -(-ny // block), -(-nx // block)
    n_stats = _N_SCALARS + len(_PER_CHANNEL) * n_channels
    grid = np.zeros((blocks_y, blocks_x, n_stats))
    totals = [0, 0, 0, 0, 0]
    for dy in range(stride):
        for dx in range(stride):
            phase = stack[:, :, dy::stride, dx::stride]
            if phase.shape[2] < 3 or phase.shape[3] < 3:
                continue
            stats, *counts = _kernel_pass(phase, background, levels, primary, threshold, block // stride,
                                          n_stats)
            by, bx = -(-phase.shape[2] // (block // stride)), -(-phase.shape[3] // (block // stride))
            grid[:by, :bx] += stats.reshape(by, bx, n_stats)
            totals = [t + c for t, c in zip(totals, counts)]
    stats = grid.reshape(-1, n_stats)
    n_signal, saturated_signal, channel_sums, n_valid, _ = totals
    n_usable = int(stats[:, _N].sum())
    shift, shift_error = np.full((n_channels, 3), np.nan), np.full((n_channels, 3), np.nan)
    if n_usable:
        from .registration import channel_shift, high_pass

        rows, cols = _crop_for_registration((ny, nx), stats[:, _N].reshape(blocks_y, blocks_x), block)
        # Laterally on the middle plane; axially on the z-stack of the middle time point.
        middle = (n_planes // n_z) // 2 * n_z
        planes = slice(middle, middle + n_z) if n_z >= _MIN_PLANES_FOR_AXIAL else slice(n_planes // 2,
                                                                                        n_planes // 2 + 1)

        def crop(c):
            window = stack[c, planes, rows, cols].astype(np.float32) - np.float32(background[c])
            if n_nonfinite or prepared:
                window = np.nan_to_num(window, nan=0.0, posinf=0.0, neginf=0.0)
            return np.stack([high_pass(w) for w in window])

        reference = crop(primary)
        for c in range(n_channels):
            if c == primary:
                shift[c] = shift_error[c] = 0.0
            elif n_z >= _MIN_PLANES_FOR_AXIAL:
                shift[c], shift_error[c] = channel_shift(reference, crop(c), SHIFT_LIMIT / 2)
            else:
                (shift[c, 1:], shift_error[c, 1:]) = channel_shift(reference[0], crop(c)[0], SHIFT_LIMIT / 2)
    noise_groups = _noise_groups(stack, background, levels, stats[:, _N].reshape(blocks_y, blocks_x), block)
    stats = _merge_blocks(stats, blocks_y, blocks_x, settings.max_blocks)
    stats = stats[stats[:, _N] > 0]

    return _FieldResult(
        source=image.name, primary=primary, levels=levels, background=background, summaries=summaries,
        block_stats=stats, n_signal=int(n_signal), n_usable=n_usable, n_nonfinite=int(n_nonfinite),
        saturated_signal=np.asarray(saturated_signal), channel_sums=np.asarray(channel_sums),
        n_valid=int(n_valid), noise=float(noise), shift=shift, shift_error=shift_error, noise_groups=noise_groups,
        noise_correlation=correlation, stride=stride, min_proxy=float(min_proxy),
    )


def _kernel_pass(stack, background, levels, primary, threshold, block_size, n_stats):
    """The compiled measurement pass over a (C, P, Y, X) stack, rows split among threads."""
    from .kernels import field_statistics, proxy_sample

    ny = stack.shape[2]
    # The edges of the intensity groups need only approximate quartiles: a sample of rows will do.
    sample = proxy_sample(stack, background, primary, float(threshold), max(1, ny // 128))
    edges = np.quantile(sample, [0.25, 0.5, 0.75]) if sample.size else np.zeros(_GROUPS)
    # The kernel releases the GIL: split rows among threads.
    bounds = np.linspace(0, ny, THREADS + 1).astype(int)
    parts = map_in_threads(field_statistics, [
        (stack, background, levels, primary, float(threshold), stack.dtype.kind == "f", int(a), int(b),
         edges, block_size, n_stats, _N_SCALARS)
        for a, b in zip(bounds[:-1], bounds[1:]) if b > a])
    return tuple(sum(p[i] for p in parts) for i in range(6))


_NOISE_WINDOW = 384


def _noise_groups(stack, background, levels, usable_per_block, block_size) -> list:
    """Noise variance against level for every channel on one window of the field (its middle plane),
    centred on the most signal: enough levels for the noise line at a fraction of the field's cost."""
    from .noise import level_variances

    n_planes, ny, nx = stack.shape[1:]
    rows, cols = _crop_for_registration((ny, nx), usable_per_block, block_size, _NOISE_WINDOW)
    groups = []
    for c in range(stack.shape[0]):
        window = stack[c, n_planes // 2, rows, cols]
        keep = np.isfinite(window) & (window < levels[c])
        groups.append(level_variances([np.where(keep, window - background[c], 0.0)], [keep]))
    return groups


def _centred(sums: np.ndarray, n_channels: int) -> dict:
    """Within-field centred cross products from summed block statistics (..., n_stats), and the
    means of the primary (x) and every channel (y) in the four intensity groups."""
    def col(name):
        start = _channel_column(name, 0, n_channels)
        return sums[..., start:start + n_channels]

    n = sums[..., _N][..., None]
    with np.errstate(invalid="ignore", divide="ignore"):
        inv_n = np.where(n > 0, 1.0 / np.where(n > 0, n, 1), 0.0)
    sz, sx, szx, sxx = (sums[..., i][..., None] for i in (_SZ, _SX, _SZX, _SXX))
    sy, szy, sxy, syy = (col(name) for name in _PER_CHANNEL[:4])
    group_n = [sums[..., 5 + 2 * g][..., None] for g in range(_GROUPS)]
    group_x = [sums[..., 6 + 2 * g][..., None] for g in range(_GROUPS)]
    group_y = [col(f"sy{g}") for g in range(_GROUPS)]
    group_n.append(n - sum(group_n))
    group_x.append(sx - sum(group_x))
    group_y.append(sy - sum(group_y))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_gx = [gx / gn for gx, gn in zip(group_x, group_n)]
        mean_gy = [gy / gn for gy, gn in zip(group_y, group_n)]
    return {
        "n": n,
        "szy": szy - sz * sy * inv_n,
        "szx": szx - sz * sx * inv_n,
        "syy": syy - sy * sy * inv_n,
        "sxy": sxy - sx * sy * inv_n,
        "sxx": sxx - sx * sx * inv_n,
        "mean_x": sx * inv_n,
        "mean_y": sy * inv_n,
        "group_x": mean_gx,
        "group_y": mean_gy,
    }


def _slopes(field_sums: list[np.ndarray], n_channels: int) -> dict:
    """IV slopes (..., C) pooled over fields with a free intercept per field.

    Returns the slope over all usable pixels, and the chord slopes between
    the mean of the dimmest and of the second quarter of the pixels
    (``slope_dim``) and between the third and the brightest quarter
    (``slope_bright``). Quarters are taken on the noise-independent proxy, so
    each group's means of the primary and of a channel lie on the true
    (noise-free) response curve: the chords are unbiased by noise on either
    axis (grouping estimator, Wald 1940), and a linear detector gives equal
    chords whatever the coefficient.

    References
    ----------
    .. [1] A. Wald, "The fitting of straight lines if both variables are
       subject to error", Ann. Math. Statist. 11:284-300 (1940) (from memory).
    """
    centred = [_centred(s, n_channels) for s in field_sums]
    total = {key: sum(c[key] for c in centred) for key in ("szy", "szx")}

    def chord(low, high):
        # Fields weighted by their usable pixels; each field keeps its own intercept.
        rise = sum(c["n"] * (c["group_y"][high] - c["group_y"][low]) for c in centred)
        run = sum(c["n"] * (c["group_x"][high] - c["group_x"][low]) for c in centred)
        return rise / run

    with np.errstate(invalid="ignore", divide="ignore"):
        return {"slope": total["szy"] / total["szx"], "slope_dim": chord(0, 1), "slope_bright": chord(2, 3)}


def _point_estimates(fields: list[_FieldResult], n_channels: int) -> dict:
    sums = [f.block_stats.sum(axis=0) for f in fields]
    estimates = _slopes(sums, n_channels)
    slope = estimates["slope"]
    centred = [_centred(s, n_channels) for s in sums]
    with np.errstate(invalid="ignore", divide="ignore"):
        ss_res = sum(c["syy"] - 2 * slope * c["sxy"] + slope**2 * c["sxx"] for c in centred)
        estimates["r_squared"] = 1 - ss_res / sum(c["syy"] for c in centred)
        estimates["intercept"] = sum(c["n"] * (c["mean_y"] - slope * c["mean_x"]) for c in centred) / sum(
            c["n"] for c in centred)
    return estimates


def _bootstrap(fields: list[_FieldResult], n_channels: int, settings: MeasureSettings,
               rng: np.random.Generator, n_boot: int | None = None) -> dict:
    """Bootstrap replicates of the slopes (see :func:`_slopes`), each (n_boot, C)."""
    n_fields = len(fields)
    n_boot = n_boot or settings.n_boot
    if n_fields > 1:
        copies = rng.multinomial(n_fields, np.full(n_fields, 1 / n_fields), size=n_boot)
    else:
        copies = np.ones((n_boot, 1), dtype=np.int64)
    from .kernels import block_weights

    replicate_sums = []
    for f, result in enumerate(fields):
        draws = int(copies[:, f].sum()) * result.block_stats.shape[0]
        random_bits = rng.bit_generator.random_raw(draws // 2 + 1)
        weights = block_weights(copies[:, f].astype(np.int64), result.block_stats.shape[0], random_bits)
        replicate_sums.append(weights @ result.block_stats)
    return _slopes(replicate_sums, n_channels)


def _field_replicates(result: _FieldResult, n_channels: int, n_boot: int, rng) -> np.ndarray:
    """Block-bootstrap replicates (n_boot, C) of one field's slopes."""
    from .kernels import block_weights

    n_blocks = result.block_stats.shape[0]
    random_bits = rng.bit_generator.random_raw(n_boot * n_blocks // 2 + 1)
    weights = block_weights(np.ones(n_boot, dtype=np.int64), n_blocks, random_bits)
    return _slopes([weights @ result.block_stats], n_channels)["slope"]


_Z95 = 1.959963984540054


def random_effects(estimates: np.ndarray, variances: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                                           np.ndarray]:
    """Random-effects pooling of k field estimates, per coefficient (columns).

    Parameters
    ----------
    estimates, variances : ndarray (k, C)
        Each field's estimate and its within-field variance.

    Returns
    -------
    mean, low, high, tau : ndarray (C,)
        The pooled estimate, its 95 % Hartung-Knapp interval (t on k - 1
        degrees of freedom, variance never below the plain random-effects
        one) and the between-field standard deviation (DerSimonian-Laird).
    """
    from scipy import stats

    estimates, variances = np.asarray(estimates, float), np.maximum(np.asarray(variances, float), 1e-300)
    k = estimates.shape[0]
    w = 1 / variances
    fixed = (w * estimates).sum(0) / w.sum(0)
    q = (w * (estimates - fixed) ** 2).sum(0)
    tau2 = np.maximum(0.0, (q - (k - 1)) / (w.sum(0) - (w**2).sum(0) / w.sum(0)))
    w_star = 1 / (variances + tau2)
    mean = (w_star * estimates).sum(0) / w_star.sum(0)
    hartung_knapp = (w_star * (estimates - mean) ** 2).sum(0) / ((k - 1) * w_star.sum(0))
    variance = np.maximum(hartung_knapp, 1 / w_star.sum(0))
    half = stats.t.ppf(0.975, k - 1) * np.sqrt(variance)
    return mean, mean - half, mean + half, np.sqrt(tau2)


# A channel shifted more than this from the primary (pixels laterally, planes axially) refuses the
# measurement unless a registration is given: at 1 px a leak was measured 20 % low in simulations
# (common practice: misregistration above about 0.5 px corrupts the matrix).
SHIFT_LIMIT = 0.5
# Above a clipped offset, pixels count only where the leak's expected value stands this many noise
# SDs above the clip (a clipped normal distribution loses 0.13 % of its mass at 3 SDs).
# A shift whose standard error (from the window's quarters) exceeds this is not a measured shift.
SHIFT_MAX_ERROR = 0.5
_T3_975 = 3.182446305284263  # scipy.stats.t.ppf(0.975, 3)
CLIP_MARGIN = 3.0
# At or above this share of a channel's pixels at the clipped minimum, the background's median (its
# level) sits on the clip and cannot be measured: the control is refused.
MAX_CLIPPED_FRACTION = 0.5


def _clip_thresholds(fields: list[_FieldResult], primary: int, clips: list, n_channels: int,
                     settings: MeasureSettings, rng) -> tuple[list[float], list[int]]:
    """Per field, the proxy level above which the leak into every clipped channel stands
    CLIP_MARGIN noise SDs above the clip; and the clipped channels this applies to.

    A channel clipped at the bottom of its range reads too high where the
    expected signal is near the clip, which flattens the slope (by 18 % in
    simulations of a leak of 0.03 with 47 % of its channel clipped). The
    expected leak at a proxy level is the straight line through the means of
    the brightest quarter of the pixels with the bright chord's slope (the
    part of the curve the clip does not reach). Channels whose leak is not
    detectably positive are left alone: no part of their signal rises clear
    of the clip.
    """
    limits = [-np.inf] * len(fields)
    clipped = [c for c, clip in enumerate(clips) if clip is not None and c != primary]
    if not clipped:
        return limits, []
    estimates = _point_estimates(fields, n_channels)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        low = np.nanpercentile(_bootstrap(fields, n_channels, settings, rng, n_boot=200)["slope"], 2.5, axis=0)
    corrected = []
    for c in clipped:
        slope = estimates["slope_bright"][c]
        if not (low[c] > 0 and np.isfinite(slope) and slope > 0):
            continue
        corrected.append(c)
        for i, f in enumerate(fields):
            centred = _centred(f.block_stats.sum(axis=0), n_channels)
            x_top, y_top = float(centred["group_x"][3][0]), float(centred["group_y"][3][c])
            needed = clips[c][0] - f.background[c] + CLIP_MARGIN * f.summaries[c].noise
            limits[i] = max(limits[i], x_top + (needed - y_top) / slope)
    return limits, corrected


def _disagreeing_fields(estimates: np.ndarray, variances: np.ndarray, alpha: float = 0.05) -> list:
    """Fields whose coefficient differs from the other fields' beyond both their intervals.

    For field i and coefficient c: z = (m_i - m_rest) / sqrt(v_i + v_rest),
    m_rest the inverse-variance mean of the other fields and v_rest its
    variance; a field is named when |z| exceeds the two-sided normal
    quantile at `alpha` divided by the number of fields x coefficients
    (Bonferroni), so that homogeneous fields are named in about `alpha` of
    measurements whatever their number (calibrated in tests/test_measure.py).

    Returns (coefficient index, field index, m_i, m_rest, sqrt(v_i + v_rest)) per flag.
    """
    from scipy import stats

    estimates, variances = np.asarray(estimates, float), np.maximum(np.asarray(variances, float), 1e-300)
    n_fields, n_coefficients = estimates.shape
    limit = stats.norm.ppf(1 - alpha / (2 * n_fields * n_coefficients))
    found = []
    for c in range(n_coefficients):
        # The most deviant field first; then the rest again without it, so that one odd field does not
        # make the others look odd too.
        remaining = [i for i in range(n_fields) if np.isfinite(estimates[i, c])]
        while len(remaining) >= 2:
            scores = []
            for i in remaining:
                rest = [j for j in remaining if j != i]
                weights = 1 / variances[rest, c]
                mean_rest = float(np.sum(weights * estimates[rest, c]) / weights.sum())
                spread = float(np.sqrt(variances[i, c] + 1 / weights.sum()))
                scores.append((abs(estimates[i, c] - mean_rest) / spread, i, mean_rest, spread))
            score, i, mean_rest, spread = max(scores)
            if score <= limit:
                break
            found.append((c, i, float(estimates[i, c]), mean_rest, spread))
            if len(remaining) == 2:  # two fields that disagree: one line names the pair
                break
            remaining.remove(i)
    return found


def _swapped_controls(primaries: dict, brightest: dict, per_label: dict, channels: list) -> list[str]:
    """Warnings for controls that look like another label's: brightest in another label's primary channel."""
    messages = []
    for label, channel in brightest.items():
        others = [other for other, primary in primaries.items() if other != label and primary == channels[channel]]
        if not others:
            continue
        other = others[0]
        sources = ", ".join(per_label[label]["sources"])
        if primaries[label] != channels[channel]:
            messages.append(f"{label}: its control ({sources}) is brightest in {channels[channel]}, the primary channel "
                            f"of {other}: this looks like the control of {other}; check that the control files are "
                            "not swapped")
        elif label < other:  # two labels with one primary channel: say it once
            messages.append(f"{label} and {other}: both controls are brightest in {channels[channel]}: one may be "
                            f"the control of the other; check the control files, or give --primary for each label")
    return messages


LINEARITY_TOLERANCE = 0.05


def _linearity_ratio(estimates: dict, replicates: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Slope over the bright half / slope over the dim half per channel, with its bootstrap 95 % interval.

    A linear detector gives 1 whatever the coefficient; compression (a gain
    that falls as the signal rises) makes the primary grow slower than a
    dimmer leak channel, so the ratio rises above 1.
    """
    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ratio = estimates["slope_bright"] / estimates["slope_dim"]
        low, high = np.nanpercentile(replicates["slope_bright"] / replicates["slope_dim"], [2.5, 97.5], axis=0)
    return ratio, low, high


def _nonlinear(ratio: float, low: float, high: float) -> bool:
    """The linearity rule: the ratio's interval excludes 1 and the ratio is off 1 by more than
    LINEARITY_TOLERANCE (its sensitivity and false-flag rate are measured in tests/test_measure.py)."""
    return bool(np.isfinite(ratio) and (low > 1 or high < 1) and abs(ratio - 1) > LINEARITY_TOLERANCE)


def _column_covariance(replicates: np.ndarray, low: np.ndarray, high: np.ndarray, primary: int) -> np.ndarray:
    """Covariance of one column: the bootstrap replicates' correlations, scaled so that each
    coefficient's standard deviation matches its 95 % interval's half-width / 1.96."""
    n_channels = low.size
    covariance = np.zeros((n_channels, n_channels))
    others = [c for c in range(n_channels) if c != primary]
    if not others:
        return covariance
    sample = replicates[:, others]
    sample = sample[np.all(np.isfinite(sample), axis=1)]
    sd = (high[others] - low[others]) / (2 * _Z95)
    with np.errstate(invalid="ignore", divide="ignore"):
        correlation = np.corrcoef(sample, rowvar=False) if sample.shape[0] > 2 else np.eye(len(others))
    correlation = np.atleast_2d(np.nan_to_num(correlation, nan=0.0))
    np.fill_diagonal(correlation, 1.0)
    covariance[np.ix_(others, others)] = correlation * np.outer(sd, sd)
    return covariance


def _noise_model(results: dict, n_channels: int, dark_read: np.ndarray | None) -> dict | None:
    """Per-channel noise lines from the groups of every control field (see :mod:`.noise`)."""
    from .noise import fit_noise_line

    reads, gains = [], []
    for c in range(n_channels):
        groups = [f.noise_groups[c] for fields in results.values() for f in fields if f.noise_groups]
        if not groups:
            return None
        levels, variances, counts = (np.concatenate([g[i] for g in groups]) for i in range(3))
        line = fit_noise_line(levels, variances, counts,
                              read_variance=None if dark_read is None else float(dark_read[c]))
        if line is None:
            return None
        reads.append(line.read_variance)
        gains.append(line.gain)
    return {"read_variance": np.array(reads), "gain": np.array(gains),
            "source": "controls" if dark_read is None else "controls and dark frame"}


def _finite_or_none(value):
    value = float(value)
    return value if math.isfinite(value) else None


def _grid(values) -> list:
    return [[_finite_or_none(v) for v in row] for row in np.asarray(values, dtype=float)]


def measure_matrix(controls: Mapping[str, Sequence], *, unstained=None, dark=None, saturation=None,
                   primary: Mapping[str, str] | None = None, allow_nonfinite: bool = False,
                   settings: MeasureSettings | None = None, axes: str | None = None,
                   channel_names: Sequence[str] | None = None, registration=None,
                   autofluorescence: str | None = None, autofluorescence_mask=None) -> BleedThroughMatrix:
    """Measure the bleed-through matrix from single-label control images.

    Parameters
    ----------
    controls : mapping of str to sequence of Image or path
        Label name -> its control fields. A path stands for every series in
        that file; several fields of one label are pooled.
    unstained, dark : Image or path, optional
        Background reference: an unlabelled specimen (offset plus
        autofluorescence) or a dark frame (offset only). Without either, the
        background of each control field is estimated robustly from the
        field itself (iterative 3-sigma clipping of the median).
    saturation : float or sequence of float, optional
        Saturation level, one for all channels or one per channel. Default:
        the rule of :func:`unmix.measure.levels.saturation_level` on the pooled controls.
    primary : mapping of str to str, optional
        Label -> primary channel name, overriding "brightest channel".
    allow_nonfinite : bool
        Exclude (and count) NaN/inf pixels instead of refusing the control.
    settings : MeasureSettings, optional
    axes, channel_names : optional
        Overrides for the files given as paths (see :func:`unmix.io.images.read_images`).
    registration : Registration, optional
        Per-channel shifts (:mod:`unmix.measure.registration`) applied to every
        control before it is measured. Without one, a control whose channel
        is shifted from its primary by more than SHIFT_LIMIT is refused; with
        one, the shift left after correction is reported.
    autofluorescence : str, optional
        Measure the autofluorescence signature of the cells of `unstained` and
        add it as a label of this name (needs at least one channel more than
        the labels). The background subtracted is then the unstained
        specimen's level between the cells, not its median.
    autofluorescence_mask : Image, path or array, optional
        The cells of `unstained` (non-zero pixels); default: thresholded
        (Otsu's threshold of the smoothed sum of the channels above their
        background).

    Returns
    -------
    BleedThroughMatrix
        Kind "measured", with 95 % intervals and quality figures. Channel
        order is that of the first control.

    Raises
    ------
    InputError
        For controls that cannot give a trustworthy matrix, naming the file.
    """
    settings = settings or MeasureSettings()
    primary = dict(primary or {})
    read_options = {"axes": axes, "channel_names": channel_names}
    registered = registration is not None
    if not controls:
        raise InputError("--control: give at least one single-label control")
    labels = list(controls)
    unknown = set(primary) - set(labels)
    if unknown:
        raise InputError(f"--primary: label {sorted(unknown)[0]!r} has no --control; name a label that has one")

    sources = {label: list(controls[label]) for label in labels}
    for label, fields in sources.items():
        if not fields:
            raise InputError(f"--control {label}: no control image given; give at least one path")
    # Read the first field to fix the channel names and order.
    first_images = _as_field_images(sources[labels[0]][0], read_options)
    channels = list(first_images[0].channel_names)
    n_channels = len(channels)
    for label, name in primary.items():
        if name not in channels:
            raise InputError(f"--primary {label}={name}: no channel {name!r}; channels are {channels}")

    background_source, reference = None, None
    if unstained is not None:
        background_source = "unstained"
        reference = _matched(_as_field_images(unstained, read_options)[0], channels, "the unstained control")
    elif dark is not None:
        background_source = "dark"
        reference = _matched(_as_field_images(dark, read_options)[0], channels, "the dark frame")
    fixed_background = reference_levels(_stack(reference), reference.name) if reference is not None else None
    masks = {}
    if autofluorescence is not None:
        from .autofluorescence import cell_mask, check_autofluorescence

        check_autofluorescence(autofluorescence, labels, channels, reference if unstained is not None else None)
        mask, how = cell_mask(_stack(reference), autofluorescence_mask, reference.name, read_options)
        fixed_background = reference_levels_outside(_stack(reference), mask, reference.name)
        labels.append(autofluorescence)
        sources[autofluorescence] = [reference]
        masks[autofluorescence] = mask
    # The dark frame fixes the variance at zero signal only when its offset is the background
    # subtracted; above an unstained specimen's level, autofluorescence adds its own shot noise.
    dark_read = None
    if dark is not None and unstained is None:
        from .noise import dark_read_variance

        dark_stack = _stack(_matched(_as_field_images(dark, read_options)[0], channels, "the dark frame"))
        dark_read = np.array([dark_read_variance(dark_stack[c, dark_stack.shape[1] // 2]) for c in range(n_channels)])
    fixed_levels = per_channel_levels(saturation, n_channels, "--saturation")

    def field_images(label):
        for i, source in enumerate(sources[label]):
            images = first_images if (label == labels[0] and i == 0) else _as_field_images(source, read_options)
            for image in images:
                yield source, _matched(image, channels, f"the control of {label!r}")

    def process(image, primary_index, label, summaries=None):
        stack_levels = fixed_levels
        if stack_levels is None:
            summaries = summaries or _summaries(_stack(image))
            stack_levels = np.array([saturation_level([s]) for s in summaries])
        return _field_statistics(image, primary_index, stack_levels, fixed_background, settings,
                                 allow_nonfinite, summaries, registration=registration, mask=masks.get(label))

    results: dict[str, list[_FieldResult]] = {}
    field_sources: dict[str, list] = {}
    for label in labels:
        results[label], field_sources[label] = [], []
        forced = primary.get(label)
        chosen = channels.index(forced) if forced else None
        for source, image in field_images(label):
            if chosen is None:
                summaries = _summaries(_stack(image))
                chosen = int(np.argmax([s.mean - s.background for s in summaries]))
                result = process(image, chosen, label, summaries)
                chosen = int(np.argmax(result.channel_sums))
                if chosen != result.primary:
                    result = process(image, chosen, label, result.summaries)
            else:
                result = process(image, chosen, label)
            results[label].append(result)
            field_sources[label].append(source)

    pooled_summaries = [[s for fields in results.values() for f in fields for s in [f.summaries[c]]]
                        for c in range(n_channels)]
    levels = fixed_levels if fixed_levels is not None else np.array(
        [saturation_level(pooled_summaries[c]) for c in range(n_channels)])

    matrix = np.zeros((n_channels, len(labels)))
    low, high = np.zeros_like(matrix), np.zeros_like(matrix)
    covariance = np.zeros((len(labels), n_channels, n_channels))
    grids = {name: np.full_like(matrix, np.nan) for name in
             ("r_squared", "intercept", "slope_dim", "slope_bright", "linearity_ratio", "linearity_ratio_low",
              "linearity_ratio_high", "saturated_fraction",
              "registration_shift_px", "axial_shift_planes", "between_field_sd")}
    per_label = {}
    primaries, brightest_of = {}, {}
    flags = []
    clips = [clipped_offset([f.summaries[c] for fields in results.values() for f in fields])
             for c in range(n_channels)]
    for f in (f for fields in results.values() for f in fields):
        for c, summary in enumerate(f.summaries):
            if summary.clipped_fraction >= MAX_CLIPPED_FRACTION:
                raise InputError(
                    f"{f.source}: {100 * summary.clipped_fraction:.0f} % of channel {channels[c]} sits at "
                    f"{summary.minimum:g}, the bottom of the range: the detector offset cuts off the background, "
                    "whose level and noise cannot be measured then; raise the offset (no pixel at the minimum) "
                    "and re-image")
    for c, clip in enumerate(clips):
        if clip is not None:
            flags.append(f"{channels[c]}: {100 * clip[1]:.1f} % of the control pixels sit at {clip[0]:g}, the bottom "
                         "of the range: the detector offset clips the background (set it so that no pixel reads the "
                         "minimum); coefficients measured in this channel are corrected where possible")

    for k, label in enumerate(labels):
        fields = results[label]
        brightness = sum(f.channel_sums for f in fields) / max(sum(f.n_valid for f in fields), 1)
        brightest = int(np.argmax(brightness))
        p = fields[0].primary
        if label not in primary and brightest != p:
            # Pooled over fields another channel is brightest: redo with that one.
            p = brightest
        # Fields measured with a provisional primary, or with a saturation level
        # above the pooled one, are measured again (rare: a second read).
        redo = [i for i, f in enumerate(fields) if f.primary != p or np.any(f.levels > levels)]
        if redo:
            images = [image for _, image in field_images(label)]
            for i in redo:
                fields[i] = _field_statistics(images[i], p, levels, fixed_background, settings,
                                              allow_nonfinite, fields[i].summaries, registration=registration,
                                              mask=masks.get(label))
        primaries[label] = channels[p]
        brightest_of[label] = brightest
        where = ", ".join(dict.fromkeys(f.source for f in fields))

        # A channel clipped at the bottom of its range: measured only where the leak stands clear of the clip.
        minimum_proxy, corrected = _clip_thresholds(fields, p, clips, n_channels, settings,
                                                    np.random.default_rng([settings.seed, k, 1]))
        if corrected:
            before = sum(f.n_usable for f in fields)
            images = [image for _, image in field_images(label)]
            fields[:] = [_field_statistics(image, p, levels, fixed_background, settings, allow_nonfinite, f.summaries,
                                           min_proxy=threshold, registration=registration, mask=masks.get(label))
                         for image, threshold, f in zip(images, minimum_proxy, fields)]
            after = sum(f.n_usable for f in fields)
            names = ", ".join(channels[c] for c in corrected)
            if after < settings.min_pixels:
                c = corrected[0]
                raise InputError(
                    f"{where}: the offset clips channel {channels[c]} at {clips[c][0]:g} ({100 * clips[c][1]:.1f} % "
                    f"of its pixels) and only {after} pixels of {label!r} (need {settings.min_pixels}) are bright "
                    f"enough for its leak to stand {CLIP_MARGIN:g} noise SDs above the clip; raise the detector "
                    "offset (no pixel at the minimum) and re-image the controls")
            flags.append(f"{label} in {names}: the offset clips {names} at the bottom of the range; measured only "
                         f"where the leak stands {CLIP_MARGIN:g} noise SDs above the clip ({after} of {before} "
                         "usable pixels); raise the detector offset for a full measurement")

        n_usable = sum(f.n_usable for f in fields)
        n_signal = sum(f.n_signal for f in fields)
        if n_usable < settings.min_pixels:
            if label in masks:
                raise InputError(
                    f"{where}: the cells' autofluorescence ({label!r}) stands clearly above the level between the "
                    f"cells in only {n_usable} pixels (need {settings.min_pixels}); image the unstained specimen "
                    "brighter, or leave out --autofluorescence")
            if n_signal and sum(f.saturated_signal[p] for f in fields) >= n_signal - n_usable > 0:
                reason = "all its signal pixels are saturated"
            else:
                reason = "no pixels stand clearly above background"
            raise InputError(
                f"{where}: control of {label!r} has {n_usable} usable pixels (need {settings.min_pixels}): "
                f"{reason}; image a brighter, unsaturated single-label control"
            )
        saturated_primary = sum(f.saturated_signal[p] for f in fields) / max(n_signal, 1)
        if saturated_primary > settings.max_saturated_fraction:
            raise InputError(
                f"{where}: {100 * saturated_primary:.1f} % of the signal pixels of {label!r} are saturated in "
                f"its primary channel {channels[p]!r} (limit {100 * settings.max_saturated_fraction:g} %); "
                "re-image the control with less exposure or gain"
            )
        if saturated_primary > settings.warn_saturated_fraction:
            flags.append(f"{label}: {100 * saturated_primary:.1f} % of signal pixels saturated in primary "
                         f"channel {channels[p]} (excluded)")
        if label in primary and brightest != p:
            flags.append(f"{label}: primary channel {channels[p]} given by --primary is not the brightest "
                         f"({channels[brightest]} is)")
        correlated = [(f.source, c, f.noise_correlation[c], f.stride) for f in fields if f.stride > 1
                      for c in [int(np.nanargmax(f.noise_correlation))]]
        if correlated:
            source, c, value, stride = max(correlated, key=lambda item: item[2])
            flags.append(f"{label}: noise correlated between neighbouring pixels (lag-1 autocorrelation {value:.2f} "
                         f"in {channels[c]} of {source}; processed data: deconvolved, denoised, lossy-compressed or "
                         "filtered?): the neighbour-mean instrument is biased on such data, so it was taken from "
                         f"pixels {stride} apart in {len(correlated)} of {len(fields)} field(s) (wider interval); "
                         "the noise model underestimates such noise: measure on raw data where you can")

        estimates = _point_estimates(fields, n_channels)
        rng = np.random.default_rng([settings.seed, k])
        replicates = _bootstrap(fields, n_channels, settings, rng)
        slope = estimates["slope"]
        slope[p] = 1.0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nanpercentile(replicates["slope"], [2.5, 97.5], axis=0)
        linearity = _linearity_ratio(estimates, replicates)
        others = [c for c in range(n_channels) if c != p]
        if len(fields) >= 2:
            per_field = np.array([_slopes([f.block_stats.sum(axis=0)], n_channels)["slope"] for f in fields])
            within = np.array([np.nanvar(_field_replicates(f, n_channels, max(200, settings.n_boot // 5), rng),
                                         axis=0, ddof=1) for f in fields])
            for c, i, value, rest, spread in _disagreeing_fields(per_field[:, others], within[:, others]):
                flags.append(f"{label} in {channels[others[c]]}: field {fields[i].source} gives {value:.4f}, the "
                             f"other field(s) {rest:.4f} (difference {value - rest:+.4f}, beyond the fields' own "
                             f"intervals: +-{1.96 * spread:.4f}); check that field (focus, drift, another specimen "
                             "or label) or image more fields")
        if len(fields) >= 3:
            slope, lo, hi = np.ones(n_channels), np.ones(n_channels), np.ones(n_channels)
            slope[others], lo[others], hi[others], tau = random_effects(per_field[:, others], within[:, others])
            grids["between_field_sd"][others, k] = tau
            covers = (f"sampling error and between-field variation ({len(fields)} fields, random effects, "
                      "Hartung-Knapp interval)")
        else:
            covers = (f"sampling error within the {len(fields)} field{'s' if len(fields) > 1 else ''} only "
                      "(between-field variation needs at least 3 fields)")
        lo, hi = np.fmin(lo, slope), np.fmax(hi, slope)
        lo[p] = hi[p] = 1.0
        matrix[:, k], low[:, k], high[:, k] = slope, lo, hi
        covariance[k] = _column_covariance(replicates["slope"], lo, hi, p)
        for name in ("r_squared", "intercept", "slope_dim", "slope_bright"):
            grids[name][:, k] = estimates[name]
        for name, values in zip(("linearity_ratio", "linearity_ratio_low", "linearity_ratio_high"), linearity):
            grids[name][:, k] = values
            grids[name][p, k] = np.nan
        grids["saturated_fraction"][:, k] = sum(f.saturated_signal for f in fields) / max(n_signal, 1)
        lateral = np.array([np.hypot(f.shift[:, 1], f.shift[:, 2]) for f in fields])
        lateral_error = np.array([np.hypot(f.shift_error[:, 1], f.shift_error[:, 2]) for f in fields])
        axial = np.array([np.abs(f.shift[:, 0]) for f in fields])
        axial_error = np.array([f.shift_error[:, 0] for f in fields])
        # A peak whose position the quarters of the window do not agree on is noise, not a shift.
        for value, error in ((lateral, lateral_error), (axial, axial_error)):
            value[~(error <= SHIFT_MAX_ERROR)] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            grids["registration_shift_px"][:, k] = np.nanmax(lateral, axis=0)
            grids["axial_shift_planes"][:, k] = np.nanmax(axial, axis=0)

        for c in range(n_channels):
            if c == p:
                continue
            detectable = lo[c] > 0 or hi[c] < 0
            ratio, ratio_lo, ratio_hi = linearity[0][c], linearity[1][c], linearity[2][c]
            if detectable and _nonlinear(ratio, ratio_lo, ratio_hi):
                flags.append(f"{label} in {channels[c]}: slope over the bright half is {ratio:.3f} x the slope over "
                             f"the dim half (95 % interval {ratio_lo:.3f}-{ratio_hi:.3f}): a non-linear detector "
                             "(compression near saturation, or a gain that changes with signal) or an unmodelled "
                             "signal such as structured autofluorescence; re-image the control at lower gain or "
                             "exposure")
            if not detectable:
                # No leak to correlate with: the peak position would be noise.
                grids["registration_shift_px"][c, k] = grids["axial_shift_planes"][c, k] = np.nan
                continue
            for value, error, unit, what in ((lateral[:, c], lateral_error[:, c], "px", "laterally"),
                                             (axial[:, c], axial_error[:, c], "planes", "axially")):
                if not np.nanmax(value, initial=-np.inf) > SHIFT_LIMIT:
                    continue
                i = int(np.nanargmax(value))
                # Refused only when the shift is above the limit beyond its own uncertainty: the error
                # comes from four quarters, so the t quantile on 3 degrees of freedom (3.18).
                certain = bool(np.any(value - _T3_975 * error > SHIFT_LIMIT))
                if registered:
                    flags.append(f"{label} in {channels[c]}: still shifted {value[i]:.2f} {unit} {what} from the "
                                 "primary after registration; measure the registration again on beads")
                elif certain:
                    raise InputError(
                        f"{where}: channel {channels[c]} of the control of {label!r} is shifted {value[i]:.2f} {unit} "
                        f"{what} from its primary {channels[p]} (limit {SHIFT_LIMIT:g}): its coefficient would be "
                        "biased; measure the shifts with 'unmix align' (beads, or these controls) and give "
                        "--registration")
                else:
                    flags.append(f"{label} in {channels[c]}: maybe shifted {value[i]:.2f} +- {error[i]:.2f} {unit} "
                                 f"{what} from the primary (too uncertain to refuse); check the registration on beads")
        if not np.all(np.isfinite(slope)):
            raise InputError(f"{where}: control of {label!r} gives no finite slope; check that it holds structure, not flat signal")

        per_label[label] = {
            "fields": len(fields),
            "sources": [f.source for f in fields],
            "usable_pixels": int(n_usable),
            "signal_pixels": int(n_signal),
            "nonfinite_pixels": int(sum(f.n_nonfinite for f in fields)),
            "primary_saturated_fraction": _finite_or_none(saturated_primary),
            "primary_is_brightest": bool(brightest == p),
            "brightness": {channels[c]: _finite_or_none(brightness[c]) for c in range(n_channels)},
            "noise_sd": _finite_or_none(np.mean([f.noise for f in fields])),
            "blocks": int(sum(f.block_stats.shape[0] for f in fields)),
            "interval_covers": covers,
        }
        if label in masks:
            per_label[label].update({"role": "autofluorescence", "cell_pixels": int(np.count_nonzero(masks[label])),
                                     "cells": how, "nonfinite_pixels": 0})

    flags += _swapped_controls({k: v for k, v in primaries.items() if k not in masks},
                               {k: v for k, v in brightest_of.items() if k not in masks}, per_label, channels)
    for message in flags:
        warnings.warn(message, InputWarning, stacklevel=2)

    all_fields = [f for fields in results.values() for f in fields]
    if fixed_background is not None:
        background = fixed_background
    else:
        background_source = "estimated"
        background = np.mean([f.background for f in all_fields], axis=0)

    qc = {name: _grid(values) for name, values in grids.items()}
    qc["labels"] = per_label
    qc["flags"] = flags
    qc["definitions"] = {
        "r_squared": "share of the channel's variance explained by the line, pooled over fields",
        "intercept": "fitted offset at zero primary signal, input units; near 0 after good background subtraction",
        "slope_dim": "chord slope between the means of the dimmest and the second quarter of the usable pixels",
        "slope_bright": "chord slope between the means of the third and the brightest quarter; differs from "
                        "slope_dim when the detector is non-linear",
        "linearity_ratio": "slope_bright / slope_dim (1 for a linear detector), with its bootstrap 95 % interval "
                           "(linearity_ratio_low, linearity_ratio_high)",
        "saturated_fraction": "share of the label's signal pixels saturated in this channel (excluded)",
        "registration_shift_px": "lateral shift of the cross-correlation peak between this channel and the "
                                 "primary, pixels (null where the leak is too small to measure it; after "
                                 "registration: the residual shift)",
        "axial_shift_planes": "axial shift between this channel and the primary in z-stack controls, planes "
                              "(null where not measured)",
        "between_field_sd": "standard deviation of the coefficient between fields (random effects; null with "
                            "fewer than 3 fields)",
    }
    noise_model = _noise_model(results, n_channels, dark_read)
    if noise_model is not None:
        from .spreading import spreading_record

        qc["spreading"] = spreading_record(matrix, labels, noise_model)
    return BleedThroughMatrix(
        kind="measured", channels=tuple(channels), labels=tuple(labels), primary=primaries,
        matrix=matrix, ci95_low=low, ci95_high=high, background=np.asarray(background, dtype=float),
        background_source=background_source, saturation=np.asarray(levels, dtype=float),
        noise_model=noise_model, column_covariance=covariance, qc=qc,
        provenance={"settings": settings.__dict__.copy()},
    )


def measure_files(controls: Mapping[str, Sequence], *, unstained=None, dark=None, saturation=None,
                  primary=None, allow_nonfinite=False, settings=None, axes=None,
                  channel_names=None, registration=None, autofluorescence=None,
                  autofluorescence_mask=None) -> BleedThroughMatrix:
    """:func:`measure_matrix` on files, with axis and channel-name overrides and full provenance.

    Every path is read only when it is processed, so memory holds one
    control field at a time. The controls' acquisition settings (from their
    OME metadata, :mod:`unmix.io.acquisition`) are stored in the provenance
    (``acquisition``), so that ``apply`` and ``coloc`` can compare samples
    with them; controls that differ from each other are warned of.
    """
    from ..io import provenance as prov

    settings = settings or MeasureSettings()
    seen = {}
    all_paths = [(label, path) for label, paths in controls.items() for path in paths]
    all_paths += [(role, p) for role, p in (("unstained", unstained), ("dark", dark),
                                            ("autofluorescence mask", autofluorescence_mask)) if p is not None]
    for role, path in all_paths:
        identity = str(Path(path).resolve())
        if identity in seen:
            raise InputError(f"{path}: given twice (as {seen[identity]!r} and {role!r}); give each file once")
        seen[identity] = role
        if not Path(path).exists():
            raise InputError(f"{path}: no such file; check the path")

    import threading
    from concurrent.futures import ThreadPoolExecutor

    # Checksums are computed in a background thread while measuring (hashlib
    # releases the GIL), so that the second core can take that work.
    stop = threading.Event()
    with ThreadPoolExecutor(max_workers=1) as pool:
        described = [pool.submit(prov.describe_input, path, "control" if role in controls else role, stop,
                                 **({"label": role} if role in controls else {})) for role, path in all_paths]
        try:
            matrix = measure_matrix(
                controls, unstained=unstained, dark=dark, saturation=saturation, primary=primary,
                allow_nonfinite=allow_nonfinite, settings=settings, axes=axes, channel_names=channel_names,
                registration=registration, autofluorescence=autofluorescence,
                autofluorescence_mask=autofluorescence_mask,
            )
        except BaseException:
            # A bad input ends the run now, not after the checksums of every (possibly huge) input.
            stop.set()
            pool.shutdown(wait=True, cancel_futures=True)
            raise
        entries = [future.result() for future in described]
    from ..io.acquisition import combine_settings

    imaged = [(role, path) for role, path in all_paths if role != "autofluorescence mask"]
    acquisition = combine_settings([path for _, path in imaged], [role for role, _ in imaged],
                                   channel_names=channel_names)
    provenance = {
        "created": prov.utc_now(),
        "command": "measure",
        "software": prov.software(),
        "inputs": entries,
        "parameters": {
            "settings": settings.__dict__.copy(), "saturation": saturation, "primary": dict(primary or {}),
            "allow_nonfinite": allow_nonfinite, "axes": axes,
            "channel_names": None if channel_names is None else list(channel_names),
            "autofluorescence": autofluorescence,
            "autofluorescence_mask": None if autofluorescence_mask is None else str(autofluorescence_mask),
            "registration": None if registration is None else registration.to_dict(),
        },
        "acquisition": acquisition,
    }
    return BleedThroughMatrix.from_dict({**matrix.to_dict(), "provenance": provenance})

