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
- overlap when lo >= min_r and p is below alpha beyond its Monte-Carlo
  error (the upper end of its 95 % Clopper-Pearson interval from the shifts
  drawn; p itself when every allowed shift was used);
- otherwise the evidence straddles the rule: the interval crosses
  `min_r`, or the interval lies above it but p is not clearly below alpha
  (its Monte-Carlo interval reaches alpha, or p is above), or a label shows
  no variance above its noise, or the region has too few pixels for an
  interval.

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
from functools import cached_property

import numpy as np

from ..errors import InputError, InputWarning
from ..matrix import BleedThroughMatrix
from . import ROUNDS
from . import statistics as coloc
from .corrected import (NOISE_MODEL_RELATIVE_SD, ChannelSums, CorrectedCorrelation, NoiseSums, corrected_from_sums,
                        unmixing_rows)
from .plane_pass import first_sums, unmix_two
from .sums import Moments, PairSums, Spectra

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
class PairResult:
    pair: tuple[str, str]
    before: coloc.Coefficients
    after: coloc.Coefficients
    before_corrected: CorrectedCorrelation
    after_corrected: CorrectedCorrelation
    after_nonnegative: dict
    verdict: str
    reason: str
    p_bounds: tuple | None
    saturated_pixels: int
    pixels: int
    flat_field: str
    noise_source: str
    matrix_uncertainty: str
    min_r: float
    alpha: float
    dimensions: str = "2-D plane"
    planes: list | None = None
    depth_trend: dict | None = None
    z_step_um: float | None = None  # spacing of a stack's planes, when its metadata give it

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
            "p_value_monte_carlo_interval": None if self.p_bounds is None else list(self.p_bounds), "saturated_pixels": self.saturated_pixels, "pixels": self.pixels,
            "flat_field": self.flat_field, "noise_model": self.noise_source,
            "matrix_uncertainty": self.matrix_uncertainty, "min_r": self.min_r, "alpha": self.alpha,
            "dimensions": self.dimensions, "planes": self.planes, "depth_trend": self.depth_trend,
            "z_step_um": self.z_step_um,
        }


