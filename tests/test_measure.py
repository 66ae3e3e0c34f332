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


def test_misregistered_channel_is_refused_without_registration(scenario):
    # A 2-pixel shift of one channel relative to the primary (common practice: above ~0.5 px
    # misregistration corrupts the matrix): the measurement refuses, naming the channel and the fix.
    control = make_control(scenario, "Fernlight", 7, shape=(192, 192))
    data = control.data.copy()
    data[2] = np.roll(data[2], 2, axis=1)
    shifted = Image(data, "CYX", control.channel_names, source="shifted.tif")
    with pytest.raises(InputError, match=r"shifted.tif.*orange600.*shifted 2.00 px.*--registration"):
        measure_matrix({"Fernlight": [shifted]}, settings=FAST)


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


# --- detector faults and inconsistent controls (simulations with known truth: tests/fault_scenes.py) -----

def _fault_image(seed, channels=("ch0", "ch1"), **options):
    from fault_scenes import fault_control

    return Image(fault_control(seed, **options), "CYX", channels, source=f"field{seed}.tif")


def _measured(fields, **options):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        matrix = measure_matrix({"A": fields}, settings=FAST, **options)
    return matrix, [str(w.message) for w in caught if issubclass(w.category, InputWarning)]


@pytest.mark.slow
def test_linearity_check_flags_compression_and_spares_linear_detectors():
    # Detector compression x / (1 + x / 3000) with the primary peaking at 800 ADU raises the measured
    # leak of 0.3 by about 12 %. Seeded simulations with known truth, 100 measurements of two fields
    # each: the check flags at least 95 of the compressed controls, and at most 9 of 100 linear ones
    # (bright, dim, and with a small leak): a false-flag rate of at most the 5 % of a 95 % interval
    # (9 of 100 is the binomial upper 97.5 % bound for p = 0.05).
    compressed = linear = 0
    for rep in range(100):
        _, flags = _measured([_fault_image(1000 * rep + f, knee=3000.0) for f in range(2)])
        compressed += any("bright half" in m for m in flags)
    assert compressed >= 95, compressed
    for options in ({}, {"peak": 200.0}, {"leaks": (0.05,)}):
        linear = 0
        for rep in range(100):
            _, flags = _measured([_fault_image(1000 * rep + f, **options) for f in range(2)])
            linear += any("bright half" in m for m in flags)
        assert linear <= 9, (options, linear)


def test_compressed_control_is_flagged():
    matrix, flags = _measured([_fault_image(f, knee=3000.0) for f in range(2)])
    assert matrix.matrix[1, 0] > 0.32  # the bias the flag warns of (true leak 0.3)
    assert any("A in ch1: slope over the bright half is 1.1" in m for m in flags), flags
    assert matrix.qc["linearity_ratio_low"][1][0] > 1.05


def test_clipped_offset_is_flagged_and_the_coefficient_corrected():
    # The offset set so that the background (8 ADU above it) is cut at 0: about 40 % of the leak
    # channel's pixels read 0. Measured on all pixels the leak of 0.1 came out about 5 % low; measured
    # only where the leak stands 3 noise SDs above the clip, its interval covers the truth.
    fields = [_fault_image(f, leaks=(0.1,), offset=-8.0) for f in range(2)]
    matrix, flags = _measured(fields)
    assert any("ch1:" in m and "sit at 0, the bottom of the range" in m for m in flags), flags
    assert any("A in ch1: the offset clips ch1" in m for m in flags), flags
    assert matrix.ci95_low[1, 0] <= 0.1 <= matrix.ci95_high[1, 0]


def test_clipped_offset_that_leaves_too_little_is_refused():
    # A leak of 0.03 in a channel clipped as above never stands clear of the clip: refused, naming it.
    fields = [_fault_image(f, leaks=(0.03,), offset=-8.0) for f in range(2)]
    with pytest.raises(InputError, match=r"field0.tif.*clips channel ch1 at 0.*raise the detector offset"):
        _measured(fields)
    # Half of the background cut off: its level cannot be measured at all.
    with pytest.raises(InputError, match=r"field0.tif: 5\d % of channel ch0 sits at 0"):
        _measured([_fault_image(f, offset=-15.0) for f in range(2)])


