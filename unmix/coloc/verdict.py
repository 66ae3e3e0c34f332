"""Colocalization before and after unmixing, and whether the overlap is real.

"Before" is measured on the primary channels of the two labels after
background subtraction, "after" on their unmixed abundances; saturated
pixels (any channel at its saturation level) are left out of both and
counted. Unmixing itself moves Pearson r: it amplifies noise, and the
unmixed noise of two labels is negatively correlated. So the whole pipeline
is simulated under "bleed-through only": the unmixed abundance of B is
shifted toroidally (beyond its correlation length, so that A and B become
independent), both are mixed again through a matrix drawn from the measured
95 % intervals, camera noise is added (a photon-transfer model estimated
from the image itself: variance = read variance + gain x signal), the result
is unmixed with the measured matrix and measured again, many times. That
gives the before-r that bleed-through alone produces and the spread of the
before-minus-after difference that unmixing alone explains.

Verdicts (Pearson r, the command line's contract): "overlap" = r >= min_r and
p < alpha (the spatial randomisation test of :mod:`unmix.coloc.statistics`);

- ``bleed-through-only``: overlap before, none after;
- ``inflated``: overlap after, and before exceeds after by more than the
  (1 - alpha) quantile of the simulated differences;
- ``persists``: overlap after, not clearly smaller than before;
- ``revealed``: no overlap before, overlap after;
- ``none``: no overlap before or after (a significantly negative r, i.e.
  exclusion, is no overlap).

The matrix's own uncertainty is carried into the after-coefficients: the
image is unmixed again with matrices drawn from the 95 % intervals, giving
an interval for the after-r.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import statistics as coloc
from ..errors import InputError
from ..matrix import BleedThroughMatrix

VERDICTS = {
    "bleed-through-only": "the raw channels overlap, the unmixed labels do not: the overlap was bleed-through",
    "inflated": "the labels overlap, but less than the raw channels suggest: bleed-through inflated it beyond "
                "what unmixing alone explains",
    "persists": "the labels overlap before and after unmixing, about as much: the overlap is not bleed-through",
    "revealed": "the labels overlap only after unmixing (bleed-through or noise hid it before)",
    "none": "no overlap, before or after unmixing",
}
SIMULATIONS = 24
MATRIX_DRAWS = 24
_Z95 = 1.959963984540054  # normal quantile of a 95 % interval


@dataclass(frozen=True)
class PairResult:
    pair: tuple[str, str]
    before: coloc.Coefficients
    after: coloc.Coefficients
    verdict: str
    after_pearson_interval: tuple | None
    bleed_through_only_pearson: tuple | None  # (median, 2.5 %, 97.5 %) of the simulated before-r
    difference_bound: float | None  # (1 - alpha) quantile of the simulated before - after
    saturated_pixels: int
    pixels: int
    flat_field: str
    min_r: float
    alpha: float

    def to_dict(self) -> dict:
        """The contract's keys (pair, before, after, verdict) and the figures behind the verdict."""
        def contract(c: coloc.Coefficients) -> dict:
            d = c.to_dict()
            keys = ("pearson", "spearman", "manders_m1", "manders_m2", "thresholds", "icq", "p_value")
            return {**{k: d[k] for k in keys}, **{k: d[k] for k in d if k not in keys}}

        return {
            "pair": list(self.pair), "before": contract(self.before), "after": contract(self.after),
            "verdict": self.verdict, "explanation": VERDICTS[self.verdict],
            "after_pearson_interval": _listed(self.after_pearson_interval),
            "bleed_through_only_pearson": _listed(self.bleed_through_only_pearson),
            "difference_bound": self.difference_bound, "saturated_pixels": self.saturated_pixels,
            "pixels": self.pixels, "flat_field": self.flat_field, "min_r": self.min_r, "alpha": self.alpha,
        }


def _listed(values):
    return None if values is None else [float(v) for v in values]


