"""Colocalization coefficients, Costes thresholds and a spatially honest randomisation test.

All functions take two images of one field (numpy arrays of the same shape)
and an optional boolean mask of the pixels to use; they return numbers or
small typed results and keep no state.

- Pearson r and Spearman rho over the pixels of the mask.
- Manders M1 and M2 (Manders, Verbeek & Aten 1993): M1 = sum of A over
  pixels where B > t_B, divided by the sum of A over all pixels of the mask,
  with A clipped at 0 (scikit-image's ``manders_coloc_coeff`` convention and
  the command line's contract); M2 likewise with A and B swapped. Costes'
  variant, "M1 above own threshold" (the denominator is the sum of A above
  A's own threshold), is reported separately, under that name.
- Manders overlap coefficient: sum(AB) / sqrt(sum(A^2) sum(B^2)).
- Li's intensity correlation quotient: the share of pixels whose deviations
  from the means have the same sign, minus 0.5 (range -0.5..+0.5).
- Costes automatic thresholds: the orthogonal regression line B = a A + b,
  then T lowered from the top until the Pearson r of the pixels below both
  thresholds (A < T and B < a T + b) is <= 0. Every candidate T is answered
  from cumulative sums over a histogram of each pixel's entry threshold
  (one pass, no sort and no r recomputed per candidate). When a <= 0 there is
  no Costes threshold: the caller falls back to Otsu or given thresholds.
- Randomisation: the Pearson r of A against B shifted toroidally by random
  offsets at least one correlation length long (measured from the images'
  own autocorrelation inside the mask), all offsets answered at once by FFT
  cross-correlation; p = (1 + b) / (N + 1) with b the shifts whose r reaches
  the observed one (Phipson & Smyth 2010). Scrambling PSF-sized blocks
  instead is anti-conservative when structures are larger than the PSF; the
  PSF size is only a lower bound for the shift. No parametric p-value is
  used: neighbouring pixels are not independent.

References
----------
.. [1] E. M. M. Manders, F. J. Verbeek and J. A. Aten, "Measurement of
   co-localization of objects in dual-colour confocal images", J. Microsc.
   169:375-382 (1993).
.. [2] S. V. Costes et al., "Automatic and quantitative measurement of
   protein-protein colocalization in live cells", Biophys. J. 86:3993-4003
   (2004).
.. [3] Q. Li et al., "A syntaxin 1, G-alpha-o, and N-type calcium channel
   complex at a presynaptic nerve terminal: analysis by quantitative
   immunocolocalization", J. Neurosci. 24:4070-4081 (2004).
.. [4] B. Phipson and G. K. Smyth, "Permutation p-values should never be
   zero", Stat. Appl. Genet. Mol. Biol. 9:39 (2010).
.. [5] S. Bolte and F. P. Cordelieres, "A guided tour into subcellular
   colocalization analysis in light microscopy", J. Microsc. 224:213-232 (2006).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

# Candidate thresholds for floating-point images: this many levels between
# the extremes of A (integer images use every grey level).
FLOAT_LEVELS = 4096
MIN_PIXELS = 10


@dataclass(frozen=True)
class Coefficients:
    """Coefficients of one pair over one set of pixels. None where undefined (say why in `note`)."""

    pearson: float | None
    spearman: float | None
    manders_m1: float | None
    manders_m2: float | None
    thresholds: tuple | None
    threshold_method: str
    m1_above_own_threshold: float | None
    m2_above_own_threshold: float | None
    overlap: float | None
    icq: float | None
    p_value: float | None
    n_pixels: int
    note: str = ""

    def to_dict(self) -> dict:
        result = asdict(self)
        result["thresholds"] = None if self.thresholds is None else [float(t) for t in self.thresholds]
        return result


def _pixels(a, b, mask):
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"images differ in shape: {a.shape} and {b.shape}")
    keep = np.isfinite(a) & np.isfinite(b)
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != a.shape:
            raise ValueError(f"mask shape {mask.shape} differs from the image shape {a.shape}")
        keep &= mask
    return a[keep], b[keep]


def pearson(a, b, mask=None) -> float | None:
    """Pearson r over the pixels of `mask`; None when either image is constant there."""
    a, b = _pixels(a, b, mask)
    a, b = a - a.mean(), b - b.mean()
    denominator = np.sqrt(np.dot(a, a) * np.dot(b, b))
    return float(np.dot(a, b) / denominator) if denominator > 0 else None


def spearman(a, b, mask=None) -> float | None:
    """Spearman rho: Pearson r of the ranks (ties share their mean rank)."""
    from scipy.stats import rankdata

    a, b = _pixels(a, b, mask)
    return pearson(rankdata(a), rankdata(b)) if a.size else None


def manders(a, b, thresholds, mask=None) -> tuple[float | None, float | None]:
    """Manders M1 and M2 at `thresholds` (t_A, t_B), negative values clipped at 0."""
    a, b = _pixels(a, b, mask)
    a, b = np.maximum(a, 0), np.maximum(b, 0)
    t_a, t_b = thresholds
    m1 = float(a[b > t_b].sum() / a.sum()) if a.sum() > 0 else None
    m2 = float(b[a > t_a].sum() / b.sum()) if b.sum() > 0 else None
    return m1, m2


def manders_above_own_thresholds(a, b, thresholds, mask=None) -> tuple[float | None, float | None]:
    """M1 and M2 above their own thresholds (Costes et al. 2004): the sum of A above both thresholds
    over the sum of A above A's own threshold; likewise for B."""
    a, b = _pixels(a, b, mask)
    a, b = np.maximum(a, 0), np.maximum(b, 0)
    t_a, t_b = thresholds
    above_a, above_b = a > t_a, b > t_b
    m1 = float(a[above_a & above_b].sum() / a[above_a].sum()) if a[above_a].sum() > 0 else None
    m2 = float(b[above_a & above_b].sum() / b[above_b].sum()) if b[above_b].sum() > 0 else None
    return m1, m2


