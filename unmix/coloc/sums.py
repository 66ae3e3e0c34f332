"""Everything a pair's coefficients need, summed plane by plane, so that stacks of any size stream.

A plane (Y, X) at a time, in three passes over the same planes:

1. moments of A and B (merged with Chan's parallel update, which keeps its
   precision over billions of voxels), the clipped sums for Manders and the
   overlap, the range of A, a seeded subsample for Spearman's rho, and the
   Fourier sums from which every toroidal XY shift's Pearson r and both
   images' autocorrelation follow (the same (dy, dx) for every plane, no
   wrap between planes);
2. Costes' binned sums (one bin per candidate threshold), the sign count of
   Li's ICQ, histograms for Otsu's thresholds;
3. the Manders sums at the chosen thresholds.

:mod:`unmix.coloc.statistics` computes the same coefficients from plain
arrays; on one plane both must agree (tests check it, and check the arrays
against scikit-image and scipy).

References
----------
.. [1] T. F. Chan, G. H. Golub and R. J. LeVeque, "Updating formulae and a
   pairwise algorithm for computing sample variances", Technical report
   STAN-CS-79-773, Stanford University (1979) (from memory).
"""

from __future__ import annotations

import numpy as np

from . import statistics

# Spearman's rho is exact up to this many voxels, from a seeded systematic subsample above (its standard
# error is then about 1 / sqrt(SPEARMAN_SAMPLE), far below what matters; ranking all voxels of a large
# stack would cost more than everything else together).
SPEARMAN_SAMPLE = 2**18


class Moments:
    """Count, means and centred cross products of two variables, mergeable."""

    def __init__(self):
        self.n = 0
        self.mean = np.zeros(2)
        self.m2 = np.zeros((2, 2))

    def add(self, a: np.ndarray, b: np.ndarray) -> None:
        n = a.size
        if n == 0:
            return
        values = np.stack([a, b]).astype(np.float64, copy=False)
        mean = values.mean(axis=1)
        centred = values - mean[:, None]
        m2 = centred @ centred.T
        total = self.n + n
        delta = mean - self.mean
        self.m2 += m2 + np.outer(delta, delta) * self.n * n / total
        self.mean += delta * n / total
        self.n = total

    def add_sums(self, sums: np.ndarray, reference: tuple) -> None:
        """Merge the sums of :func:`unmix.coloc.plane_pass.first_sums` taken about `reference`."""
        from . import plane_pass as k

        n = sums[k.N]
        if n == 0:
            return
        shifted = np.array([sums[k.SA], sums[k.SB]]) / n
        m2 = np.array([[sums[k.SAA] - sums[k.SA] * shifted[0], sums[k.SAB] - sums[k.SA] * shifted[1]],
                       [sums[k.SAB] - sums[k.SB] * shifted[0], sums[k.SBB] - sums[k.SB] * shifted[1]]])
        mean = np.asarray(reference) + shifted
        total = self.n + n
        delta = mean - self.mean
        self.m2 += m2 + np.outer(delta, delta) * self.n * n / total
        self.mean += delta * n / total
        self.n = int(total)

    @property
    def pearson(self) -> float | None:
        denominator = np.sqrt(self.m2[0, 0] * self.m2[1, 1])
        return float(self.m2[0, 1] / denominator) if denominator > 0 else None


# The autocorrelations that set the shortest shift come from this many planes (the first ones): a few
# planes measure a correlation length as well as all of them, at a fraction of the Fourier work.
LENGTH_PLANES = 4