def decide(before: coloc.Coefficients, after: coloc.Coefficients, corrected: CorrectedCorrelation, *,
           min_r: float, alpha: float, p_bounds: tuple | None = None, before_corrected: float | None = None
           ) -> tuple[str, str]:
    """The verdict and the reason for it, by the rule of the module docstring.

    `p_bounds` is the Monte-Carlo interval of the after p (p itself when None).
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
    elif (p_bounds or (p, p))[0] >= alpha:
        after_state, reason = "inconclusive", (f"after: corrected r {r:.3f} (95 % {interval[0]:.3f} to "
                                               f"{interval[1]:.3f}) but p {p:.3g} is not below alpha {alpha:g}")
    elif (p_bounds or (p, p))[1] >= alpha:
        low, high = p_bounds
        after_state, reason = "inconclusive", (f"after: p {p:.3g} (Monte-Carlo 95 % {low:.3g} to {high:.3g}) may lie "
                                               f"on either side of alpha {alpha:g}: measure more rounds")
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


# --- one image, plane by plane --------------------------------------------------------------

# At most this many planes of a stack feed the noise line estimated from the image (evenly spaced).
NOISE_PLANES = 8
# A change of the corrected r with depth is flagged when its 95 % interval excludes 0 and it amounts
# to at least this much over the stack (a rule of this tool).
DEPTH_TREND_FLAG = 0.1


@dataclass
class Plane:
    """One plane of an image made ready: background-subtracted, flat-fielded signal and its noise."""

    signal: np.ndarray     # (C, Y, X) float64
    valid: np.ndarray      # (Y, X) finite and unsaturated in every channel
    saturated: np.ndarray  # (Y, X)
    unflattened: np.ndarray  # (C, Y, X) the signal before flat-fielding
    noise: "NoiseModel"
    flats: np.ndarray | None

    @cached_property
    def variance(self) -> np.ndarray:
        """(C, Y, X) noise variance of each pixel, in the units of `signal` (computed when first asked)."""
        variance = self.noise.variance(self.unflattened)
        return variance if self.flats is None else variance / self.flats**2


@dataclass(frozen=True)
class ImageSource:
    """One image (a plane or a z-stack; one time point), read plane by plane so that any size streams.

    Everything that does not depend on the pair or the region is fixed here once: background,
    saturation levels, noise model, flat fields, the least-squares unmixing and its matrix draws.
    """

    matrix: BleedThroughMatrix
    raw: object                   # (C, Z, Y, X), numpy or dask
    background: np.ndarray        # (C,)
    levels: np.ndarray | None     # (C,) saturation levels
    noise: NoiseModel
    flats: np.ndarray | None      # (C, Y, X), each of mean 1
    unmixed: object | None        # (K, Z, Y, X) non-negative abundances given by the user
    rows: np.ndarray              # (K, C) least-squares unmixing
    row_draws: np.ndarray | None  # (D, K, C) for draws of the matrix
    flat_field: str
    matrix_uncertainty: str
    registration: object = None   # measure.registration.Registration, applied to every plane as it is read

    @property
    def shape(self) -> tuple:
        """(Z, Y, X)."""
        return tuple(self.raw.shape[1:])

    def window(self, planes: slice, rows: slice, columns: slice) -> "ImageSource":
        """The same image restricted to a box (an object and its surroundings): only its voxels are read."""
        from dataclasses import replace

        return replace(self, raw=self.raw[:, planes, rows, columns],
                       flats=None if self.flats is None else self.flats[:, rows, columns],
                       unmixed=None if self.unmixed is None else self.unmixed[:, planes, rows, columns])

    def plane(self, z: int) -> Plane:
        raw = np.asarray(self.raw[:, z])
        if self.registration is not None:
            from ..measure.registration import register_plane

            n_planes = self.raw.shape[1]

            def neighbour(c, dz):  # channel c's plane dz away, for axial shifts (None beyond the stack)
                return np.asarray(self.raw[c, z + dz]) if 0 <= z + dz < n_planes else None

            raw = register_plane(raw, self.matrix.channels, self.registration, self.levels, neighbour=neighbour)
        signal = raw.astype(np.float64)
        signal -= self.background[:, None, None]
        saturated = np.zeros(raw.shape[1:], bool)
        if self.levels is not None:
            for c in range(raw.shape[0]):
                saturated |= raw[c] >= self.levels[c]
        valid = ~saturated
        if raw.dtype.kind == "f":
            valid &= np.all(np.isfinite(raw), axis=0)
        unflattened = signal
        if not valid.all():
            unflattened[:, ~valid] = 0.0
        signal = unflattened if self.flats is None else unflattened / self.flats
        return Plane(signal, valid, saturated, unflattened, self.noise, self.flats)

    def nonnegative(self, z: int, plane: Plane) -> np.ndarray:
        """Non-negative abundances (K, Y, X) of plane `z`: the user's, or computed here."""
        if self.unmixed is not None:
            return np.asarray(self.unmixed[:, z], dtype=np.float64)
        from ..engine.solver import Unmixer

        return Unmixer(self.matrix.matrix).unmix(plane.signal.astype(np.float32), np.zeros(plane.signal.shape[0]))


def noise_from_image(raw, background: np.ndarray, valid_levels) -> NoiseModel:
    """Photon-transfer lines fitted on the image itself, per channel (:mod:`unmix.measure.noise`), on at
    most :data:`NOISE_PLANES` planes."""
    from ..measure.noise import dark_read_variance, photon_transfer

    n_planes = raw.shape[1]
    chosen = np.unique(np.linspace(0, n_planes - 1, min(n_planes, NOISE_PLANES)).round().astype(int))
    planes = [np.asarray(raw[:, z]) for z in chosen]
    reads, gains = [], []
    for c in range(raw.shape[0]):
        signal = [plane[c].astype(np.float64) - background[c] for plane in planes]
        masks = [np.isfinite(plane[c]) & (True if valid_levels is None else plane[c] < valid_levels[c])
                 for plane in planes]
        line = photon_transfer([np.where(m, s, 0.0) for s, m in zip(signal, masks)], masks)
        if line is None:  # too few pixels for a line: one variance for every level
            reads.append(float(np.nanmean([dark_read_variance(s) for s in signal])))
            gains.append(0.0)
        else:
            reads.append(line.read_variance)
            gains.append(line.gain)
    return NoiseModel(np.array(reads), np.array(gains), "image")


