"""Background and saturation levels."""

from __future__ import annotations

import numpy as np
import pytest

from unmix.measure.levels import saturation_level, summarise_channel


def _dark_frame(rng, offset=100.0, read_noise_adu=6.0, shape=(256, 256)):
    return np.clip(np.round(rng.normal(offset, read_noise_adu, shape)), 0, 65535).astype(np.uint16)


def test_histogram_median_equals_numpy_median():
    # Reference: numpy.median on the same integer pixels.
    rng = np.random.default_rng(3)
    pixels = rng.integers(0, 4096, size=(101, 99)).astype(np.uint16)
    assert summarise_channel(pixels).median == np.median(pixels)


def test_background_of_dark_frame_with_known_offset():
    # Known offset and read noise of a simulated camera; the estimate must find
    # them (mean of a normal distribution; sigma from the MAD, common practice).
    rng = np.random.default_rng(4)
    summary = summarise_channel(_dark_frame(rng))
    assert summary.background == pytest.approx(100.0, abs=0.5)
    assert summary.noise == pytest.approx(6.0, rel=0.1)


def test_background_estimate_ignores_sparse_bright_structures():
    rng = np.random.default_rng(5)
    frame = _dark_frame(rng).astype(np.int64)
    frame[rng.random(frame.shape) < 0.2] += rng.integers(50, 2000, size=1)[0]
    summary = summarise_channel(frame.astype(np.uint16))
    assert summary.background == pytest.approx(100.0, abs=1.5)


def test_float_background_matches_integer_background():
    rng = np.random.default_rng(6)
    frame = _dark_frame(rng)
    assert summarise_channel(frame.astype(np.float32)).background == pytest.approx(
        summarise_channel(frame).background, abs=0.5)


def test_saturation_at_12_bit_pile_up():
    # Contract rule: the largest 2^n - 1 that >= 0.01 % of the pixels reach.
    rng = np.random.default_rng(7)
    frame = rng.integers(100, 4000, size=(200, 200)).astype(np.uint16)
    frame.flat[:50] = 4095  # 0.125 %
    assert saturation_level([summarise_channel(frame)]) == 4095


def test_no_pile_up_gives_maximum_of_type():
    rng = np.random.default_rng(8)
    frame = rng.integers(100, 4000, size=(200, 200)).astype(np.uint16)
    # Plenty of pixels pass 2047 and 255, but nothing piles up at full scale.
    assert saturation_level([summarise_channel(frame)]) == 65535
    assert saturation_level([summarise_channel(frame.astype(np.float32))]) == np.finfo(np.float32).max


def test_too_few_pixels_at_full_scale_is_not_saturation():
    frame = np.full((200, 200), 1000, np.uint16)
    frame.flat[:3] = 4095  # 0.0075 % < 0.01 %
    assert saturation_level([summarise_channel(frame)]) == 65535


def test_saturation_is_pooled_over_images():
    a = np.full((100, 100), 1000, np.uint16)
    b = a.copy()
    a.flat[0] = 4095  # 1 of 10,000 pixels: 0.01 % of this image, 0.005 % of both
    assert saturation_level([summarise_channel(a)]) == 4095
    assert saturation_level([summarise_channel(a), summarise_channel(b)]) == 65535


def _clipped_background(rng, offset, sigma=7.0, shape=(256, 256)):
    """A background of known mean and SD cut at 0 by the converter (an offset set too low)."""
    return np.clip(np.round(rng.normal(offset, sigma, shape)), 0, 4095).astype(np.uint16)


def test_clipped_offset_is_detected_and_its_background_recovered():
    # Simulation with known truth: a normal background (mean 3, SD 7) cut at 0, so that about a third of
    # the pixels read 0. The pile-up at the bottom is detected, and the background and its noise are
    # still found from the upper half of the peak (normal distribution, scipy.stats.norm.cdf gives the
    # clipped share).
    from scipy.stats import norm

    from unmix.measure.levels import clipped_offset

    rng = np.random.default_rng(21)
    summary = summarise_channel(_clipped_background(rng, 3.0))
    assert summary.clipped_low
    level, share = clipped_offset([summary])
    assert level == 0
    assert share == pytest.approx(norm.cdf(0.5, 3.0, 7.0), abs=0.01)
    assert summary.background == pytest.approx(3.0, abs=0.5)
    assert summary.noise == pytest.approx(7.0, rel=0.1)


def test_unclipped_backgrounds_are_never_called_clipped():
    # False alarms: 200 seeded normal backgrounds whose mean lies 4 to 8 SDs above 0 (0.003 % or fewer
    # pixels would be cut): none is called clipped; with the mean 1 SD above 0 (16 % cut), all are.
    rng = np.random.default_rng(22)
    sigma = 6.0
    unclipped = [summarise_channel(_clipped_background(rng, rng.uniform(4, 8) * sigma, sigma, (128, 128)))
                 for _ in range(200)]
    assert sum(s.clipped_low for s in unclipped) == 0
    clipped = [summarise_channel(_clipped_background(rng, sigma, sigma, (128, 128))) for _ in range(50)]
    assert all(s.clipped_low for s in clipped)


def test_saturation_below_full_scale_is_found_at_its_pile_up():
    # A converter whose range ends at 3000 (not 2^n - 1): bright spots pile up there (0.5 % of the
    # pixels); the level found is 3000. Float data cut at 1000.0 likewise.
    rng = np.random.default_rng(23)
    frame = rng.normal(100, 5, (200, 200))
    frame.flat[rng.choice(frame.size, 200, replace=False)] = 1e6
    integer = np.clip(np.round(frame), 0, 3000).astype(np.uint16)
    assert saturation_level([summarise_channel(integer)]) == 3000
    floats = np.clip(frame, 0, 1000.0).astype(np.float32)
    assert saturation_level([summarise_channel(floats)]) == 1000.0
