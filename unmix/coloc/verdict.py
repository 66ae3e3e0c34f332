"""Colocalization before and after unmixing, and whether the overlap is real.

"Before" is measured on the primary channels of the two labels after
background subtraction, "after" on their unconstrained least-squares
abundances (noise stays symmetric there; the non-negative abundances that
``unmix apply`` writes are what users look at, and their plain r and Manders
coefficients are reported beside, but clipping at 0 biases them). Pixels
saturated in any channel are left out of both and counted. Flat-field
images, when given, divide each channel before unmixing.

The after Pearson r is corrected for the noise of unmixing
(:mod:`unmix.coloc.corrected`): the noise covariance expected from the
detector's photon-transfer line (measured from the controls and stored in
the matrix file, else estimated from the image and said so) is subtracted.
Its 95 % interval combines detector noise, the matrix's joint measurement
uncertainty and the noise model's own error. The randomisation test of the
after-pair compares the shifted r's with the observed r whose numerator has
the expected noise covariance removed (shifted copies carry none).

The rule (Pearson r; "overlap" = r >= min_r and p < alpha)
------------------------------------------------------------
Before: overlap when the plain r of the primaries is at least `min_r` and
its randomisation p is below `alpha`.

After, on the corrected r with interval [lo, hi] and its p:

- no overlap when hi < min_r (the labels' r is below the smallest that
  counts, with 95 % confidence; a significantly negative r, exclusion,
  included);
- overlap when lo >= min_r and p < alpha - m (m: twice the Monte-Carlo
  error of p; 0 when every allowed shift was used);
- otherwise the evidence straddles the rule: the interval crosses
  `min_r`, or the interval lies above it but p is not clearly below alpha
  (within m of it, or above), or a label shows no variance above its noise,
  or the region has too few pixels for an interval.

Verdicts:

- ``bleed-through-only``: overlap before, none after;
- ``inflated``: overlap after, and the before-r lies above the after-r's
  upper bound (bleed-through made the raw channels overstate it); both
  corrected for detector noise, which would otherwise attenuate the raw
  r and hide the inflation;
- ``persists``: overlap after, the before-r within or below that bound;
- ``revealed``: no overlap before, overlap after;
- ``none``: no overlap before or after (a significantly negative r, i.e.
  exclusion, is no overlap);
- ``inconclusive``: the after evidence straddles the rule.

The whole rule is calibrated by simulation with known truth
(``tests/benchmarks/bench_verdict_calibration.py``).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import InputError, InputWarning
from ..matrix import BleedThroughMatrix
from . import statistics as coloc
from .corrected import NOISE_MODEL_RELATIVE_SD, CorrectedCorrelation, corrected_correlation, unmixing_rows

VERDICTS = {
    "bleed-through-only": "the raw channels overlap, the unmixed labels do not: the overlap was bleed-through; "
                          "do not report it",
    "inflated": "the labels overlap after unmixing, but less than the raw channels suggest: bleed-through "
                "inflated it; report the after value",
    "persists": "overlap remains after unmixing, within its uncertainty of the raw value: it is not "
                "bleed-through (this says nothing about molecular interaction)",
    "revealed": "the labels overlap only after unmixing (bleed-through or noise hid it before)",
    "none": "no overlap, before or after unmixing",
    "inconclusive": "the evidence straddles the rule: the after-r's interval crosses the smallest r that "
                    "counts, or p lies within its Monte-Carlo error of alpha; image more pixels or brighter "
                    "labels, or measure more rounds",
}
MATRIX_DRAWS = 200
ROUNDS = 1000


@dataclass(frozen=True)
class NoiseModel:
    """Per-channel photon-transfer lines: variance = read_variance + gain x signal (input units)."""

    read_variance: np.ndarray
    gain: np.ndarray
    source: str

    def variance(self, signal: np.ndarray) -> np.ndarray:
        """Noise variance (C, ...) of background-subtracted `signal` (C, ...)."""
        shape = (-1,) + (1,) * (signal.ndim - 1)
        return self.read_variance.reshape(shape) + self.gain.reshape(shape) * np.maximum(signal, 0.0)


@dataclass(frozen=True)
class PreparedImage:
    """One image made ready for any pair and region: computed once, shared by all of them."""

    matrix: BleedThroughMatrix
    signal: np.ndarray          # (C, ...) background-subtracted, flat-fielded
    variance: np.ndarray        # (C, ...) noise variance of each pixel, same units
    valid: np.ndarray           # (...) bool: finite and unsaturated in every channel
    saturated: np.ndarray       # (...) bool
    least_squares: np.ndarray   # (K, ...) unconstrained abundances
    nonnegative: np.ndarray     # (K, ...) non-negative abundances (what apply writes)
    rows: np.ndarray            # (K, C) the least-squares unmixing
    row_draws: np.ndarray | None  # (D, K, C) for draws of the matrix
    noise: NoiseModel
    flat_field: str
    matrix_uncertainty: str


@dataclass(frozen=True)
class PairResult:
    pair: tuple[str, str]
    before: coloc.Coefficients
    after: coloc.Coefficients
    before_corrected: CorrectedCorrelation
    after_corrected: CorrectedCorrelation
    after_nonnegative: dict
    verdict: str
    reason: str
    p_margin: float
    saturated_pixels: int
    pixels: int
    flat_field: str
    noise_source: str
    matrix_uncertainty: str
    min_r: float
    alpha: float

    @property
    def inflation(self) -> float | None:
        """Before-r minus the corrected after-r: how much the raw channels overstate the overlap."""
        if self.before.pearson is None or self.after_corrected.r is None:
            return None
        return float(self.before.pearson - self.after_corrected.r)

    def to_dict(self) -> dict:
        """The contract's keys (pair, before, after, verdict) and the figures behind the verdict."""
        def contract(c: coloc.Coefficients, corrected: CorrectedCorrelation) -> dict:
            d = c.to_dict()
            keys = ("pearson", "spearman", "manders_m1", "manders_m2", "thresholds", "icq", "p_value")
            return {**{k: d[k] for k in keys}, **corrected.to_dict(), **{k: d[k] for k in d if k not in keys},
                    "note": "; ".join(n for n in (d["note"], corrected.note) if n)}

        return {
            "pair": list(self.pair), "before": contract(self.before, self.before_corrected),
            "after": {**contract(self.after, self.after_corrected), "abundances": "least squares (unconstrained)"},
            "verdict": self.verdict, "explanation": VERDICTS[self.verdict], "reason": self.reason,
            "inflation": self.inflation, "after_nonnegative": self.after_nonnegative,
            "p_value_margin": self.p_margin, "saturated_pixels": self.saturated_pixels, "pixels": self.pixels,
            "flat_field": self.flat_field, "noise_model": self.noise_source,
            "matrix_uncertainty": self.matrix_uncertainty, "min_r": self.min_r, "alpha": self.alpha,
        }