def _background(raw, matrix: BleedThroughMatrix, background) -> np.ndarray:
    """Per-channel background: given, else the matrix's, else estimated from the (middle plane of the) image."""
    if background is None:
        background = matrix.background
    if background is None:
        from ..measure.levels import summarise_channel

        middle = np.asarray(raw[:, raw.shape[1] // 2])
        background = np.array([summarise_channel(middle[c]).background for c in range(middle.shape[0])])
    return np.asarray(background, dtype=np.float64)


def _normalised_flats(flat, shape) -> np.ndarray:
    flat = np.asarray(flat, dtype=np.float64)
    if flat.shape != tuple(shape):
        raise InputError(f"flat-field images have shape {flat.shape}; the image's planes are {tuple(shape)}: give "
                         "one flat per channel of the same size")
    if not np.all(np.isfinite(flat)) or np.any(flat <= 0):
        raise InputError("flat-field images must be finite and positive everywhere; subtract less background "
                         "from them")
    return flat / flat.mean(axis=(1, 2), keepdims=True)


def prepare_image(raw, matrix: BleedThroughMatrix, *, background=None, saturation=None,
                  noise: NoiseModel | None = None, flat=None, unmixed=None, matrix_draws: int = MATRIX_DRAWS,
                  seed: int = 0, registration=None) -> ImageSource:
    """Everything about one image that does not depend on the pair or the region.

    Parameters
    ----------
    raw : array (C, Y, X) or (C, Z, Y, X), numpy or dask
        The image, channels first in the matrix's channel order. Stacks are read one plane at a time.
    background, saturation : per-channel levels; default the matrix's (background estimated
        from the image when the matrix has none).
    noise : NoiseModel, optional
        Default: the matrix's noise model, else one estimated from the image.
    flat : ndarray (C, Y, X), optional
        Per-channel flat-field images, divided out of every plane before unmixing (each normalised to
        mean 1).
    unmixed : array (K, Y, X) or (K, Z, Y, X), optional
        Non-negative abundances already computed (``unmix apply``); else computed here.
    registration : Registration, optional
        Per-channel shifts (``unmix align``), applied to every plane as it is read (axial shifts from the
        neighbouring planes).
    """
    if raw.ndim not in (3, 4) or raw.shape[0] != len(matrix.channels):
        raise InputError(f"image has shape {tuple(raw.shape)}; coloc needs channels first, (C, Y, X) or "
                         f"(C, Z, Y, X), with the matrix's {len(matrix.channels)} channels")
    if raw.ndim == 3:
        raw = raw[:, None]
    if unmixed is not None:
        if unmixed.ndim == 3:
            unmixed = unmixed[:, None]
        if tuple(unmixed.shape) != (len(matrix.labels),) + tuple(raw.shape[1:]):
            raise InputError(f"unmixed image has shape {tuple(unmixed.shape)}; expected one channel per label of "
                             f"the matrix and the image's {tuple(raw.shape[1:])} voxels")
    background = _background(raw, matrix, background)
    levels = matrix.saturation if saturation is None else np.asarray(saturation, dtype=float)
    if noise is None and matrix.noise_model is not None:
        noise = NoiseModel(np.asarray(matrix.noise_model["read_variance"], dtype=float),
                           np.asarray(matrix.noise_model["gain"], dtype=float), matrix.noise_model["source"])
    if noise is None:
        noise = noise_from_image(raw, background, levels)
    flats, method = None, "none"
    if flat is not None:
        flats, method = _normalised_flats(flat, (raw.shape[0],) + tuple(raw.shape[2:])), \
            "flat images, applied before unmixing"
    draws = matrix.draws(matrix_draws, np.random.default_rng([seed, 7])) if matrix_draws else None
    if matrix.column_covariance is not None:
        uncertainty = "joint draws from the measured column covariances"
    elif matrix.ci95_low is not None:
        uncertainty = "independent draws from the 95 % intervals (no column covariance in this matrix file)"
    else:
        uncertainty = "none (the matrix has no measurement uncertainty)"
    row_draws = None if draws is None else np.stack([unmixing_rows(d) for d in draws])
    return ImageSource(matrix=matrix, raw=raw, background=background, levels=levels, noise=noise, flats=flats,
                       unmixed=unmixed, rows=unmixing_rows(matrix.matrix), row_draws=row_draws, flat_field=method,
                       matrix_uncertainty=uncertainty, registration=registration)


# --- judging one pair ---------------------------------------------------------------

def region_planes(source: ImageSource, mask):
    """The mask per plane (Z, Y, X) of bool, from None, a plane mask (Y, X) or a stack mask (Z, Y, X)."""
    shape = source.shape
    if mask is None:
        return None
    mask = np.asarray(mask, dtype=bool)
    if mask.shape == shape[1:]:
        return np.broadcast_to(mask, shape)
    if mask.shape == shape:
        return mask
    raise InputError(f"mask has shape {mask.shape}, the image {shape if shape[0] > 1 else shape[1:]}; give a mask "
                     "of the same size (a plane mask applies to every plane of a stack)")


def judge_pair(source: ImageSource, pair: tuple[str, str], *, mask=None, rounds: int = ROUNDS, seed: int = 0,
               alpha: float = 0.05, min_r: float = 0.1, thresholds=None, threshold_method: str = "costes",
               min_shift: int | None = None, z_spacing: float | None = None) -> PairResult:
    """Before and after coefficients of `pair` over `mask` (default: every valid voxel) and the verdict.

    A stack is measured over its voxels, in 3-D, never as a projection; the randomisation shifts
    every plane by the same (dy, dx) and never wraps between planes. For a stack the result also
    holds each plane's r (before, and after corrected, with its interval) and the trend of the
    corrected r with depth (per plane, and per micrometre when `z_spacing` is given).

    `thresholds` (t_A, t_B) are Manders thresholds in units of background-subtracted intensity in
    each label's primary channel (the unit of the abundances too); else "costes" or "otsu".
    `min_shift` is the smallest randomisation shift in pixels (e.g. the PSF size); the images'
    correlation length is used when it is longer.
    """
    matrix = source.matrix
    a_label, b_label = pair
    for label in pair:
        if label not in matrix.labels:
            raise InputError(f"--labels {a_label},{b_label}: label {label!r} is not in the matrix (it has "
                             f"{list(matrix.labels)})")
    regions = region_planes(source, mask)
    n_planes = source.shape[0]
    ka, kb = matrix.labels.index(a_label), matrix.labels.index(b_label)
    ca, cb = (matrix.channels.index(matrix.primary[label]) for label in pair)
    n_channels = len(matrix.channels)
    selection = np.zeros((2, n_channels))
    selection[0, ca] = selection[1, cb] = 1.0
    after_rows = source.rows[[ka, kb]]
    total = int(np.prod(source.shape))
    sides = {name: PairSums(source.shape[1:], total=total, seed=seed + offset)
             for offset, name in enumerate(("before", "after"))}
    plain_after = PairSums(None)  # plain r and Manders only: no Spearman, no shifts
    channel_planes = [ChannelSums(n_channels) for _ in range(n_planes)]
    before_noise, after_noise, before_planes = [], [], [Moments() for _ in range(n_planes)]
    reference = None  # one point near the data for every per-plane sum (their precision)
    saturated = 0

    def planes():
        for z in range(n_planes):
            plane = source.plane(z)
            region = plane.valid if regions is None else plane.valid & regions[z]
            yield z, plane, region, (plane.signal[ca], plane.signal[cb]), tuple(unmix_two(after_rows, plane.signal))

    for z, plane, region, before, after in planes():
        f_m = Spectra.mask_spectrum(region)  # one region: its mask's spectrum serves both sides
        sides["before"].add_first(*before, region, f_m)
        sides["after"].add_first(*after, region, f_m)
        if reference is None and region.any():
            sample = region[::4, ::4]
            reference = plane.signal[:, ::4, ::4][:, sample].mean(axis=1) if sample.any() else \
                plane.signal[:, region].mean(axis=1)
        before_noise.append(NoiseSums(selection, None if reference is None else selection @ reference))
        after_noise.append(NoiseSums(after_rows, None if reference is None else after_rows @ reference))
        if reference is not None:
            channel_planes[z].add_plane(plane.signal, plane.variance, region, reference)
            before_noise[z].add_plane(plane.signal, plane.variance, region)
            after_noise[z].add_plane(plane.signal, plane.variance, region)
            before_planes[z].add_sums(first_sums(*before, region, reference[ca], reference[cb]),
                                      (reference[ca], reference[cb]))
        saturated += int(np.count_nonzero(plane.saturated if regions is None else plane.saturated & regions[z]))
    for sums in sides.values():
        sums.finish_first(thresholds, threshold_method)
    for _, _, region, before, after in planes():
        sides["before"].add_second(*before, region)
        sides["after"].add_second(*after, region)
    for sums in sides.values():
        sums.finish_second(thresholds, threshold_method)
    plain_after.thresholds, plain_after.method = sides["after"].thresholds, sides["after"].method
    for z, plane, region, before, after in planes():
        sides["before"].add_third(*before, region)
        sides["after"].add_third(*after, region)
        nonnegative = source.nonnegative(z, plane)
        plain_after.add_first(nonnegative[ka], nonnegative[kb], region)
        plain_after.add_third(nonnegative[ka], nonnegative[kb], region)

    channels = ChannelSums(n_channels)
    whole_before, whole_after = NoiseSums(selection), NoiseSums(after_rows)
    for z in range(n_planes):
        channels.merge(channel_planes[z])
        whole_before.merge(before_noise[z])
        whole_after.merge(after_noise[z])
    model_sd = NOISE_MODEL_RELATIVE_SD[source.noise.source]
    draws = None if source.row_draws is None else source.row_draws[:, [ka, kb]]
    before_corrected = corrected_from_sums(channels, whole_before, noise_model_sd=model_sd)
    after_corrected = corrected_from_sums(channels, whole_after, noise_model_sd=model_sd, row_draws=draws)

    tests = []
    for name, observed, spread in (("before", sides["before"].moments.pearson, 0.0),
                                   ("after", after_corrected.adjusted_r, after_corrected.adjusted_spread)):
        sums = sides[name]
        if sums.moments.pearson is None or observed is None or sums.moments.n < coloc.MIN_PIXELS:
            tests.append(coloc.Randomisation(None, 0, 0, False))
            continue
        shortest = None
        if min_shift is not None:
            shortest = max(min_shift, sums.spectra.correlation_length(0, sums.moments),
                           sums.spectra.correlation_length(1, sums.moments))
        tests.append(sums.randomisation(rounds=rounds, seed=seed + (name == "after"), min_shift=shortest,
                                        observed=observed, spread=spread))
    before = sides["before"].coefficients(tests[0].p_value)
    after = sides["after"].coefficients(tests[1].p_value)
    p_bounds = tests[1].bounds()
    nonnegative = plain_after.coefficients()
    verdict, reason = decide(before, after, after_corrected, min_r=min_r, alpha=alpha, p_bounds=p_bounds,
                             before_corrected=before_corrected.r)
    profile, trend = None, None
    dimensions = "2-D plane" if n_planes == 1 else f"3-D, {n_planes} planes (voxels; never a projection)"
    if n_planes > 1:
        profile, trend = _depth_profile(before_planes, channel_planes, after_noise, draws, model_sd, z_spacing)
    return PairResult(
        pair=(a_label, b_label), before=before, after=after, before_corrected=before_corrected,
        after_corrected=after_corrected,
        after_nonnegative={"pearson": nonnegative.pearson, "manders_m1": nonnegative.manders_m1,
                           "manders_m2": nonnegative.manders_m2,
                           "note": "plain coefficients of the non-negative abundances (what unmix apply writes), at "
                                   "the after thresholds; clipping at 0 biases them, so the verdict does not use "
                                   "them"},
        verdict=verdict, reason=reason, p_bounds=p_bounds, saturated_pixels=saturated, pixels=channels.n,
        flat_field=source.flat_field, noise_source=source.noise.source,
        matrix_uncertainty=source.matrix_uncertainty, min_r=min_r, alpha=alpha, dimensions=dimensions,
        planes=profile, depth_trend=trend, z_step_um=z_spacing if n_planes > 1 and z_spacing else None)


def _depth_profile(before_planes, channel_planes, after_noise, draws, model_sd, z_spacing):
    """Each plane's before-r and corrected after-r, and the trend of the latter with depth: a
    weighted least-squares line over the planes, weights 1 / (noise variance of each plane's r);
    the matrix's error is common to all planes and makes no trend."""
    profile = []
    depths, values, weights = [], [], []
    for z, (moments, channels, noise) in enumerate(zip(before_planes, channel_planes, after_noise)):
        corrected = corrected_from_sums(channels, noise, noise_model_sd=model_sd, row_draws=draws)
        profile.append({"plane": z, "pearson_before": moments.pearson, "pearson_noise_corrected": corrected.r,
                        "interval": None if corrected.interval is None else list(corrected.interval),
                        "voxels": channels.n})
        if corrected.r is not None and corrected.sd_noise > 0:
            depths.append(z)
            values.append(corrected.r)
            weights.append(1 / corrected.sd_noise**2)
    trend = {"slope_per_plane": None, "interval": None, "slope_per_um": None, "flagged": False,
             "note": "fewer than 3 planes with a corrected r"}
    if len(depths) >= 3:
        x, y, w = (np.asarray(v, dtype=float) for v in (depths, values, weights))
        x_mean = np.average(x, weights=w)
        slope = float(np.sum(w * (x - x_mean) * y) / np.sum(w * (x - x_mean) ** 2))
        intercept = np.average(y, weights=w) - slope * x_mean
        residual = y - intercept - slope * x
        # Spread of the points about the line beyond what their noise explains (never below it).
        scale = max(1.0, float(np.sum(w * residual**2) / max(len(x) - 2, 1)))
        error = float(np.sqrt(scale / np.sum(w * (x - x_mean) ** 2)))
        interval = (slope - 1.959963984540054 * error, slope + 1.959963984540054 * error)
        change = abs(slope) * (len(before_planes) - 1)
        flagged = (interval[0] > 0 or interval[1] < 0) and change >= DEPTH_TREND_FLAG
        trend = {"slope_per_plane": slope, "interval": list(interval),
                 "slope_per_um": None if not z_spacing else slope / z_spacing, "flagged": bool(flagged),
                 "note": (f"the corrected r changes by {slope * (len(before_planes) - 1):+.3f} over the stack: check "
                          "for axial chromatic shift, scattering or depth-dependent labelling") if flagged else ""}
    return profile, trend


def analyse_pair(raw, matrix: BleedThroughMatrix, pair: tuple[str, str], *, mask=None, unmixed=None,
                 background=None, saturation=None, noise: NoiseModel | None = None, flat=None,
                 rounds: int = ROUNDS, seed: int = 0, alpha: float = 0.05, min_r: float = 0.1, thresholds=None,
                 threshold_method: str = "costes", min_shift: int | None = None, matrix_draws: int = MATRIX_DRAWS,
                 z_spacing: float | None = None) -> PairResult:
    """:func:`prepare_image` then :func:`judge_pair`, for one image (a plane or a z-stack) and one pair."""
    source = prepare_image(raw, matrix, background=background, saturation=saturation, noise=noise, flat=flat,
                           unmixed=unmixed, matrix_draws=matrix_draws, seed=seed)
    return judge_pair(source, pair, mask=mask, rounds=rounds, seed=seed, alpha=alpha, min_r=min_r,
                      thresholds=thresholds, threshold_method=threshold_method, min_shift=min_shift,
                      z_spacing=z_spacing)


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


def pair_pixels(source: ImageSource, pair: tuple[str, str], mask=None, max_planes: int = 8):
    """The values a pair is measured on, over the region's valid voxels of at most `max_planes` planes
    (evenly spaced): A's and B's primary channels after background subtraction (and flat-fielding),
    and their least-squares abundances; 1-D arrays, for figures."""
    matrix = source.matrix
    ka, kb = (matrix.labels.index(label) for label in pair)
    ca, cb = (matrix.channels.index(matrix.primary[label]) for label in pair)
    regions = region_planes(source, mask)
    n_planes = source.shape[0]
    values = [[], [], [], []]
    for z in np.unique(np.linspace(0, n_planes - 1, min(n_planes, max_planes)).round().astype(int)):
        plane = source.plane(z)
        keep = plane.valid if regions is None else plane.valid & regions[z]
        after = np.tensordot(source.rows[[ka, kb]], plane.signal[:, keep], axes=(1, 0))
        for store, value in zip(values, (plane.signal[ca][keep], plane.signal[cb][keep], after[0], after[1])):
            store.append(value)
    return tuple(np.concatenate(v) for v in values)
