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


def orthogonal_regression(a, b) -> tuple[float, float]:
    """Slope and intercept of the orthogonal (total least squares) line B = slope A + intercept."""
    mean_a, mean_b = a.mean(), b.mean()
    s_aa, s_bb = np.var(a), np.var(b)
    s_ab = np.mean((a - mean_a) * (b - mean_b))
    if s_ab == 0:
        return 0.0, float(mean_b)
    slope = (s_bb - s_aa + np.sqrt((s_bb - s_aa) ** 2 + 4 * s_ab**2)) / (2 * s_ab)
    return float(slope), float(mean_b - slope * mean_a)


def costes_candidates(a: np.ndarray) -> np.ndarray:
    """Candidate thresholds on A, ascending: every grey level of integer-valued data, else a fine grid."""
    low, high = float(a.min()), float(a.max())
    if np.all(a == np.round(a)) and high - low <= 65535:
        return np.arange(low, high + 1.0)
    return np.linspace(low, high, FLOAT_LEVELS)


def costes_thresholds(a, b, mask=None) -> tuple[float, float] | None:
    """Costes' automatic thresholds (t_A, t_B), or None when the regression slope is <= 0.

    T runs down the candidates of :func:`costes_candidates`; the answer is the
    first T at which the pixels with A < T and B < slope T + intercept have
    Pearson r <= 0 (or fewer than two such pixels).
    """
    from .costes_pass import below_threshold_sums

    a, b = _pixels(a, b, mask)
    if a.size < 2:
        return None
    slope, intercept = orthogonal_regression(a, b)
    if slope <= 0:
        return None
    candidates = costes_candidates(a)
    # Each pixel is below both thresholds for every T above its entry level.
    entry = np.maximum(a, (b - intercept) / slope)
    # Centre the values so that the cumulative sums do not lose the variance to cancellation.
    sums = below_threshold_sums(entry, a - a.mean(), b - b.mean(), float(candidates[0]),
                                float(candidates[1] - candidates[0]) if candidates.size > 1 else 1.0,
                                candidates.size)
    n, sa, sb, saa, sbb, sab = (np.cumsum(sums[:, i]) for i in range(6))
    with np.errstate(invalid="ignore", divide="ignore"):
        covariance = sab - sa * sb / n
        r = covariance / np.sqrt((saa - sa**2 / n) * (sbb - sb**2 / n))
    for j in range(candidates.size - 1, -1, -1):
        if n[j] < 2 or not r[j] > 0:  # r <= 0, or undefined: the procedure stops here
            return float(candidates[j]), float(slope * candidates[j] + intercept)
    return float(candidates[0]), float(slope * candidates[0] + intercept)


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
    """A randomisation test's outcome: p, the shortest shift allowed, how many shifts were used and
    whether they were all the allowed ones (then p has no Monte-Carlo error)."""

    p_value: float | None
    min_shift: int
    shifts: int
    exhaustive: bool

    def margin(self, alpha: float) -> float:
        """Twice the Monte-Carlo standard error of p near `alpha` (0 when every shift was used)."""
        return 0.0 if self.exhaustive or not self.shifts else 2 * float(np.sqrt(alpha * (1 - alpha) / self.shifts))