def decide(before: coloc.Coefficients, after: coloc.Coefficients, corrected: CorrectedCorrelation, *,
           min_r: float, alpha: float, margin: float = 0.0, before_corrected: float | None = None
           ) -> tuple[str, str]:
    """The verdict and the reason for it, by the rule of the module docstring.

    `before_corrected` is the before-r corrected for detector noise, compared with the after-r's
    upper bound (noise attenuates the plain before-r and would hide inflation); the plain before-r
    when it is None.
    """
    before_overlap = (before.pearson is not None and before.p_value is not None and before.pearson >= min_r
                      and before.p_value < alpha)
    p, r, interval = after.p_value, corrected.r, corrected.interval
    if r is None or p is None:
        after_state, reason = "inconclusive", ("after: a label shows no variance above its expected noise here, so "
                                               "its overlap cannot be judged")
    elif interval is None:
        after_state, reason = "inconclusive", "after: too few pixels for an interval of the corrected r"
    elif interval[1] < min_r:
        after_state, reason = "no", (f"after: corrected r {r:.3f}, its upper bound {interval[1]:.3f} is below "
                                     f"{min_r:g}")
    elif interval[0] < min_r:
        after_state, reason = "inconclusive", (f"after: the corrected r's interval {interval[0]:.3f} to "
                                               f"{interval[1]:.3f} crosses {min_r:g}")
    elif p >= alpha + margin:
        after_state, reason = "inconclusive", (f"after: corrected r {r:.3f} (95 % {interval[0]:.3f} to "
                                               f"{interval[1]:.3f}) but p {p:.3g} is not below alpha {alpha:g}")
    elif p > alpha - margin:
        after_state, reason = "inconclusive", (f"after: p {p:.3g} lies within its Monte-Carlo error {margin:.3g} "
                                               f"of alpha {alpha:g}")
    else:
        after_state, reason = "yes", (f"after: corrected r {r:.3f} (95 % {interval[0]:.3f} to {interval[1]:.3f}), "
                                      f"p {p:.3g}")
    before_words = (f"before: r {before.pearson:.3f}, p {before.p_value:.3g}" if before.pearson is not None
                    and before.p_value is not None else "before: r undefined")
    if after_state == "inconclusive":
        return "inconclusive", f"{reason}; {before_words}"
    if after_state == "no":
        return ("bleed-through-only" if before_overlap else "none"), f"{before_words}; {reason}"
    if not before_overlap:
        return "revealed", f"{before_words}; {reason}"
    compared = before.pearson if before_corrected is None else before_corrected
    words = "before-r" if before_corrected is None else f"noise-corrected before-r {before_corrected:.3f}"
    if compared > interval[1]:
        return "inflated", f"{before_words}; {words} lies above the after-r's upper bound {interval[1]:.3f}; {reason}"
    return "persists", f"{before_words}; {words} lies within the after-r's bound {interval[1]:.3f}; {reason}"