def test_correlated_noise_is_flagged_and_measured_on_a_coarser_grid():
    # Noise smoothed between neighbours (Gaussian sigma 0.7 px: what denoising or deconvolution leave)
    # breaks the neighbour-mean instrument: on such dim controls it measured a leak of 0.3 about 2-11 %
    # low with intervals that missed it. Flagged, and measured from pixels 2 apart, the interval covers it.
    fields = [_fault_image(f, peak=300.0, correlated_sigma=0.7) for f in range(2)]
    matrix, flags = _measured(fields)
    assert any("noise correlated between neighbouring pixels" in m and "pixels 2 apart" in m for m in flags), flags
    assert matrix.ci95_low[1, 0] <= 0.3 <= matrix.ci95_high[1, 0]
    clean, clean_flags = _measured([_fault_image(f, peak=300.0) for f in range(2)])
    assert not any("correlated" in m for m in clean_flags)


def test_noise_correlation_is_measured_on_background_only():
    # Reference values: white noise gives about 0; noise smoothed by a Gaussian of sigma 0.7 px has a lag-1
    # correlation of exp(-1 / (4 x 0.49)) = 0.60 in theory (0.55 after the discrete high-pass here).
    from fault_scenes import fault_control

    from unmix.measure.levels import summarise_channel
    from unmix.measure.noise import neighbour_correlation

    for sigma, low, high in ((None, -0.05, 0.05), (0.7, 0.45, 0.65)):
        plane = fault_control(3, correlated_sigma=sigma)[0]
        summary = summarise_channel(plane)
        assert low < neighbour_correlation(plane, summary.background, summary.noise) < high


def test_swapped_controls_are_named():
    # The controls of A and B given the other way round, with their primary channels given: each control
    # is brightest in the other label's primary channel, and both are named.
    a = _fault_image(1, channels=("ch0", "ch1"), leaks=(0.2,))
    b = Image(a.data[::-1].copy(), "CYX", ("ch0", "ch1"), source="b.tif")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        measure_matrix({"A": [b], "B": [a]}, primary={"A": "ch0", "B": "ch1"}, settings=FAST)
    messages = [str(w.message) for w in caught]
    assert any(m.startswith("A: its control (b.tif) is brightest in ch1, the primary channel of B: this looks "
                            "like the control of B") for m in messages), messages
    assert any("B: its control (field1.tif)" in m and "looks like the control of A" for m in messages), messages


def test_two_labels_brightest_in_one_channel_are_named():
    a = _fault_image(1, leaks=(0.2,))
    same = _fault_image(2, leaks=(0.3,))
    _, flags = (lambda m: (m, m.qc["flags"]))(measure_matrix({"A": [a], "B": [same]}, settings=FAST))
    assert any(m.startswith("A and B: both controls are brightest in ch0") for m in flags), flags


def test_disagreeing_field_is_named():
    # Three fields of leak 0.3 and one of 0.36 (another specimen, say): the odd field is named.
    fields = [_fault_image(f) for f in range(3)] + [_fault_image(7, leaks=(0.36,))]
    _, flags = _measured(fields)
    odd = [m for m in flags if "beyond the fields' own intervals" in m]
    assert len(odd) == 1 and "field field7.tif gives 0.35" in odd[0], flags


def test_disagreeing_fields_rule_is_calibrated():
    # Homogeneous fields (estimates drawn from their own normal sampling distributions, unequal
    # variances): a field is named in about alpha = 5 % of 2,000 seeded measurements of 3 fields x 2
    # coefficients (Bonferroni keeps the family-wise rate at or below alpha; binomial SD 0.5 %).
    from unmix.measure.controls import _disagreeing_fields

    rng = np.random.default_rng(31)
    named = 0
    for _ in range(2000):
        variances = rng.uniform(0.5, 2.0, (3, 2)) * 1e-4
        named += bool(_disagreeing_fields(0.3 + rng.normal(0, np.sqrt(variances)), variances))
    assert 0.03 <= named / 2000 <= 0.055, named