def overlap(a, b, mask=None) -> float | None:
    """Manders overlap coefficient, negative values clipped at 0."""
    a, b = _pixels(a, b, mask)
    a, b = np.maximum(a, 0), np.maximum(b, 0)
    denominator = np.sqrt(np.dot(a, a) * np.dot(b, b))
    return float(np.dot(a, b) / denominator) if denominator > 0 else None


def li_icq(a, b, mask=None) -> float | None:
    """Li's intensity correlation quotient: share of pixels with same-sign deviations, minus 0.5."""
    a, b = _pixels(a, b, mask)
    if a.size == 0:
        return None
    return float(np.mean((a - a.mean()) * (b - b.mean()) > 0) - 0.5)


def orthogonal_line(var_a: float, var_b: float, cov: float, mean_a: float, mean_b: float) -> tuple[float, float]:
    """Slope and intercept of the orthogonal (total least squares) line B = slope A + intercept, from
    the variances, the covariance and the means."""
    if cov == 0:
        return 0.0, float(mean_b)
    slope = (var_b - var_a + np.sqrt((var_b - var_a) ** 2 + 4 * cov**2)) / (2 * cov)
    return float(slope), float(mean_b - slope * mean_a)


def orthogonal_regression(a, b) -> tuple[float, float]:
    """Slope and intercept of the orthogonal (total least squares) line B = slope A + intercept."""
    return orthogonal_line(np.var(a), np.var(b), np.mean((a - a.mean()) * (b - b.mean())), a.mean(), b.mean())


def costes_candidates(a: np.ndarray) -> np.ndarray:
    """Candidate thresholds on A, ascending: every grey level of integer-valued data, else a fine grid."""
    low, high = float(a.min()), float(a.max())
    if np.all(a == np.round(a)) and high - low <= 65535:
        return np.arange(low, high + 1.0)
    return np.linspace(low, high, FLOAT_LEVELS)


def costes_from_bins(bins: np.ndarray, candidates: np.ndarray, slope: float,
                     intercept: float) -> tuple[float, float] | None:
    """Costes' thresholds from the binned sums of :func:`unmix.coloc.plane_pass.second_sums` (one row
    per candidate: the pixels that enter "below both thresholds" there), or None when the regression
    slope is <= 0.

    T runs down the candidates; the answer is the first T at which the pixels
    with A < T and B < slope T + intercept have Pearson r <= 0 (or fewer than
    two such pixels).
    """
    if slope <= 0:
        return None
    n, sa, sb, saa, sbb, sab = (np.cumsum(bins[:, i]) for i in range(6))
    with np.errstate(invalid="ignore", divide="ignore"):
        covariance = sab - sa * sb / n
        r = covariance / np.sqrt((saa - sa**2 / n) * (sbb - sb**2 / n))
    for j in range(candidates.size - 1, -1, -1):
        if n[j] < 2 or not r[j] > 0:  # r <= 0, or undefined: the procedure stops here
            return float(candidates[j]), float(slope * candidates[j] + intercept)
    return float(candidates[0]), float(slope * candidates[0] + intercept)