# --- preparing an image ---------------------------------------------------------

def noise_from_image(signal: np.ndarray, valid: np.ndarray) -> NoiseModel:
    """Photon-transfer lines fitted on the image itself, per channel (:mod:`unmix.measure.noise`)."""
    from ..measure.noise import dark_read_variance, photon_transfer

    reads, gains = [], []
    for c in range(signal.shape[0]):
        planes = signal[c].reshape((-1,) + signal.shape[-2:])
        masks = valid.reshape((-1,) + valid.shape[-2:])
        line = photon_transfer(list(planes), list(masks))
        if line is None:  # too few pixels for a line: one variance for every level
            reads.append(float(np.nanmean([dark_read_variance(plane) for plane in planes])))
            gains.append(0.0)
        else:
            reads.append(line.read_variance)
            gains.append(line.gain)
    return NoiseModel(np.array(reads), np.array(gains), "image")


def _background(raw: np.ndarray, matrix: BleedThroughMatrix, background) -> np.ndarray:
    """Per-channel background: given, else the matrix's, else estimated from the image."""
    if background is None:
        background = matrix.background
    if background is None:
        from ..measure.levels import summarise_channel

        background = np.array([summarise_channel(raw[c]).background for c in range(raw.shape[0])])
    return np.asarray(background, dtype=np.float64)


def _normalised_flats(flat, shape) -> np.ndarray:
    flat = np.asarray(flat, dtype=np.float64)
    if flat.shape != tuple(shape):
        raise InputError(f"flat-field images have shape {flat.shape}, the image {tuple(shape)}; give one flat per "
                         "channel of the same size")
    if not np.all(np.isfinite(flat)) or np.any(flat <= 0):
        raise InputError("flat-field images must be finite and positive everywhere; subtract less background "
                         "from them")
    spatial = tuple(range(1, flat.ndim))
    return flat / flat.mean(axis=spatial, keepdims=True)


