"""Colocalization coefficients against scikit-image, scipy and the published definitions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage, stats

from unmix.coloc import statistics as coloc
def _pair(seed, shape=(128, 128), shared=0.6, structure=4.0):
    """Two images sharing a fraction of blurred structure (invented test data)."""
    rng = np.random.default_rng(seed)
    common = ndimage.gaussian_filter(rng.normal(size=shape), structure)
    own_a = ndimage.gaussian_filter(rng.normal(size=shape), structure)
    own_b = ndimage.gaussian_filter(rng.normal(size=shape), structure)
    scale = 1.0 / common.std()
    a = 100 + 40 * scale * (shared * common + (1 - shared) * own_a) + rng.normal(0, 2, shape)
    b = 80 + 30 * scale * (shared * common + (1 - shared) * own_b) + rng.normal(0, 2, shape)
    return a, b


def test_pearson_spearman_against_scipy():
    # Reference: scipy.stats.pearsonr and spearmanr on the same pixels.
    a, b = _pair(1)
    mask = np.zeros(a.shape, bool)
    mask[10:90, 20:120] = True
    assert coloc.pearson(a, b, mask) == pytest.approx(stats.pearsonr(a[mask], b[mask])[0], rel=1e-10)
    assert coloc.spearman(a, b, mask) == pytest.approx(stats.spearmanr(a[mask], b[mask])[0], rel=1e-10)


def test_pearson_and_manders_against_scikit_image():
    # Reference: skimage.measure.pearson_corr_coeff, manders_coloc_coeff, manders_overlap_coeff.
    from skimage.measure import manders_coloc_coeff, manders_overlap_coeff, pearson_corr_coeff

    a, b = _pair(2)
    a, b = a - 100, b - 80  # after background subtraction: negative values are clipped for Manders
    mask = np.ones(a.shape, bool)
    mask[:, :10] = False
    t_a, t_b = 5.0, 3.0
    assert coloc.pearson(a, b, mask) == pytest.approx(pearson_corr_coeff(a, b, mask)[0], rel=1e-9)
    clipped_a, clipped_b = np.maximum(a, 0), np.maximum(b, 0)
    m1, m2 = coloc.manders(a, b, (t_a, t_b), mask)
    assert m1 == pytest.approx(manders_coloc_coeff(clipped_a, clipped_b > t_b, mask), rel=1e-9)
    assert m2 == pytest.approx(manders_coloc_coeff(clipped_b, clipped_a > t_a, mask), rel=1e-9)
    assert coloc.overlap(a, b, mask) == pytest.approx(manders_overlap_coeff(clipped_a, clipped_b, mask), rel=1e-9)


def test_li_icq_definition():
    # Li et al. 2004: identical images give +0.5; independent noise about 0.
    rng = np.random.default_rng(3)
    a = rng.normal(size=(200, 200))
    assert coloc.li_icq(a, a) == pytest.approx(0.5)
    assert abs(coloc.li_icq(a, rng.normal(size=a.shape))) < 0.01
    assert coloc.li_icq(a, -a) == pytest.approx(-0.5)


def _costes_by_the_book(a, b):
    """Costes et al. 2004 written out directly: orthogonal regression, then T lowered one
    candidate at a time, r recomputed from scratch on the pixels below both thresholds."""
    a, b = a.ravel().astype(float), b.ravel().astype(float)
    cov = np.cov(a, b, bias=True)
    s_aa, s_bb, s_ab = cov[0, 0], cov[1, 1], cov[0, 1]
    slope = (s_bb - s_aa + np.sqrt((s_bb - s_aa) ** 2 + 4 * s_ab**2)) / (2 * s_ab)
    intercept = b.mean() - slope * a.mean()
    for t in coloc.costes_candidates(a)[::-1]:
        below = (a < t) & (b < slope * t + intercept)
        if below.sum() < 2 or np.ptp(a[below]) == 0 or np.ptp(b[below]) == 0:
            return t, slope * t + intercept
        if np.corrcoef(a[below], b[below])[0, 1] <= 0:
            return t, slope * t + intercept
    return None


@pytest.mark.parametrize("seed, integer", [(4, True), (5, True), (6, False)])
def test_costes_fast_search_equals_the_published_procedure(seed, integer):
    a, b = _pair(seed, shape=(64, 64), shared=0.5)
    if integer:
        a, b = np.round(a), np.round(b)
    fast = coloc.costes_thresholds(a, b)
    slow = _costes_by_the_book(a, b)
    assert fast is not None and slow is not None
    assert fast[0] == pytest.approx(slow[0], rel=1e-12) and fast[1] == pytest.approx(slow[1], rel=1e-9)


def test_costes_falls_back_when_the_slope_is_not_positive():
    # Costes et al. 2004: no threshold for a non-positive regression slope; Otsu instead, said so.
    a, _ = _pair(7)
    assert coloc.costes_thresholds(a, a.max() - a) is None
    result = coloc.coefficients(a, a.max() - a, rounds=0)
    assert result.threshold_method.startswith("otsu") and "slope" in result.threshold_method


def test_shifted_correlations_equal_direct_rolls():
    a, b = _pair(8, shape=(32, 48))
    mask = np.zeros(a.shape, bool)
    mask[4:28, 6:40] = True
    r = coloc.shifted_correlations(a, b, mask)
    for dy, dx in [(0, 0), (3, 7), (31, 1), (10, 40)]:
        shifted = np.roll(b, (-dy, -dx), axis=(0, 1))  # B(y + dy, x + dx)
        assert r[dy, dx] == pytest.approx(stats.pearsonr(a[mask], shifted[mask])[0], rel=1e-9)


def test_identical_images_get_the_smallest_p_value():
    a, _ = _pair(9)
    p, _ = coloc.randomisation_p_value(a, a, rounds=99, seed=1)
    assert p == pytest.approx(1 / 100)


@pytest.mark.slow
def test_randomisation_is_honest_for_structures_larger_than_the_psf():
    # Independent images with structures several times larger than a PSF (sigma 6 px):
    # p-values uniform (Kolmogorov-Smirnov, scipy) and the false-positive rate at
    # alpha = 0.05 inside the binomial range of 5 % (n = 200: 3 to 19, p > 0.001 each side).
    p_values = []
    for seed in range(200):
        a, b = _pair(1000 + seed, shape=(96, 96), shared=0.0, structure=6.0)
        p, length = coloc.randomisation_p_value(a, b, rounds=99, seed=seed)
        p_values.append(p)
        assert length >= 6
    p_values = np.array(p_values)
    assert stats.kstest(p_values, "uniform").pvalue > 0.001
    false_positives = int(np.sum(p_values < 0.05))
    low, high = stats.binom.ppf([0.001, 0.999], 200, 0.05)
    assert low <= false_positives <= high


def test_constant_channel_is_reported_not_a_number():
    a, _ = _pair(10)
    result = coloc.coefficients(a, np.full(a.shape, 7.0), rounds=10)
    assert result.pearson is None and result.p_value is None and "constant" in result.note


def test_too_few_pixels_in_mask():
    a, b = _pair(11)
    mask = np.zeros(a.shape, bool)
    mask[0, :5] = True
    result = coloc.coefficients(a, b, mask, rounds=10)
    assert result.pearson is None and result.n_pixels == 5 and "pixels" in result.note


def test_mask_shape_must_match():
    a, b = _pair(12)
    with pytest.raises(ValueError, match="mask shape"):
        coloc.pearson(a, b, np.ones((3, 3), bool))