def costes_thresholds(a, b, mask=None) -> tuple[float, float] | None:
    """Costes' automatic thresholds (t_A, t_B), or None when the regression slope is <= 0.

    Every candidate T of :func:`costes_candidates` is answered from
    cumulative sums over a histogram of each pixel's entry threshold (one
    pass; see :func:`costes_from_bins`).
    """
    from .plane_pass import second_sums

    a, b = _pixels(a, b, mask)
    if a.size < 2:
        return None
    slope, intercept = orthogonal_regression(a, b)
    if slope <= 0:
        return None
    candidates = costes_candidates(a)
    # Each pixel is below both thresholds for every T above its entry level; the sums are taken about
    # the means so that they do not lose the variance to cancellation.
    bins = np.zeros((candidates.size, 6))
    second_sums(a[None], b[None], np.ones((1, a.size), bool), a.mean(), b.mean(), slope, intercept,
                float(candidates[0]), float(candidates[1] - candidates[0]) if candidates.size > 1 else 1.0, bins)
    return costes_from_bins(bins, candidates, slope, intercept)


def otsu_from_histogram(counts: np.ndarray, low: float, high: float) -> float:
    """Otsu's threshold from a histogram of `counts` over equal bins spanning [low, high]."""
    from skimage.filters import threshold_otsu

    high = high if high > low else low + 1.0
    edges = np.linspace(low, high, counts.size + 1)
    return float(threshold_otsu(hist=(np.asarray(counts), (edges[:-1] + edges[1:]) / 2)))


def otsu_thresholds(a, b, mask=None) -> tuple[float, float]:
    from skimage.filters import threshold_otsu

    a, b = _pixels(a, b, mask)
    return float(threshold_otsu(a)), float(threshold_otsu(b))


# --- randomisation ----------------------------------------------------------