def test_axial_shift_in_z_stack_controls_is_refused():
    # A z-stack control whose leak channel sits one plane deeper (axial chromatic shift).
    from fault_scenes import fault_control

    stack = fault_control(4, shape=(16, 128, 128), shift=(1.0, 0.0, 0.0), density=1 / 3000)
    image = Image(stack, "CZYX", ("ch0", "ch1"), source="stack.tif")
    with pytest.raises(InputError, match=r"stack.tif.*shifted 1.0\d planes axially"):
        measure_matrix({"A": [image]}, settings=FAST)


def test_controls_settings_are_stored_and_differences_between_controls_warned(tmp_path):
    # Settings written by tifffile's OME writer (the reference writer): the matrix file keeps the first
    # control's, and a control imaged with another exposure is warned of, naming the setting and both values.
    import tifffile

    from fault_scenes import fault_control

    paths = []
    for seed, exposure in ((1, 0.1), (2, 0.1), (3, 0.3)):
        path = tmp_path / f"c{seed}.ome.tif"
        tifffile.imwrite(path, fault_control(seed), ome=True, metadata={
            "axes": "CYX", "Channel": {"Name": ["ch0", "ch1"]}, "Plane": {"ExposureTime": [exposure, exposure]}})
        paths.append(str(path))
    with pytest.warns(InputWarning, match=r"c3.ome.tif: acquisition settings differ between controls \(B\): "
                                          r"channel ch0 exposure_s is 0.3 in c3.ome.tif but 0.1 in c1.ome.tif"):
        matrix = measure_files({"A": paths[:2], "B": paths[2:]}, primary={"B": "ch1"}, settings=FAST)
    acquisition = matrix.provenance["acquisition"]
    assert acquisition["channels"]["ch1"]["exposure_s"] == 0.1 and acquisition["source"] == "c1.ome.tif"


# --- autofluorescence as a label ------------------------------------------------------------------------

_AF_CHANNELS = ("c0", "c1", "c2", "c3")
_COLUMNS = {"A": [1.0, 0.3, 0.05, 0.0], "B": [0.02, 0.1, 1.0, 0.25]}
_SIGNATURE = np.array([0.7, 1.0, 0.8, 0.4])  # cellular autofluorescence, 1 in its brightest channel


def _af_scene(seed):
    """Controls of A and B, an unstained specimen whose cells autofluoresce, over a uniform medium level
    (simulation with known truth, tests/fault_scenes.py)."""
    from fault_scenes import cells, mixed_field, spots

    rng = np.random.default_rng(seed)
    controls = {label: [Image(mixed_field(rng, np.array(column)[:, None], [spots(rng, (256, 256)) * 800]), "CYX",
                              _AF_CHANNELS, source=f"{label}{f}.tif") for f in range(2)]
                for label, column in _COLUMNS.items()}
    mask, autofluorescence = cells(rng, (256, 256))
    unstained = Image(mixed_field(rng, _SIGNATURE[:, None], [autofluorescence * 300]), "CYX", _AF_CHANNELS,
                      source="unstained.tif")
    return controls, unstained, rng