def randomisation_test(a, b, mask=None, *, rounds: int = 1000, seed: int = 0, min_shift: int | None = None,
                       observed: float | None = None, spread: float = 0.0) -> Randomisation:
    """One-sided test for positive association of A and B by toroidal shifts of B.

    Shifts are drawn uniformly among the (dy, dx) whose larger component is at
    least `min_shift` (default: the larger correlation length of A and B);
    when there are no more allowed shifts than `rounds`, every one is used.
    `observed` is the statistic to compare with the shifted Pearson r's
    (default: the plain r of A and B).

    `spread` is the standard deviation of an error that the observed
    statistic carries and shifted copies do not (for unmixed labels: the
    matrix's measurement error, which leaves a little of one label in the
    other wherever it is - an artefact that moves with the label, so no
    shift can show it). Each shifted r then counts with its probability of
    reaching the observed one once that normal error is added:
    p = (1 + sum Phi((r_s - observed) / spread)) / (N + 1), which is the
    plain count when `spread` is 0.
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if observed is None:
        observed = pearson(a, b, mask)
    length = min_shift or max(correlation_length(a, mask), correlation_length(b, mask))
    if observed is None:
        return Randomisation(None, length, 0, False)
    height, width = a.shape
    dy = np.minimum(np.arange(height), height - np.arange(height))[:, None]
    dx = np.minimum(np.arange(width), width - np.arange(width))[None, :]
    allowed = np.flatnonzero((np.maximum(dy, dx) >= length).ravel())
    if allowed.size == 0:
        return Randomisation(None, length, 0, False)
    r = shifted_correlations(a, b, mask).ravel()
    exhaustive = allowed.size <= rounds
    chosen = allowed if exhaustive else np.random.default_rng(seed).choice(allowed, size=rounds, replace=False)
    if spread > 0:
        from scipy.special import ndtr

        reached = float(ndtr((r[chosen] - observed) / spread).sum())
    else:
        reached = int(np.count_nonzero(r[chosen] >= observed - 1e-12))
    return Randomisation((1 + reached) / (chosen.size + 1), length, int(chosen.size), exhaustive)


def randomisation_p_value(a, b, mask=None, *, rounds: int = 200, seed: int = 0, min_shift: int | None = None,
                          observed: float | None = None) -> tuple[float | None, int]:
    """p-value and the shift length of :func:`randomisation_test`."""
    test = randomisation_test(a, b, mask, rounds=rounds, seed=seed, min_shift=min_shift, observed=observed)
    return test.p_value, test.min_shift


# --- everything for one pair --------------------------------------------------

def coefficients(a, b, mask=None, *, thresholds=None, threshold_method: str = "costes", rounds: int = 200,
                 seed: int = 0, min_shift: int | None = None) -> Coefficients:
    """All coefficients of the pair (A, B) over `mask`.

    `thresholds` (t_A, t_B) are used when given; else Costes' procedure
    (``threshold_method="costes"``), falling back to Otsu when the regression
    slope is <= 0, or Otsu directly. `rounds` = 0 skips the randomisation.
    """
    values_a, values_b = _pixels(a, b, mask)
    n = int(values_a.size)
    if n < MIN_PIXELS:
        return Coefficients(None, None, None, None, None, "none", None, None, None, None, None, n,
                            f"only {n} pixels; at least {MIN_PIXELS} are needed")
    note = ""
    if np.ptp(values_a) == 0 or np.ptp(values_b) == 0:
        which = "A" if np.ptp(values_a) == 0 else "B"
        note = f"image {which} is constant here: correlation coefficients are undefined"
    method = "given"
    if thresholds is None:
        if threshold_method == "costes" and not note:
            thresholds = costes_thresholds(values_a, values_b)
            method = "costes"
            if thresholds is None:
                method = "otsu (Costes: regression slope <= 0, no threshold)"
        if thresholds is None:
            thresholds = otsu_thresholds(values_a, values_b) if not note else (float(values_a.max()),
                                                                               float(values_b.max()))
            method = method if method.startswith("otsu") else ("otsu" if not note else "none")
    m1, m2 = manders(values_a, values_b, thresholds)
    own_m1, own_m2 = manders_above_own_thresholds(values_a, values_b, thresholds)
    r = pearson(values_a, values_b)
    p = None
    if rounds and r is not None:
        p, _ = randomisation_p_value(a, b, mask, rounds=rounds, seed=seed, min_shift=min_shift, observed=r)
    return Coefficients(
        pearson=r, spearman=spearman(values_a, values_b) if r is not None else None, manders_m1=m1, manders_m2=m2,
        thresholds=tuple(float(t) for t in thresholds), threshold_method=method,
        m1_above_own_threshold=own_m1, m2_above_own_threshold=own_m2,
        overlap=overlap(values_a, values_b), icq=li_icq(values_a, values_b) if r is not None else None,
        p_value=p, n_pixels=n, note=note)