def correlation_length(image, mask=None) -> int:
    """Pixels over which the image stays correlated with itself: the smallest shift at which its
    autocorrelation (inside the mask, radially averaged) falls below 1/e (common practice)."""
    image = np.asarray(image, dtype=np.float64)
    weight = np.ones(image.shape) if mask is None else np.asarray(mask, dtype=float)
    values = np.where(weight > 0, image - image[weight > 0].mean(), 0.0)
    spectrum = np.fft.rfft2(values)
    acf = np.fft.irfft2(np.abs(spectrum) ** 2, s=image.shape)
    if acf[0, 0] <= 0:
        return 1
    acf /= acf[0, 0]
    dy = np.minimum(np.arange(image.shape[0]), image.shape[0] - np.arange(image.shape[0]))[:, None]
    dx = np.minimum(np.arange(image.shape[1]), image.shape[1] - np.arange(image.shape[1]))[None, :]
    radius = np.rint(np.hypot(dy, dx)).astype(int)
    profile = np.bincount(radius.ravel(), acf.ravel()) / np.maximum(np.bincount(radius.ravel()), 1)
    below = np.flatnonzero(profile < 1 / np.e)
    return int(below[0]) if below.size else int(min(image.shape) // 2)


def shifted_correlations(a, b, mask=None) -> np.ndarray:
    """Pearson r of A against B shifted toroidally by every (dy, dx), over A's masked pixels:
    ``r[dy, dx]`` pairs A(y, x) with B(y + dy, x + dx). Exact, by FFT cross-correlation."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    m = np.ones(a.shape) if mask is None else np.asarray(mask, dtype=np.float64)
    n = m.sum()
    a_masked = np.where(m > 0, a - a[m > 0].mean(), 0.0)
    b = b - b.mean()

    def correlate(f, g):  # sum over x of f(x) g(x + s), for every s
        return np.fft.irfft2(np.conj(np.fft.rfft2(f)) * np.fft.rfft2(g), s=a.shape)

    cross = correlate(a_masked, b)
    b_sum = correlate(m, b)
    b_squares = correlate(m, b * b)
    variance_a = np.sum(a_masked**2)
    variance_b = b_squares - b_sum**2 / n
    with np.errstate(invalid="ignore", divide="ignore"):
        return cross / np.sqrt(variance_a * variance_b)


@dataclass(frozen=True)
class Randomisation:
    """A randomisation test's outcome: p, the shortest shift allowed, how many shifts were used,
    whether they were all the allowed ones (then p has no Monte-Carlo error), and how many reached
    the observed statistic."""

    p_value: float | None
    min_shift: int
    shifts: int
    exhaustive: bool
    reached: float = 0.0

    def bounds(self) -> tuple[float, float] | None:
        """95 % Monte-Carlo interval of p: Clopper-Pearson on the shifts that reached the observed
        statistic out of those drawn (the p-value over every allowed shift lies there); p itself when
        every allowed shift was used."""
        if self.p_value is None:
            return None
        if self.exhaustive or not self.shifts:
            return self.p_value, self.p_value
        from scipy.stats import beta

        n, b = self.shifts, min(max(self.reached, 0.0), float(self.shifts))
        # The smoothed count of a widened test may be fractional, and as near n or 0 as rounding allows.
        low = float(beta.ppf(0.025, b, n - b + 1)) if b > 1e-9 else 0.0
        high = float(beta.ppf(0.975, b + 1, n - b)) if n - b > 1e-9 else 1.0
        return low, high


def randomisation_test(a, b, mask=None, *, rounds: int = 1000, seed: int = 0, min_shift: int | None = None,
                       observed: float | None = None, spread: float = 0.0) -> Randomisation:
    """One-sided test for positive association of A and B by toroidal shifts of B (see :func:`shift_test`).

    `observed` is the statistic to compare with the shifted Pearson r's
    (default: the plain r of A and B); shifts at least `min_shift` long
    (default: the larger correlation length of A and B).
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if observed is None:
        observed = pearson(a, b, mask)
    length = min_shift or max(correlation_length(a, mask), correlation_length(b, mask))
    if observed is None:
        return Randomisation(None, length, 0, False)
    return shift_test(shifted_correlations(a, b, mask), observed, length, rounds=rounds, seed=seed, spread=spread)


def shift_test(shifted: np.ndarray, observed: float, length: int, *, rounds: int, seed: int,
               spread: float = 0.0) -> Randomisation:
    """p-value of `observed` against the r's of toroidal shifts, ``shifted[dy, dx]``.

    Shifts are drawn uniformly among the (dy, dx) whose larger component is at
    least `length`; when there are no more allowed shifts than `rounds`, every
    one is used. p = (1 + b) / (N + 1) (Phipson & Smyth 2010).

    `spread` is the standard deviation of an error that the observed
    statistic carries and shifted copies do not (for unmixed labels: the
    matrix's measurement error, which leaves a little of one label in the
    other wherever it is - an artefact that moves with the label, so no
    shift can show it). Each shifted r then counts with its probability of
    reaching the observed one once that normal error is added:
    p = (1 + sum Phi((r_s - observed) / spread)) / (N + 1), which is the
    plain count when `spread` is 0.
    """
    height, width = shifted.shape
    dy = np.minimum(np.arange(height), height - np.arange(height))[:, None]
    dx = np.minimum(np.arange(width), width - np.arange(width))[None, :]
    allowed = np.flatnonzero((np.maximum(dy, dx) >= length).ravel())
    if allowed.size == 0:
        return Randomisation(None, length, 0, False)
    r = shifted.ravel()
    exhaustive = allowed.size <= rounds
    chosen = allowed if exhaustive else np.random.default_rng(seed).choice(allowed, size=rounds, replace=False)
    if spread > 0:
        from scipy.special import ndtr

        reached = float(ndtr((r[chosen] - observed) / spread).sum())
    else:
        reached = int(np.count_nonzero(r[chosen] >= observed - 1e-12))
    return Randomisation((1 + reached) / (chosen.size + 1), length, int(chosen.size), exhaustive, float(reached))


def randomisation_p_value(a, b, mask=None, *, rounds: int = 200, seed: int = 0, min_shift: int | None = None,
                          observed: float | None = None) -> tuple[float | None, int]:
    """p-value and the shift length of :func:`randomisation_test`."""
    test = randomisation_test(a, b, mask, rounds=rounds, seed=seed, min_shift=min_shift, observed=observed)
    return test.p_value, test.min_shift


# --- everything for one pair --------------------------------------------------

def coefficients(a, b, mask=None, *, thresholds=None, threshold_method: str = "costes", rounds: int = 200,
                 seed: int = 0, min_shift: int | None = None) -> Coefficients:
    """All coefficients of the pair (A, B) over `mask`, for images of any number of dimensions (the
    last two are Y and X; shifts move every plane alike).

    `thresholds` (t_A, t_B) are used when given; else Costes' procedure
    (``threshold_method="costes"``), falling back to Otsu when the regression
    slope is <= 0, or Otsu directly. `rounds` = 0 skips the randomisation.
    The sums are those of :mod:`unmix.coloc.sums`, one plane at a time.
    """
    from .sums import accumulate

    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"images differ in shape: {a.shape} and {b.shape}")
    keep = np.ones(a.shape, bool) if mask is None else np.asarray(mask, dtype=bool)
    if keep.shape != a.shape:
        raise ValueError(f"mask shape {keep.shape} differs from the image shape {a.shape}")
    planes_a, planes_b, planes_m = (x.reshape((-1,) + a.shape[-2:]) for x in (a, b, keep))

    def planes():
        return zip(planes_a, planes_b, planes_m)

    sums = accumulate(planes, thresholds=thresholds, threshold_method=threshold_method, shape=a.shape[-2:],
                      total=a.size, seed=seed)
    p = None
    if rounds and sums.moments.pearson is not None and sums.moments.n >= MIN_PIXELS:
        p = sums.randomisation(rounds=rounds, seed=seed, min_shift=min_shift, observed=sums.moments.pearson).p_value
    return sums.coefficients(p)