class Spectra:
    """Fourier sums over planes for every toroidal XY shift of B against A, and both autocorrelations."""

    def __init__(self, shape):
        self.shape = tuple(shape)
        spectrum = (self.shape[0], self.shape[1] // 2 + 1)
        self.cross_ab = np.zeros(spectrum, complex)   # sum conj(F(m a)) F(b)
        self.cross_mb = np.zeros(spectrum, complex)   # sum conj(F(m)) F(b)
        self.cross_mbb = np.zeros(spectrum, complex)  # sum conj(F(m)) F(b^2)
        self.power = {name: np.zeros(spectrum) for name in ("ma", "mb", "m")}
        self.mixed = {name: np.zeros(spectrum, complex) for name in ("ma", "mb")}  # sum F(m x) conj(F(m))
        self.length_planes = 0

    @staticmethod
    def mask_spectrum(mask: np.ndarray) -> np.ndarray | None:
        """F(m) of a plane's mask, to share between the pairs of one region (None for a full mask, which
        needs none)."""
        from scipy import fft

        return None if mask.all() else fft.rfft2(mask.astype(np.float64), workers=-1)

    def add(self, a: np.ndarray, b: np.ndarray, mask: np.ndarray, f_m: np.ndarray | None = None) -> None:
        """Add one plane. A mask covering the whole plane has the spectrum N at zero frequency only, so
        the sums that involve it need no transform of their own."""
        from scipy import fft

        from .plane_pass import accumulate_spectra, spectral_inputs

        length = self.length_planes < LENGTH_PLANES
        if mask.all():
            planes = np.empty((2,) + self.shape)
            spectral_inputs(a, b, mask, planes)
            f_ma, f_b = fft.rfft2(planes, workers=-1)
            n = float(mask.size)
            self.cross_ab += np.conj(f_ma) * f_b
            self.cross_mb[0, 0] += n * f_b[0, 0]
            self.cross_mbb[0, 0] += n * float(np.sum(planes[1] ** 2))
            if length:
                self.length_planes += 1
                for name, f in (("ma", f_ma), ("mb", f_b)):
                    self.power[name] += (f * np.conj(f)).real
                    self.mixed[name][0, 0] += n * f[0, 0]
                self.power["m"][0, 0] += n * n
            return
        if f_m is None:
            f_m = self.mask_spectrum(mask)
        planes = np.empty((4 if length else 3,) + self.shape)
        spectral_inputs(a, b, mask, planes)
        spectra = fft.rfft2(planes, workers=-1)
        accumulate_spectra(spectra[0], spectra[1], spectra[2], f_m, self.cross_ab, self.cross_mb, self.cross_mbb)
        if length:
            self.length_planes += 1
            conj_m = np.conj(f_m)
            for name, f in (("ma", spectra[0]), ("mb", spectra[3])):
                self.power[name] += (f * np.conj(f)).real
                self.mixed[name] += f * conj_m
            self.power["m"] += (f_m * conj_m).real

    def _inverse(self, spectrum):
        from scipy import fft

        return fft.irfft2(spectrum, s=self.shape, workers=-1)

    def shifted_correlations(self, moments: Moments) -> np.ndarray:
        """Pearson r of A (masked) against B shifted by every (dy, dx): ``r[dy, dx]`` pairs A(z, y, x)
        with B(z, y + dy, x + dx), over all planes."""
        n = moments.n
        mean_a = moments.mean[0]
        cross = self._inverse(self.cross_ab) - mean_a * self._inverse(self.cross_mb)
        b_sum = self._inverse(self.cross_mb)
        b_squares = self._inverse(self.cross_mbb)
        variance_b = b_squares - b_sum**2 / n
        with np.errstate(invalid="ignore", divide="ignore"):
            return cross / np.sqrt(moments.m2[0, 0] * variance_b)

    def correlation_length(self, which: int, moments: Moments) -> int:
        """Shift at which image `which` (0 = A, 1 = B), centred and masked, stops resembling itself:
        the radially averaged XY autocorrelation falls below 1/e (common practice)."""
        name = ("ma", "mb")[which]
        mean = moments.mean[which]
        power = self.power[name] - 2 * mean * self.mixed[name].real + mean**2 * self.power["m"]
        acf = self._inverse(power)
        return _length_from_acf(acf)


def _length_from_acf(acf: np.ndarray) -> int:
    if acf[0, 0] <= 0:
        return 1
    acf = acf / acf[0, 0]
    height, width = acf.shape
    dy = np.minimum(np.arange(height), height - np.arange(height))[:, None]
    dx = np.minimum(np.arange(width), width - np.arange(width))[None, :]
    radius = np.rint(np.hypot(dy, dx)).astype(int)
    profile = np.bincount(radius.ravel(), acf.ravel()) / np.maximum(np.bincount(radius.ravel()), 1)
    below = np.flatnonzero(profile < 1 / np.e)
    return int(below[0]) if below.size else int(min(height, width) // 2)


class PairSums:
    """The sums of one pair (A, B) over the voxels of a region, added plane by plane in three passes.

    Parameters
    ----------
    shape : (Y, X)
        Plane shape (for the Fourier sums; None skips them).
    total : int
        An upper bound of the number of voxels (sets the rate of Spearman's subsample); 0 skips
        Spearman's rho.
    seed : int
        Seed of that subsample.
    """

    def __init__(self, shape=None, *, total: int = 0, seed: int = 0):
        self.moments = Moments()
        self.reference = None
        self.spectra = Spectra(shape) if shape is not None else None
        self.clipped = np.zeros(5)  # sum a+ b+, a+^2, b+^2, a+, b+
        self.low, self.high = np.inf, -np.inf
        self.low_b, self.high_b = np.inf, -np.inf
        self.integer = True
        self.rate = 0.0 if total == 0 else min(1.0, SPEARMAN_SAMPLE / total)
        self.rng = np.random.default_rng([seed, 3])
        self.sample = []
        self.regression = None
        self.candidates = None
        self.bins = None
        self.same_sign = 0
        self.histograms = None
        self.thresholds = None
        self.method = "none"
        self.manders = np.zeros(6)

    # --- pass 1 -------------------------------------------------------------------------------
    def add_first(self, a: np.ndarray, b: np.ndarray, mask: np.ndarray, f_m: np.ndarray | None = None) -> None:
        from . import plane_pass as k

        a = np.ascontiguousarray(a, dtype=np.float64)
        b = np.ascontiguousarray(b, dtype=np.float64)
        if self.spectra is not None:
            self.spectra.add(a, b, mask, f_m)
        if self.reference is None:  # sums are taken about a point near the data, for their precision
            inside = mask & np.isfinite(a) & np.isfinite(b)
            self.reference = (float(a[inside].mean()), float(b[inside].mean())) if inside.any() else None
            if self.reference is None:
                return
        sums = k.first_sums(a, b, mask, *self.reference)
        if sums[k.N] == 0:
            return
        self.moments.add_sums(sums, self.reference)
        self.clipped += sums[[k.PAB, k.PAA, k.PBB, k.PA, k.PB]]
        self.low, self.high = min(self.low, sums[k.AMIN]), max(self.high, sums[k.AMAX])
        self.low_b, self.high_b = min(self.low_b, sums[k.BMIN]), max(self.high_b, sums[k.BMAX])
        self.integer = self.integer and bool(sums[k.INTEGER])
        if self.rate > 0:
            step = max(1, int(round(1 / self.rate)))
            # A systematic sample: every step-th pixel in raster order, from a seeded start.
            start = int(self.rng.integers(step)) if step > 1 else 0
            flat_a, flat_b, flat_m = a.ravel()[start::step], b.ravel()[start::step], mask.ravel()[start::step]
            keep = flat_m & np.isfinite(flat_a) & np.isfinite(flat_b)
            self.sample.append(np.stack([flat_a[keep], flat_b[keep]]))

    def finish_first(self, thresholds=None, method: str = "costes") -> None:
        if self.moments.n < 2:
            return
        cov = self.moments.m2 / self.moments.n
        self.regression = statistics.orthogonal_line(cov[0, 0], cov[1, 1], cov[0, 1], *self.moments.mean)
        if self.integer and self.high - self.low <= 65535:
            self.candidates = np.arange(self.low, self.high + 1.0)
        else:
            self.candidates = np.linspace(self.low, self.high, statistics.FLOAT_LEVELS)
        self.bins = np.zeros((self.candidates.size, 6))
        # Otsu's histograms only where Otsu can be used: asked for, or Costes impossible.
        if thresholds is None and (method != "costes" or self.regression[0] <= 0):
            self.histograms = (np.zeros(statistics.FLOAT_LEVELS), np.zeros(statistics.FLOAT_LEVELS))

    # --- pass 2 -------------------------------------------------------------------------------
    def add_second(self, a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> None:
        from . import plane_pass as k

        if self.bins is None:
            return
        a = np.ascontiguousarray(a, dtype=np.float64)
        b = np.ascontiguousarray(b, dtype=np.float64)
        slope, intercept = self.regression
        step = float(self.candidates[1] - self.candidates[0]) if self.candidates.size > 1 else 1.0
        self.same_sign += k.second_sums(a, b, mask, *self.moments.mean, slope, intercept,
                                        float(self.candidates[0]), step, self.bins)
        if self.histograms is not None:
            keep = mask & np.isfinite(a) & np.isfinite(b)
            for histogram, values, low, high in ((self.histograms[0], a[keep], self.low, self.high),
                                                 (self.histograms[1], b[keep], self.low_b, self.high_b)):
                histogram += np.histogram(values, statistics.FLOAT_LEVELS, (low, high if high > low else low + 1))[0]

    def finish_second(self, thresholds=None, method: str = "costes") -> None:
        """Choose the thresholds: `thresholds` when given, else Costes' (Otsu when the regression slope
        is not positive), or Otsu's."""
        if thresholds is not None:
            self.thresholds, self.method = tuple(float(t) for t in thresholds), "given"
            return
        if self.bins is None:
            return
        if self.constant():
            self.thresholds, self.method = (self.high, self.high_b), "none"
            return
        if method == "costes":
            slope, intercept = self.regression
            found = statistics.costes_from_bins(self.bins, self.candidates, slope, intercept)
            if found is not None:
                self.thresholds, self.method = found, "costes"
                return
            method = "otsu (Costes: regression slope <= 0, no threshold)"
        self.thresholds = tuple(statistics.otsu_from_histogram(h, low, high) for h, low, high in (
            (self.histograms[0], self.low, self.high), (self.histograms[1], self.low_b, self.high_b)))
        self.method = method if method.startswith("otsu") else "otsu"

    # --- pass 3 -------------------------------------------------------------------------------
    def add_third(self, a: np.ndarray, b: np.ndarray, mask: np.ndarray) -> None:
        from . import plane_pass as k

        if self.thresholds is None:
            return
        a = np.ascontiguousarray(a, dtype=np.float64)
        b = np.ascontiguousarray(b, dtype=np.float64)
        self.manders += k.third_sums(a, b, mask, *self.thresholds)

    # --- results ------------------------------------------------------------------------------
    def constant(self) -> bool:
        return self.moments.n > 0 and (self.moments.m2[0, 0] <= 0 or self.moments.m2[1, 1] <= 0)

    def coefficients(self, p_value: float | None = None) -> "statistics.Coefficients":
        n = self.moments.n
        if n < statistics.MIN_PIXELS:
            return statistics.Coefficients(None, None, None, None, None, "none", None, None, None, None, None, n,
                                           f"only {n} pixels; at least {statistics.MIN_PIXELS} are needed")
        note = ""
        if self.constant():
            which = "A" if self.moments.m2[0, 0] <= 0 else "B"
            note = f"image {which} is constant here: correlation coefficients are undefined"
        r = self.moments.pearson
        ab, aa, bb, sum_a, sum_b = self.clipped
        m1_b, m2_a, both_a, own_a, both_b, own_b = self.manders

        def ratio(top, bottom):
            return float(top / bottom) if bottom > 0 else None

        spearman = None
        if r is not None and self.sample:
            sample = np.concatenate(self.sample, axis=1)
            spearman = statistics.spearman(sample[0], sample[1])
            if 0 < self.rate < 1:
                note = "; ".join(filter(None, [note, f"Spearman's rho from a systematic sample of "
                                                     f"{sample.shape[1]} voxels"]))
        return statistics.Coefficients(
            pearson=r, spearman=spearman, manders_m1=ratio(m1_b, sum_a), manders_m2=ratio(m2_a, sum_b),
            thresholds=self.thresholds, threshold_method=self.method,
            m1_above_own_threshold=ratio(both_a, own_a), m2_above_own_threshold=ratio(both_b, own_b),
            overlap=ratio(ab, np.sqrt(aa * bb)), icq=float(self.same_sign / n - 0.5) if r is not None else None,
            p_value=p_value, n_pixels=n, note=note)

    def randomisation(self, *, rounds: int, seed: int, min_shift: int | None, observed: float | None,
                      spread: float = 0.0) -> "statistics.Randomisation":
        """The randomisation test of :func:`unmix.coloc.statistics.randomisation_test` from these sums."""
        length = min_shift or max(self.spectra.correlation_length(0, self.moments),
                                  self.spectra.correlation_length(1, self.moments))
        if observed is None or self.moments.n < 2:
            return statistics.Randomisation(None, length, 0, False)
        return statistics.shift_test(self.spectra.shifted_correlations(self.moments), observed, length,
                                     rounds=rounds, seed=seed, spread=spread)


def accumulate(planes, *, thresholds=None, threshold_method: str = "costes", shape=None, total: int = 0,
               seed: int = 0) -> PairSums:
    """Run the three passes over `planes`, a function returning a fresh iterable of (a, b, mask) planes."""
    sums = PairSums(shape, total=total, seed=seed)
    for a, b, mask in planes():
        sums.add_first(a, b, mask)
    sums.finish_first(thresholds, threshold_method)
    if sums.bins is not None:
        for a, b, mask in planes():
            sums.add_second(a, b, mask)
    sums.finish_second(thresholds, threshold_method)
    for a, b, mask in planes():
        sums.add_third(a, b, mask)
    return sums