def prepare_image(raw: np.ndarray, matrix: BleedThroughMatrix, *, background=None, saturation=None,
                  noise: NoiseModel | None = None, flat=None, unmixed=None, matrix_draws: int = MATRIX_DRAWS,
                  seed: int = 0) -> PreparedImage:
    """Everything about one image that does not depend on the pair or the region.

    Parameters
    ----------
    raw : ndarray (C, ...)
        The image, channels first in the matrix's channel order; any number of spatial axes
        (the last two are Y and X).
    background, saturation : per-channel levels; default the matrix's (background estimated
        from the image when the matrix has none).
    noise : NoiseModel, optional
        Default: the matrix's noise model, else one estimated from the image.
    flat : ndarray (C, ...), optional
        Per-channel flat-field images, divided out before unmixing (each normalised to mean 1).
    unmixed : ndarray (K, ...), optional
        Non-negative abundances already computed (``unmix apply``); else computed here.
    """
    from ..engine.solver import Unmixer

    raw = np.asarray(raw)
    if raw.ndim < 3 or raw.shape[0] != len(matrix.channels):
        raise InputError(f"image has shape {raw.shape}; coloc needs channels first (C, ..., Y, X) with the "
                         f"matrix's {len(matrix.channels)} channels")
    background = _background(raw, matrix, background)
    expand = (-1,) + (1,) * (raw.ndim - 1)
    signal = raw.astype(np.float64) - background.reshape(expand)
    levels = matrix.saturation if saturation is None else saturation
    saturated = np.zeros(raw.shape[1:], bool)
    if levels is not None:
        for c in range(raw.shape[0]):
            saturated |= raw[c] >= levels[c]
    valid = ~saturated & np.all(np.isfinite(raw), axis=0)
    if noise is None and matrix.noise_model is not None:
        noise = NoiseModel(np.asarray(matrix.noise_model["read_variance"], dtype=float),
                           np.asarray(matrix.noise_model["gain"], dtype=float), matrix.noise_model["source"])
    if noise is None:
        noise = noise_from_image(np.where(valid, signal, 0.0), valid)
    variance = noise.variance(np.nan_to_num(signal))
    method = "none"
    if flat is not None:
        flats = _normalised_flats(flat, raw.shape)
        signal = signal / flats
        variance = variance / flats**2
        method = "flat images, applied before unmixing"
    rows = unmixing_rows(matrix.matrix)
    least_squares = np.tensordot(rows, np.where(valid, signal, 0.0), axes=(1, 0))
    if unmixed is None:
        unmixer = Unmixer(matrix.matrix)
        nonnegative = unmixer.unmix(np.where(valid, signal, 0.0).astype(np.float32), np.zeros(raw.shape[0]))
    else:
        nonnegative = np.asarray(unmixed, dtype=np.float64)
        if nonnegative.shape != (len(matrix.labels),) + raw.shape[1:]:
            raise InputError(f"unmixed image has shape {nonnegative.shape}; expected "
                             f"{(len(matrix.labels),) + raw.shape[1:]} (one channel per label of the matrix)")
    draws = matrix.draws(matrix_draws, np.random.default_rng([seed, 7])) if matrix_draws else None
    if matrix.column_covariance is not None:
        uncertainty = "joint draws from the measured column covariances"
    elif matrix.ci95_low is not None:
        uncertainty = "independent draws from the 95 % intervals (no column covariance in this matrix file)"
    else:
        uncertainty = "none (the matrix has no measurement uncertainty)"
    row_draws = None if draws is None else np.stack([unmixing_rows(d) for d in draws])
    return PreparedImage(matrix=matrix, signal=signal, variance=variance, valid=valid, saturated=saturated,
                         least_squares=least_squares, nonnegative=np.asarray(nonnegative, dtype=np.float64),
                         rows=rows, row_draws=row_draws, noise=noise, flat_field=method,
                         matrix_uncertainty=uncertainty)


# --- judging one pair ---------------------------------------------------------------