def decide(before: coloc.Coefficients, after: coloc.Coefficients, difference_bound: float | None,
           min_r: float, alpha: float) -> str:
    """The contract's verdict from the before and after coefficients."""
    def overlaps(c: coloc.Coefficients) -> bool:
        return c.pearson is not None and c.p_value is not None and c.pearson >= min_r and c.p_value < alpha

    before_overlap, after_overlap = overlaps(before), overlaps(after)
    if before_overlap and not after_overlap:
        return "bleed-through-only"
    if after_overlap and not before_overlap:
        return "revealed"
    if after_overlap:
        bound = 0.0 if difference_bound is None else difference_bound
        return "inflated" if before.pearson - after.pearson > bound else "persists"
    return "none"


def noise_model(channel: np.ndarray, mask: np.ndarray) -> tuple[float, float]:
    """(read variance, gain) of one background-subtracted channel: variance = read + gain x signal.

    Photon-transfer estimate from the image itself (common practice): the
    difference between each pixel and the mean of its four neighbours has
    variance 1.25 sigma^2 for white noise; its robust spread is fitted
    against the local mean. Structure adds to the spread, so the model errs
    on the noisy side.
    """
    from scipy import ndimage

    image = np.asarray(channel, dtype=np.float64)
    neighbours = ndimage.convolve(image, np.array([[0, 0.25, 0], [0.25, 0, 0.25], [0, 0.25, 0]]), mode="reflect")
    local = ndimage.uniform_filter(image, 3, mode="reflect")
    difference = (image - neighbours)[mask]
    level = local[mask]
    if level.size < 100:
        return float(np.var(difference) / 1.25), 0.0
    edges = np.quantile(level, np.linspace(0, 1, 11))
    centres, variances = [], []
    for low, high in zip(edges[:-1], edges[1:]):
        inside = (level >= low) & (level <= high)
        if inside.sum() >= 20:
            spread = 1.4826 * np.median(np.abs(difference[inside] - np.median(difference[inside])))
            centres.append(np.median(level[inside]))
            variances.append(spread**2 / 1.25)
    if len(centres) < 2:
        return float(np.var(difference) / 1.25), 0.0
    gain, read = np.polyfit(centres, variances, 1)
    return float(max(read, 0.0)), float(max(gain, 0.0))


def _draw_matrix(matrix: BleedThroughMatrix, rng) -> np.ndarray:
    if matrix.ci95_low is None:
        return matrix.matrix
    sd = (matrix.ci95_high - matrix.ci95_low) / (2 * _Z95)
    drawn = matrix.matrix + sd * rng.standard_normal(matrix.matrix.shape)
    for k, label in enumerate(matrix.labels):
        drawn[matrix.channels.index(matrix.primary[label]), k] = 1.0
    return drawn


def flat_field(stack: np.ndarray, flats: np.ndarray | None = None, estimate: bool = False) -> tuple[np.ndarray, str]:
    """Divide each channel (C, Y, X) by its flat (normalised to mean 1), or by a smooth illumination
    estimate (the channels' sum blurred over an eighth of the field); say which."""
    if flats is not None:
        flats = np.asarray(flats, dtype=np.float64)
        if flats.shape != stack.shape:
            raise InputError(f"flat-field images have shape {flats.shape}, the image {stack.shape}; give one "
                             "flat per channel of the same size")
        if np.any(flats <= 0):
            raise InputError("flat-field images must be positive everywhere; subtract less background from them")
        return stack / (flats / flats.mean(axis=(1, 2), keepdims=True)), "flat images"
    if estimate:
        from scipy import ndimage

        total = np.maximum(stack.sum(axis=0), 0)
        illumination = ndimage.gaussian_filter(total, max(stack.shape[1:]) / 8, mode="nearest")
        illumination = np.maximum(illumination / illumination.max(), 1e-3)
        return stack / illumination[None], "estimated illumination"
    return stack, "none"