def test_autofluorescence_signature_is_recovered_within_its_interval():
    controls, unstained, _ = _af_scene(5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        matrix = measure_matrix(controls, unstained=unstained, autofluorescence="Cellglow", settings=FAST)
    assert matrix.labels == ("A", "B", "Cellglow") and matrix.primary["Cellglow"] == "c1"
    k = matrix.labels.index("Cellglow")
    assert np.all((matrix.ci95_low[:, k] <= _SIGNATURE) & (_SIGNATURE <= matrix.ci95_high[:, k]))
    # The background is the level between the cells (offset 100 ADU + 20 electrons x 2 ADU of medium).
    np.testing.assert_allclose(matrix.background, 140.0, atol=1.0)
    assert matrix.qc["labels"]["Cellglow"]["role"] == "autofluorescence"


def test_unmixing_with_the_autofluorescence_label_removes_it():
    # A sample of A, B and cellular autofluorescence. With the background rule alone (the unstained
    # median) the cells' autofluorescence is unmixed into A and B; with the autofluorescence label, A's
    # abundance in the cells is unbiased and the least-squares misfit is at the level of the pixel noise
    # (simulation with known truth; the misfit's expected mean square for pure noise is the noise variance
    # x (C - K) / C, numpy.linalg.lstsq as the reference solver).
    from fault_scenes import cells, mixed_field, spots

    controls, unstained, rng = _af_scene(6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        with_label = measure_matrix(controls, unstained=unstained, autofluorescence="Cellglow", settings=FAST)
        background_only = measure_matrix(controls, unstained=unstained, settings=FAST)
    mask, autofluorescence = cells(rng, (256, 256))
    maps = np.stack([spots(rng, (256, 256)) * 600, spots(rng, (256, 256)) * 600, autofluorescence * 300])
    truth = np.column_stack([_COLUMNS["A"], _COLUMNS["B"], _SIGNATURE])
    sample = mixed_field(rng, truth, maps).astype(float)
    inside = mask & (maps[0] < 1)  # cell pixels without A: A's abundance should be 0 there

    def unmixed(matrix):
        signal = (sample - matrix.background[:, None, None]).reshape(4, -1)
        abundances, *_ = np.linalg.lstsq(matrix.matrix, signal, rcond=None)
        misfit = signal - matrix.matrix @ abundances
        return abundances.reshape((-1,) + sample.shape[1:]), misfit.reshape(sample.shape)

    a_label, misfit = unmixed(with_label)
    a_background, _ = unmixed(background_only)
    noise_sd = np.sqrt(2.0 * (sample[:, inside] - 100).mean() + (2.0 * 3.0) ** 2)  # Poisson + read, ADU
    assert abs(a_label[0][inside].mean()) < 3.0   # ADU; the cells' autofluorescence peaks at about 210 in c0
    assert a_background[0][inside].mean() > 20.0  # the autofluorescence unmixed into A
    rms = np.sqrt(np.mean(misfit[:, inside] ** 2))
    assert rms == pytest.approx(noise_sd * np.sqrt(1 / 4), rel=0.25)


def test_autofluorescence_needs_a_spare_channel():
    controls, unstained, _ = _af_scene(7)
    controls["C"] = controls["A"]
    with pytest.raises(InputError, match=r"--autofluorescence Cellglow: 4 channels cannot separate 4 labels plus "
                                         r"autofluorescence \(needs at least 5 channels\)"):
        measure_matrix({**controls, "D": controls["B"]}, unstained=unstained, autofluorescence="Cellglow")
    with pytest.raises(InputError, match="--autofluorescence Cellglow: needs --unstained"):
        measure_matrix(controls, autofluorescence="Cellglow")


def test_a_bad_control_ends_measure_without_hashing_every_input(tmp_path, monkeypatch):
    # The inputs' checksums are computed beside the measurement; a control that cannot be read
    # must end the run at once, not after the whole of a large input has been hashed (here an
    # 8 GiB sparse file). Counted in bytes hashed, not in time.
    import hashlib
    import types

    from unmix.io import provenance

    hashed = []

    class Counting:
        def __init__(self):
            self.digest = hashlib.sha256()

        def update(self, chunk):
            hashed.append(len(chunk))
            self.digest.update(chunk)

        def hexdigest(self):
            return self.digest.hexdigest()

    monkeypatch.setattr(provenance, "hashlib", types.SimpleNamespace(sha256=Counting))
    bad = tmp_path / "alpha.tif"
    bad.write_bytes(b"not an image at all" * 100)
    big = tmp_path / "beta.tif"
    with open(big, "wb") as handle:
        handle.truncate(8 << 30)
    with pytest.raises(InputError, match="alpha.tif"):
        measure_files({"alpha": [bad], "beta": [big]})
    assert sum(hashed) < (8 << 30) // 2