def judge_pair(image: PreparedImage, pair: tuple[str, str], *, mask=None, rounds: int = ROUNDS, seed: int = 0,
               alpha: float = 0.05, min_r: float = 0.1, thresholds=None, threshold_method: str = "costes",
               min_shift: int | None = None) -> PairResult:
    """Before and after coefficients of `pair` over `mask` (default: the whole image) and the verdict.

    `thresholds` (t_A, t_B) are Manders thresholds in units of background-subtracted intensity in
    each label's primary channel (the unit of the abundances too); else "costes" or "otsu".
    `min_shift` is the smallest randomisation shift in pixels (e.g. the PSF size); the images'
    correlation length is used when it is longer.
    """
    matrix = image.matrix
    a_label, b_label = pair
    for label in pair:
        if label not in matrix.labels:
            raise InputError(f"--labels {a_label},{b_label}: label {label!r} is not in the matrix (it has "
                             f"{list(matrix.labels)})")
    spatial = image.valid.shape
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != spatial:
            raise InputError(f"mask has shape {mask.shape}, the image {spatial}; give a mask of the same size")
    region = image.valid if mask is None else image.valid & mask
    n_saturated = int(np.count_nonzero(image.saturated if mask is None else image.saturated & mask))
    ka, kb = matrix.labels.index(a_label), matrix.labels.index(b_label)
    ca, cb = (matrix.channels.index(matrix.primary[label]) for label in pair)
    before_a, before_b = image.signal[ca], image.signal[cb]
    after_a, after_b = image.least_squares[ka], image.least_squares[kb]

    signal = image.signal[:, region]
    variance = image.variance[:, region]
    selection = np.zeros((2, signal.shape[0]))
    selection[0, ca] = selection[1, cb] = 1.0
    model_sd = NOISE_MODEL_RELATIVE_SD[image.noise.source]
    before_corrected = corrected_correlation(signal, variance, selection, noise_model_sd=model_sd)
    after_corrected = corrected_correlation(
        signal, variance, image.rows[[ka, kb]], noise_model_sd=model_sd,
        row_draws=None if image.row_draws is None else image.row_draws[:, [ka, kb]])

    options = {"thresholds": thresholds, "threshold_method": threshold_method, "rounds": 0}
    before = coloc.coefficients(before_a, before_b, region, **options)
    after = coloc.coefficients(after_a, after_b, region, **options)
    tests = []
    for (a, b), plain, observed, spread, offset in (
            ((before_a, before_b), before.pearson, before.pearson, 0.0, 0),
            ((after_a, after_b), after.pearson, after_corrected.adjusted_r, after_corrected.adjusted_spread, 1)):
        if plain is None or observed is None:
            tests.append(coloc.Randomisation(None, 0, 0, False))
            continue
        shortest = None
        if min_shift is not None:
            shortest = max(min_shift, *(coloc.correlation_length(x, region) for x in (a, b)))
        tests.append(_randomise(a, b, region, rounds=rounds, seed=seed + offset, min_shift=shortest,
                                observed=observed, spread=spread))
    before = _with_p(before, tests[0].p_value)
    after = _with_p(after, tests[1].p_value)
    margin = tests[1].margin(alpha)
    nonnegative = image.nonnegative[[ka, kb]]
    nonneg_coefficients = coloc.coefficients(nonnegative[0], nonnegative[1], region, **options)
    verdict, reason = decide(before, after, after_corrected, min_r=min_r, alpha=alpha, margin=margin,
                             before_corrected=before_corrected.r)
    return PairResult(
        pair=(a_label, b_label), before=before, after=after, before_corrected=before_corrected,
        after_corrected=after_corrected,
        after_nonnegative={"pearson": nonneg_coefficients.pearson, "manders_m1": nonneg_coefficients.manders_m1,
                           "manders_m2": nonneg_coefficients.manders_m2,
                           "note": "plain coefficients of the non-negative abundances (what unmix apply writes); "
                                   "clipping at 0 biases them, so the verdict does not use them"},
        verdict=verdict, reason=reason, p_margin=margin, saturated_pixels=n_saturated, pixels=int(region.sum()),
        flat_field=image.flat_field, noise_source=image.noise.source, matrix_uncertainty=image.matrix_uncertainty,
        min_r=min_r, alpha=alpha)