def analyse_pair(raw: np.ndarray, matrix: BleedThroughMatrix, pair: tuple[str, str], *, unmixed=None, mask=None,
                 background=None, saturation=None, rounds: int = 200, seed: int = 0, alpha: float = 0.05,
                 min_r: float = 0.1, flat=None, estimate_flat: bool = False, simulations: int = SIMULATIONS,
                 matrix_draws: int = MATRIX_DRAWS, thresholds=None, threshold_method: str = "costes",
                 min_shift: int | None = None) -> PairResult:
    """Before and after coefficients of `pair` and the verdict, for one field.

    Parameters
    ----------
    raw : ndarray (C, Y, X)
        The image, channels in the matrix's channel order.
    unmixed : ndarray (K, Y, X), optional
        Abundances already computed (``unmix apply``); else unmixed here.
    mask : bool ndarray (Y, X), optional
        Pixels to measure; saturated pixels are removed from it.
    background, saturation : per-channel levels; default the matrix's (background
        estimated from the image when the matrix has none).
    thresholds, threshold_method : Manders thresholds (t_A, t_B), in units of
        background-subtracted intensity in each label's primary channel (the unit of
        the abundances too, so the same pair serves before and after); else "costes" or "otsu".
    min_shift : the smallest randomisation shift in pixels (e.g. the PSF size); the images'
        correlation length is used when it is longer.
    """
    from ..engine.solver import Unmixer

    a_label, b_label = pair
    for label in pair:
        if label not in matrix.labels:
            raise InputError(f"--labels {a_label},{b_label}: label {label!r} is not in the matrix (it has "
                             f"{list(matrix.labels)})")
    raw = np.asarray(raw)
    if raw.ndim != 3 or raw.shape[0] != len(matrix.channels):
        raise InputError(f"image has shape {raw.shape}; coloc needs one plane (C, Y, X) with the matrix's "
                         f"{len(matrix.channels)} channels")
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != raw.shape[1:]:
            raise InputError(f"mask has shape {mask.shape}, the image {raw.shape[1:]}; give a mask of the same size")
    background = _background(raw, matrix, background)
    levels = matrix.saturation if saturation is None else saturation
    saturated = np.zeros(raw.shape[1:], bool)
    if levels is not None:
        for c in range(raw.shape[0]):
            saturated |= raw[c] >= levels[c]
    valid = ~saturated & np.all(np.isfinite(raw), axis=0)
    region = valid if mask is None else valid & mask
    n_saturated = int(np.count_nonzero(saturated & (np.ones_like(saturated) if mask is None else mask)))

    unmixer = Unmixer(matrix.matrix)
    signal = raw.astype(np.float64) - background[:, None, None]
    if unmixed is None:
        unmixed = unmixer.unmix(raw, background)
    unmixed = np.asarray(unmixed, dtype=np.float64)
    if unmixed.shape != (len(matrix.labels),) + raw.shape[1:]:
        raise InputError(f"unmixed image has shape {unmixed.shape}; expected {(len(matrix.labels),) + raw.shape[1:]} "
                         "(one channel per label of the matrix, the same plane)")
    signal, method = flat_field(signal, flat, estimate_flat)

    def flattened(abundances):  # the same correction for every unmixing of this plane
        if method == "none":
            return abundances
        return flat_field(abundances, None if flat is None else _label_flats(flat, matrix), estimate_flat)[0]

    unmixed = flattened(unmixed)

    ka, kb = matrix.labels.index(a_label), matrix.labels.index(b_label)
    ca, cb = matrix.channels.index(matrix.primary[a_label]), matrix.channels.index(matrix.primary[b_label])
    options = {"rounds": rounds, "thresholds": thresholds, "threshold_method": threshold_method}
    shift = {} if min_shift is None else {"min_shift": max(min_shift, coloc.correlation_length(signal[ca], region),
                                                           coloc.correlation_length(signal[cb], region))}
    before = coloc.coefficients(signal[ca], signal[cb], region, seed=seed, **options, **shift)
    if min_shift is not None:
        shift = {"min_shift": max(min_shift, coloc.correlation_length(unmixed[ka], region),
                                  coloc.correlation_length(unmixed[kb], region))}
    after = coloc.coefficients(unmixed[ka], unmixed[kb], region, seed=seed + 1, **options, **shift)

    rng = np.random.default_rng(seed)
    after_interval = None
    if matrix.ci95_low is not None and matrix_draws and after.pearson is not None:
        values = [coloc.pearson(*flattened(Unmixer(_draw_matrix(matrix, rng)).unmix(raw, background))[[ka, kb]],
                                region) for _ in range(matrix_draws)]
        values = [v for v in values if v is not None]
        if values:
            after_interval = (float(np.percentile(values, 2.5)), float(np.percentile(values, 97.5)))

    simulated_before, differences = [], []
    if simulations and before.pearson is not None and after.pearson is not None:
        noise = [noise_model(signal[c], region) for c in range(raw.shape[0])]
        length = coloc.correlation_length(unmixed[kb], region)
        height, width = raw.shape[1:]
        for _ in range(simulations):
            shift = (int(rng.integers(length, max(length + 1, height - length))),
                     int(rng.integers(length, max(length + 1, width - length))))
            abundances = np.maximum(unmixed, 0).copy()
            abundances[kb] = np.roll(abundances[kb], shift, axis=(0, 1))
            mixed = np.tensordot(_draw_matrix(matrix, rng), abundances, axes=(1, 0))
            variance = np.array([read + gain * np.maximum(mixed[c], 0) for c, (read, gain) in enumerate(noise)])
            mixed = mixed + np.sqrt(variance) * rng.standard_normal(mixed.shape)
            r_before = coloc.pearson(mixed[ca], mixed[cb], region)
            again = unmixer.unmix(mixed.astype(np.float32))
            r_after = coloc.pearson(again[ka], again[kb], region)
            if r_before is not None and r_after is not None:
                simulated_before.append(r_before)
                differences.append(r_before - r_after)
    bleed_only = None
    bound = None
    if simulated_before:
        bleed_only = (float(np.median(simulated_before)), float(np.percentile(simulated_before, 2.5)),
                      float(np.percentile(simulated_before, 97.5)))
        bound = float(np.quantile(differences, 1 - alpha))
    verdict = decide(before, after, bound, min_r, alpha)
    return PairResult(pair=(a_label, b_label), before=before, after=after, verdict=verdict,
                      after_pearson_interval=after_interval, bleed_through_only_pearson=bleed_only,
                      difference_bound=bound, saturated_pixels=n_saturated, pixels=int(region.sum()),
                      flat_field=method, min_r=min_r, alpha=alpha)


