"""Measuring the bleed-through matrix: accuracy, intervals and refusals."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.ndimage import gaussian_filter

from conftest import make_control
from unmix.errors import InputError, InputWarning
from unmix.io.images import Image
from unmix.measure.controls import MeasureSettings, measure_files, measure_matrix

FAST = MeasureSettings(n_boot=300)


def _structures(rng, shape=(160, 160)):
    spots = np.zeros(shape)
    spots[rng.integers(0, shape[0], 120), rng.integers(0, shape[1], 120)] = rng.uniform(0.5, 1.5, 120)
    blobs = gaussian_filter(spots, 2.0)
    return blobs / blobs.max()


def test_slope_agrees_with_ols_and_theil_sen_when_primary_is_noise_free():
    # With a noise-free primary, ordinary least squares (numpy.polyfit) and
    # Theil-Sen (scipy.stats.theilslopes; Theil 1950, Sen 1968) are unbiased,
    # so all three estimators must agree.
    rng = np.random.default_rng(11)
    truth = _structures(rng) * 1500
    primary = 100 + truth + rng.normal(0, 0.05, truth.shape)
    leak = 100 + 7.0 + 0.1 * truth + rng.normal(0, 5.0, truth.shape)
    image = Image(np.stack([primary, leak]).astype(np.float32), "CYX", ("p", "l"))
    matrix = measure_matrix({"A": [image]}, dark=Image(np.full((2, 8, 8), 100, np.float32), "CYX", ("p", "l")),
                            settings=FAST)
    ours = matrix.matrix[1, 0]
    selected = truth > 60
    ols = np.polyfit(primary[selected] - 100, leak[selected] - 100, 1)[0]
    sub = rng.choice(np.flatnonzero(selected), 3000, replace=False)
    theil = stats.theilslopes(leak.ravel()[sub], primary.ravel()[sub])[0]
    assert ours == pytest.approx(ols, rel=0.02)
    assert ours == pytest.approx(theil, rel=0.03)
    assert ours == pytest.approx(0.1, rel=0.02)
    assert matrix.qc["intercept"][1][0] == pytest.approx(7.0, abs=1.0)  # the free intercept is recovered


def test_demo_ground_truth_inside_reported_intervals(demo):
    # Self-consistency on the invented demo: every true coefficient lies in its 95 % interval.
    matrix = measure_files(demo["controls"], unstained=demo["unstained"])
    truth = json.loads(demo["truth"].read_text())
    true = np.asarray(truth["matrix"])
    assert list(matrix.labels) == truth["labels"] and list(matrix.channels) == truth["channels"]
    assert matrix.primary == truth["primary"]
    assert np.all((matrix.ci95_low <= true) & (true <= matrix.ci95_high))
    assert matrix.background_source == "unstained"
    provenance = matrix.provenance
    assert {entry["role"] for entry in provenance["inputs"]} == {"control", "unstained"}
    assert all(len(entry["sha256"]) == 64 for entry in provenance["inputs"])


def _naive_slope(image: Image, primary: int, channel: int, background: float = 100.0) -> float:
    """Threshold the noisy primary itself and fit OLS: the biased estimator."""
    x = image.data[primary].astype(float) - background
    y = image.data[channel].astype(float) - background
    keep = x > 3 * 6.5
    return np.polyfit(x[keep], y[keep], 1)[0]


@pytest.mark.slow
def test_interval_coverage_on_dim_controls(scenario):
    # A correct 95 % interval covers the truth in 90 to 99 of 100 repetitions
    # (binomial range, n = 100, p = 0.95). Dim controls: the naive estimator
    # (threshold and fit on the noisy primary) is biased low there.
    settings = MeasureSettings(n_boot=400, block_size=16, seed=1)
    label, channel = "Pondpetal", 1
    true = scenario.true_matrix()[channel, scenario.labels.index(label)]
    covered, ours, naive = 0, [], []
    dark = Image(np.full((3, 8, 8), 100, np.uint16), "CYX", tuple(scenario.channels))
    for rep in range(100):
        fields = [make_control(scenario, label, seed=1000 * rep + f, brightness_scale=0.08,
                               autofluorescence=False) for f in range(2)]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputWarning)
            matrix = measure_matrix({label: fields}, dark=dark, settings=settings)
        lo, hi = matrix.ci95_low[channel, 0], matrix.ci95_high[channel, 0]
        covered += lo <= true <= hi
        ours.append(matrix.matrix[channel, 0])
        naive.append(np.mean([_naive_slope(f, 0, channel) for f in fields]))
    assert 90 <= covered <= 99, covered
    assert np.mean(ours) == pytest.approx(true, rel=0.02)
    assert np.mean(naive) < 0.97 * true  # the bias that the neighbour proxy removes


def test_dark_frame_background_recorded(demo, scenario):
    matrix = measure_files(demo["controls"], dark=demo["dark"], settings=FAST)
    assert matrix.background_source == "dark"
    # Known camera offset of the simulated dark frame.
    np.testing.assert_allclose(matrix.background, scenario.raw["camera"]["offset_adu"], atol=0.5)


def test_estimated_background_without_references(demo, scenario):
    matrix = measure_files(demo["controls"], settings=FAST)
    assert matrix.background_source == "estimated"
    true = np.asarray(json.loads(demo["truth"].read_text())["matrix"])
    np.testing.assert_allclose(matrix.matrix, true, atol=0.006)


def test_channels_in_another_order_are_matched_by_name(scenario):
    a = make_control(scenario, "Pondpetal", 1)
    b = make_control(scenario, "Fernlight", 2)
    reordered = Image(b.data[::-1].copy(), "CYX", b.channel_names[::-1])
    straight = measure_matrix({"Pondpetal": [a], "Fernlight": [b]}, settings=FAST)
    matched = measure_matrix({"Pondpetal": [a], "Fernlight": [reordered]}, settings=FAST)
    np.testing.assert_allclose(matched.matrix, straight.matrix)


def test_controls_may_differ_in_size(scenario):
    a = make_control(scenario, "Pondpetal", 1, shape=(128, 160))
    b = make_control(scenario, "Pondpetal", 2, shape=(96, 96))
    matrix = measure_matrix({"Pondpetal": [a, b]}, settings=FAST)
    assert matrix.qc["labels"]["Pondpetal"]["fields"] == 2


def test_different_channel_names_refused(scenario):
    a = make_control(scenario, "Pondpetal", 1)
    b = make_control(scenario, "Fernlight", 2)
    renamed = Image(b.data, "CYX", ("x", "y", "z"), source="b.tif")
    with pytest.raises(InputError, match="b.tif.*same channels"):
        measure_matrix({"Pondpetal": [a], "Fernlight": [renamed]}, settings=FAST)


def test_nonfinite_pixels_refused_unless_allowed(scenario):
    control = make_control(scenario, "Pondpetal", 1)
    data = control.data.astype(np.float32)
    data[1, 5:8, 5:8] = np.nan
    data[0, 40, 40] = np.inf
    image = Image(data, "CYX", control.channel_names, source="nan.tif")
    with pytest.raises(InputError, match="nan.tif.*--allow-nonfinite"):
        measure_matrix({"Pondpetal": [image]}, settings=FAST)
    matrix = measure_matrix({"Pondpetal": [image]}, allow_nonfinite=True, settings=FAST)
    assert matrix.qc["labels"]["Pondpetal"]["nonfinite_pixels"] == 10


def _with_saturation(control, fraction, rng):
    data = control.data.copy()
    primary = 0
    signal = np.flatnonzero(data[primary] > 300)
    chosen = rng.choice(signal, int(fraction * signal.size), replace=False)
    data[primary].flat[chosen] = 4095
    return Image(data, "CYX", control.channel_names, source="sat.tif")


def test_saturated_primary_warns_then_refuses(scenario):
    rng = np.random.default_rng(2)
    control = make_control(scenario, "Pondpetal", 3, shape=(160, 160))
    with pytest.warns(InputWarning, match="saturated"):
        measure_matrix({"Pondpetal": [_with_saturation(control, 0.05, rng)]}, settings=FAST)
    with pytest.raises(InputError, match="sat.tif.*saturated"):
        measure_matrix({"Pondpetal": [_with_saturation(control, 0.6, rng)]}, settings=FAST)


def test_saturated_pixels_are_excluded_from_the_fit(scenario):
    rng = np.random.default_rng(3)
    control = make_control(scenario, "Pondpetal", 4, shape=(160, 160))
    clean = measure_matrix({"Pondpetal": [control]}, settings=FAST)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        dirty = measure_matrix({"Pondpetal": [_with_saturation(control, 0.1, rng)]}, settings=FAST)
    np.testing.assert_allclose(dirty.matrix, clean.matrix, atol=0.01)
    assert dirty.saturation[0] == 4095


def test_control_without_signal_refused(demo):
    with pytest.raises(InputError, match="dark.ome.tif.*usable pixels"):
        measure_files({"A": [demo["dark"]]}, settings=FAST)


def test_primary_override_that_is_not_brightest_warns(scenario):
    control = make_control(scenario, "Fernlight", 5)
    with pytest.warns(InputWarning, match="not the brightest"):
        matrix = measure_matrix({"Fernlight": [control]}, primary={"Fernlight": "orange600"}, settings=FAST)
    assert matrix.primary == {"Fernlight": "orange600"}
    assert matrix.matrix[2, 0] == 1.0
    true = scenario.true_matrix()[:, scenario.labels.index("Fernlight")]  # green525 / orange600 of the truth
    assert matrix.matrix[1, 0] == pytest.approx(true[1] / true[2], rel=0.03)


def test_file_given_twice_refused(demo):
    path = demo["controls"]["Pondpetal"][0]
    with pytest.raises(InputError, match="given twice"):
        measure_files({"Pondpetal": [path], "Emberin": [path]}, settings=FAST)


def test_bootstrap_is_reproducible(scenario):
    control = make_control(scenario, "Emberin", 6)
    first = measure_matrix({"Emberin": [control]}, settings=FAST)
    second = measure_matrix({"Emberin": [control]}, settings=FAST)
    np.testing.assert_array_equal(first.ci95_low, second.ci95_low)


def test_misregistered_channel_is_flagged(scenario):
    # A 2-pixel shift of one channel relative to the primary (common practice:
    # above ~0.5 px misregistration corrupts the matrix).
    control = make_control(scenario, "Fernlight", 7, shape=(192, 192))
    data = control.data.copy()
    data[2] = np.roll(data[2], 2, axis=1)
    shifted = Image(data, "CYX", control.channel_names)
    with pytest.warns(InputWarning, match="shifted"):
        matrix = measure_matrix({"Fernlight": [shifted]}, settings=FAST)
    assert matrix.qc["registration_shift_px"][2][0] == pytest.approx(2.0, abs=0.3)


def test_random_effects_interval_covers_the_mean_over_fields():
    # Simulation with known truth: k field estimates drawn from N(mu, within variance + tau^2) with
    # unequal within-field variances; the Hartung-Knapp random-effects interval (DerSimonian & Laird
    # 1986; Hartung & Knapp 2001) covers mu in 90-99 % of 1,000 repetitions for k = 3 and k = 6,
    # and the between-field SD estimate is unbiased to within 25 % on average for k = 6.
    from unmix.measure.controls import random_effects

    rng = np.random.default_rng(8)
    for k in (3, 6):
        within = rng.uniform(0.5, 2.0, (1000, k)) * 1e-4
        tau = 0.02
        estimates = 0.3 + rng.normal(0, np.sqrt(within + tau**2))
        covered, taus = 0, []
        for row in range(1000):
            mean, low, high, tau_hat = random_effects(estimates[row][:, None], within[row][:, None])
            covered += low[0] <= 0.3 <= high[0]
            taus.append(tau_hat[0])
        assert 900 <= covered <= 990, (k, covered)
        if k == 6:
            assert np.mean(taus) == pytest.approx(tau, rel=0.25)


@pytest.mark.slow
def test_interval_covers_between_field_variation_with_five_fields():
    # Controls whose leak differs between fields (SD 10 % of 0.3): with 5 fields the 95 % interval of
    # the coefficient covers 0.3 in 90-99 of 100 seeded repetitions (binomial range, common practice).
    from pair_scenes import control_fields

    inside = 0
    for repeat in range(100):
        fields = control_fields(repeat * 100 + 5, 5, leak=0.3, between_sd=0.1)
        matrix = measure_matrix({"A": fields}, settings=MeasureSettings(n_boot=400, seed=repeat))
        inside += matrix.ci95_low[1, 0] <= 0.3 <= matrix.ci95_high[1, 0]
    assert 90 <= inside <= 99
    assert "between-field variation" in matrix.qc["labels"]["A"]["interval_covers"]


def test_fewer_than_three_fields_say_what_the_interval_covers():
    from pair_scenes import control_fields

    matrix = measure_matrix({"A": control_fields(1, 2)}, settings=FAST)
    assert matrix.qc["labels"]["A"]["interval_covers"].startswith("sampling error within the 2 fields only")
    assert matrix.qc["between_field_sd"][1][0] is None


def test_noise_model_from_controls_and_dark_frame(demo, scenario):
    # The demo camera (invented scenario file): gain 2 ADU per electron, read noise 3 electrons, so
    # variance = 36 ADU^2 + 2 x signal above the dark offset.
    camera = scenario.raw["camera"]
    matrix = measure_files(demo["controls"], dark=demo["dark"], settings=FAST)
    noise = matrix.noise_model
    assert noise["source"] == "controls and dark frame"
    expected_read = (camera["gain_adu_per_electron"] * camera["read_noise_electrons"]) ** 2
    np.testing.assert_allclose(noise["read_variance"], expected_read, rtol=0.1)
    # Autofluorescence sits above the dark offset: its shot noise is part of the signal term.
    np.testing.assert_allclose(noise["gain"], camera["gain_adu_per_electron"], rtol=0.1)


def test_column_covariance_matches_the_intervals(demo):
    matrix = measure_files(demo["controls"], unstained=demo["unstained"], settings=FAST)
    for k, label in enumerate(matrix.labels):
        covariance = matrix.column_covariance[k]
        p = matrix.channels.index(matrix.primary[label])
        assert np.allclose(covariance, covariance.T) and np.linalg.eigvalsh(covariance).min() > -1e-15
        assert not covariance[p].any() and not covariance[:, p].any()
        sd = (matrix.ci95_high[:, k] - matrix.ci95_low[:, k]) / (2 * 1.959963984540054)
        np.testing.assert_allclose(np.sqrt(np.diag(covariance)), sd, rtol=1e-9)