def _randomise(a, b, region, **options) -> "coloc.Randomisation":
    """The randomisation test over the last two (Y, X) axes; stacks are not handled yet."""
    if np.ndim(a) != 2:
        raise InputError("coloc measures one plane (C, Y, X) at a time")
    return coloc.randomisation_test(a, b, region, **options)


def _with_p(c: coloc.Coefficients, p):
    from dataclasses import replace

    return replace(c, p_value=p)


def analyse_pair(raw: np.ndarray, matrix: BleedThroughMatrix, pair: tuple[str, str], *, mask=None,
                 unmixed=None, background=None, saturation=None, noise: NoiseModel | None = None, flat=None,
                 rounds: int = ROUNDS, seed: int = 0, alpha: float = 0.05, min_r: float = 0.1,
                 thresholds=None, threshold_method: str = "costes", min_shift: int | None = None,
                 matrix_draws: int = MATRIX_DRAWS) -> PairResult:
    """:func:`prepare_image` then :func:`judge_pair`, for one image and one pair."""
    image = prepare_image(raw, matrix, background=background, saturation=saturation, noise=noise, flat=flat,
                          unmixed=unmixed, matrix_draws=matrix_draws, seed=seed)
    return judge_pair(image, pair, mask=mask, rounds=rounds, seed=seed, alpha=alpha, min_r=min_r,
                      thresholds=thresholds, threshold_method=threshold_method, min_shift=min_shift)


def matrix_warnings(matrix: BleedThroughMatrix) -> list[str]:
    """What the verdict cannot rest on with this matrix, in words (the command line prints them)."""
    messages = []
    if matrix.kind == "predicted" or matrix.ci95_low is None:
        messages.append("the matrix carries no measurement uncertainty (a predicted matrix): the verdict's "
                        "interval covers detector noise only; measure the matrix from controls for a full one")
    if matrix.noise_model is None:
        messages.append("the matrix has no noise model: the detector's noise is estimated from each image "
                        "(photon-transfer fit on the image, less certain); measure the matrix with this version "
                        "to store one")
    fields = (matrix.qc.get("labels") or {}) if isinstance(matrix.qc, dict) else {}
    few = sorted(label for label, entry in fields.items()
                 if isinstance(entry, dict) and isinstance(entry.get("fields"), int) and entry["fields"] < 3)
    if matrix.kind == "measured" and few:
        messages.append(f"labels {', '.join(few)} were measured from fewer than 3 control fields: their matrix "
                        "intervals cover sampling error within those fields only, not how fields differ")
    return messages


def nuisance_labels(matrix: BleedThroughMatrix) -> tuple[str, ...]:
    """Labels unmixed only to be taken out (autofluorescence measured as a label): they are judged in a
    pair only when a pair names them; lists of pairs to judge by default leave them out."""
    entries = (matrix.qc.get("labels") or {}) if isinstance(matrix.qc, dict) else {}
    return tuple(label for label in matrix.labels
                 if isinstance(entries.get(label), dict) and entries[label].get("role") == "autofluorescence")


def warn_about_matrix(matrix: BleedThroughMatrix) -> None:
    for message in matrix_warnings(matrix):
        warnings.warn(message, InputWarning, stacklevel=2)


def unmix_plane(raw: np.ndarray, matrix: BleedThroughMatrix, background=None) -> np.ndarray:
    """The non-negative abundances (K, ...) of an image (C, ...), background as in :func:`prepare_image`."""
    from ..engine.solver import Unmixer

    return Unmixer(matrix.matrix).unmix(raw, _background(raw, matrix, background))


def pair_planes(image: PreparedImage, pair: tuple[str, str]):
    """The planes a pair is measured on: A's and B's primary channels after background subtraction
    (and flat-fielding), and their least-squares abundances."""
    matrix = image.matrix
    ka, kb = (matrix.labels.index(label) for label in pair)
    ca, cb = (matrix.channels.index(matrix.primary[label]) for label in pair)
    return image.signal[ca], image.signal[cb], image.least_squares[ka], image.least_squares[kb]