def _background(raw: np.ndarray, matrix: BleedThroughMatrix, background) -> np.ndarray:
    """Per-channel background: given, else the matrix's, else estimated from the image."""
    if background is None:
        background = matrix.background
    if background is None:
        from ..measure.levels import summarise_channel

        background = np.array([summarise_channel(raw[c]).background for c in range(raw.shape[0])])
    return np.asarray(background, dtype=np.float64)


def unmix_plane(raw: np.ndarray, matrix: BleedThroughMatrix, background=None) -> np.ndarray:
    """The abundances (K, Y, X) of a plane (C, Y, X), background as in :func:`analyse_pair`."""
    from ..engine.solver import Unmixer

    return Unmixer(matrix.matrix).unmix(raw, _background(raw, matrix, background))


def pair_planes(raw: np.ndarray, matrix: BleedThroughMatrix, pair: tuple[str, str], unmixed=None, background=None):
    """The planes a pair is measured on: A's and B's primary channels after background subtraction,
    and their unmixed abundances (computed here when not given)."""
    background = _background(raw, matrix, background)
    if unmixed is None:
        unmixed = unmix_plane(raw, matrix, background)
    ka, kb = (matrix.labels.index(label) for label in pair)
    ca, cb = (matrix.channels.index(matrix.primary[label]) for label in pair)
    return (raw[ca] - background[ca], raw[cb] - background[cb], np.asarray(unmixed[ka], dtype=np.float64),
            np.asarray(unmixed[kb], dtype=np.float64))


def _label_flats(flat, matrix: BleedThroughMatrix):
    """Flats for the labels: each label's primary channel's flat."""
    flat = np.asarray(flat, dtype=np.float64)
    return np.stack([flat[matrix.channels.index(matrix.primary[label])] for label in matrix.labels])
