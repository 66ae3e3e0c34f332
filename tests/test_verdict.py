"""Before/after colocalization and verdicts: the rule, the noise theory behind the corrected r, seeded
cases with known truth (one expected verdict each), calibration of the error rates, and the command."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from pair_scenes import measured_matrix, pair_scene
from scipy import stats

from unmix.cli import main
from unmix.coloc.corrected import corrected_correlation, unmixing_rows
from unmix.coloc.statistics import Coefficients, pearson
from unmix.coloc.verdict import VERDICTS, analyse_pair, decide
from unmix.engine.solver import Unmixer

SIZE = (192, 192)


def _c(r, p):
    return Coefficients(r, None, None, None, None, "given", None, None, None, None, p, 100)


def _corrected(r, interval):
    from unmix.coloc.corrected import CorrectedCorrelation

    return CorrectedCorrelation(r, r, r, interval, 0.0, 0.0, 0.0, 0.0, (0.1, 0.1), 1000)


@pytest.mark.parametrize("before, after, corrected, expected", [
    (_c(0.6, 0.001), _c(0.02, 0.4), _corrected(0.01, (-0.03, 0.05)), "bleed-through-only"),
    (_c(0.7, 0.001), _c(0.3, 0.001), _corrected(0.3, (0.25, 0.35)), "inflated"),
    (_c(0.32, 0.001), _c(0.3, 0.001), _corrected(0.3, (0.25, 0.35)), "persists"),
    (_c(0.2, 0.001), _c(0.25, 0.001), _corrected(0.3, (0.25, 0.35)), "persists"),  # noise attenuates before
    (_c(0.05, 0.3), _c(0.4, 0.001), _corrected(0.4, (0.35, 0.45)), "revealed"),
    (_c(0.05, 0.3), _c(0.02, 0.4), _corrected(0.02, (-0.02, 0.06)), "none"),
    (_c(-0.5, 1.0), _c(-0.6, 1.0), _corrected(-0.6, (-0.65, -0.55)), "none"),  # exclusion is no overlap
    (_c(0.6, 0.001), _c(0.12, 0.01), _corrected(0.12, (0.05, 0.19)), "inconclusive"),  # interval crosses min_r
    (_c(0.6, 0.001), _c(0.3, 0.3), _corrected(0.3, (0.2, 0.4)), "inconclusive"),  # above min_r, not significant
    (_c(0.6, 0.001), _c(0.3, 0.045), _corrected(0.3, (0.2, 0.4)), "inconclusive"),  # p's MC interval holds alpha
    (_c(0.6, 0.001), _c(None, None), _corrected(None, None), "inconclusive"),  # no variance above noise
    (_c(0.6, 0.001), _c(0.3, 0.001), _corrected(0.3, None), "inconclusive"),  # too few pixels for an interval
])
def test_verdicts_follow_the_rule(before, after, corrected, expected):
    p = after.p_value
    bounds = None if p is None else (p, p) if p != 0.045 else (0.03, 0.07)
    verdict, reason = decide(before, after, corrected, min_r=0.1, alpha=0.05, p_bounds=bounds)
    assert verdict == expected and reason
    assert expected in VERDICTS


def test_least_squares_noise_covariance_matches_the_closed_form():
    # Lawson & Hanson (1974): unconstrained least squares u = P y with P = (M^T M)^-1 M^T turns channel
    # noise of covariance Sigma into (M^T M)^-1 M^T Sigma M (M^T M)^-1; three channels, two labels,
    # unequal channel noise, checked against the simulated covariance of 400,000 unmixed pixels.
    matrix = np.array([[1.0, 0.25], [0.4, 1.0], [0.15, 0.6]])
    variances = np.array([4.0, 9.0, 2.5])
    rng = np.random.default_rng(0)
    noise = rng.normal(0, np.sqrt(variances)[:, None], (3, 400_000))
    rows = unmixing_rows(matrix)
    simulated = np.cov(rows @ noise)
    gram = np.linalg.inv(matrix.T @ matrix)
    closed = gram @ matrix.T @ np.diag(variances) @ matrix @ gram
    np.testing.assert_allclose(simulated, closed, rtol=0.01, atol=0.002)
    # The corrected r subtracts exactly that: pure noise leaves no variance clearly above the noise, and
    # the plain r of the unmixed noise is the closed form's correlation.
    result = corrected_correlation(noise, np.repeat(variances[:, None], noise.shape[1], axis=1), rows)
    assert result.r is None and result.noise_share == pytest.approx((1.0, 1.0), abs=0.01)
    assert result.plain_r == pytest.approx(closed[0, 1] / np.sqrt(closed[0, 0] * closed[1, 1]), abs=0.01)
    assert result.adjusted_r == pytest.approx(0.0, abs=0.01)


def test_unmixed_noise_of_two_labels_is_negatively_correlated():
    # Least-squares theory (Lawson & Hanson 1974): white channel noise unmixed by M has
    # covariance (M^T M)^-1; for M = [[1, .3], [.25, 1]] the correlation is about -0.5.
    matrix = np.array([[1.0, 0.3], [0.25, 1.0]])
    rng = np.random.default_rng(0)
    noise = rng.normal(0, 10, (2, 400, 400)).astype(np.float32)
    unmixed = Unmixer(matrix, method="ls").unmix(noise)
    inverse = np.linalg.inv(matrix.T @ matrix)
    expected = inverse[0, 1] / np.sqrt(inverse[0, 0] * inverse[1, 1])
    assert expected == pytest.approx(-0.511, abs=0.001)
    assert pearson(unmixed[0], unmixed[1]) == pytest.approx(expected, abs=0.01)


def test_spearman_attenuation_formula_with_white_noise():
    # Spearman (1904): with independent white noise on two measures, r_true = r_observed /
    # sqrt(reliability_a x reliability_b), reliability = 1 - noise variance / observed variance. With
    # C = K and the identity matrix the corrected r must be exactly that.
    rng = np.random.default_rng(3)
    shared = rng.normal(size=50_000)
    a = 3.0 * (0.6 * shared + 0.8 * rng.normal(size=shared.size))
    b = 2.0 * (0.6 * shared + 0.8 * rng.normal(size=shared.size))
    noise_var = np.array([4.0, 1.5])
    observed = np.stack([a, b]) + rng.normal(0, np.sqrt(noise_var)[:, None], (2, shared.size))
    result = corrected_correlation(observed, np.repeat(noise_var[:, None], shared.size, axis=1), np.eye(2))
    r_observed = np.corrcoef(observed)[0, 1]
    reliability = 1 - noise_var / observed.var(axis=1)
    assert result.r == pytest.approx(r_observed / np.sqrt(reliability.prod()), rel=1e-9)
    assert result.r == pytest.approx(0.36, abs=0.02)  # the true r: 0.6 x 0.6 by construction
    assert result.plain_r == pytest.approx(r_observed, rel=1e-12)


def test_photon_transfer_line_recovered_from_one_image():
    # Photon transfer (Janesick 2007; single-image fit after Foi et al. 2008): a simulated camera image
    # with blurred structure, Poisson shot noise (gain 2 ADU/e-) and Gaussian read noise (6 ADU).
    from unmix.measure.noise import dark_read_variance, photon_transfer

    rng = np.random.default_rng(1)
    scene = pair_scene(1, peak_a=2000, shape=(256, 256))
    plane = scene.raw[0] - scene.background[0]
    line = photon_transfer([plane])
    assert line.gain == pytest.approx(2.0, rel=0.08)
    dark = rng.normal(0, 6.0, (256, 256))
    assert dark_read_variance(dark) == pytest.approx(36.0, rel=0.05)
    fixed = photon_transfer([plane], read_variance=36.0 + 16.0)  # + background shot noise, 4 e- x 2^2
    assert fixed.gain == pytest.approx(2.0, rel=0.05)


# --- seeded cases with known truth: one expected verdict each ---------------------------------------

def _judge(seed, **scene_options):
    scene = pair_scene(seed, shape=SIZE, **scene_options)
    return scene, analyse_pair(scene.raw, measured_matrix(scene, seed), ("A", "B"), seed=seed)


def test_bright_label_leaking_into_a_dim_independent_one_is_bleed_through_only():
    # A at 3,000 e- leaks 30 % into the channel of an independent B at 300 e- (B/A = 0.1): the raw
    # channels correlate strongly; non-negative unmixing would turn A's shot noise into positive B.
    scene, result = _judge(11, r=0.0, peak_a=3000, ratio=0.1, leak=0.3)
    assert abs(scene.true_r) < 0.1 and result.before.pearson > 0.8
    assert result.verdict == "bleed-through-only"
    low, high = result.after_corrected.interval
    assert low <= scene.true_r <= high


def test_labels_too_dim_to_judge_are_inconclusive_not_overlapping():
    # B/A = 0.02 under a 30 % leak: B's structure is buried in A's shot noise after unmixing.
    scene, result = _judge(12, r=0.0, peak_a=3000, ratio=0.02, leak=0.3)
    assert result.verdict == "inconclusive"
    assert result.after_corrected.interval[1] - result.after_corrected.interval[0] > 0.3


def test_real_overlap_inflated_by_bleed_through_is_inflated():
    # True r 0.3 and a 30 % leak: the raw r is far above the labels' own.
    scene, result = _judge(13, r=0.3, peak_a=1000, ratio=1.0, leak=0.3)
    assert result.before.pearson > 0.5
    assert result.verdict == "inflated"
    low, high = result.after_corrected.interval
    assert low <= scene.true_r <= high and result.inflation > 0.2


def test_real_overlap_without_leak_persists():
    scene, result = _judge(14, r=0.3, peak_a=1000, ratio=1.0, leak=0.0, reverse_leak=0.0)
    assert result.verdict == "persists"


def test_no_leak_at_all_with_an_identity_matrix_is_not_inflated():
    # M equal to the identity exactly: before and after are the same pixels (float32 rounding aside).
    from unmix.matrix import BleedThroughMatrix

    scene = pair_scene(15, r=0.3, peak_a=1000, leak=0.0, reverse_leak=0.0, shape=SIZE)
    measured = measured_matrix(scene, 15)
    identity = BleedThroughMatrix.from_dict({**measured.to_dict(), "matrix": np.eye(2).tolist(),
                                             "ci95_low": np.eye(2).tolist(), "ci95_high": np.eye(2).tolist(),
                                             "column_covariance": np.zeros((2, 2, 2)).tolist()})
    result = analyse_pair(scene.raw.astype(np.float32), identity, ("A", "B"))
    assert result.verdict == "persists"
    assert result.after_corrected.r == pytest.approx(result.before_corrected.r, abs=1e-6)


def test_independent_labels_without_leak_are_none():
    scene, result = _judge(16, r=0.0, peak_a=1000, ratio=1.0, leak=0.0, reverse_leak=0.0)
    assert result.verdict == "none"


def test_exclusion_with_bleed_through_is_bleed_through_only():
    # True r -0.2 (the labels avoid each other); a 30 % leak makes the raw channels correlate positively.
    scene, result = _judge(17, r=-0.2, peak_a=1000, ratio=0.5, leak=0.3)
    assert result.before.pearson > 0.2 and result.after_corrected.r < 0
    assert result.verdict == "bleed-through-only"


def test_exclusion_without_leak_is_none():
    scene, result = _judge(18, r=-0.3, peak_a=1000, ratio=1.0, leak=0.0, reverse_leak=0.0)
    assert result.after_corrected.interval[1] < 0
    assert result.verdict == "none"


# --- calibration: coverage and error rates (binomial ranges) ----------------------------------------

@pytest.mark.slow
def test_corrected_r_interval_covers_the_true_r():
    # 100 seeded fields with true r 0.3, a 30 % leak and a mid signal: a correct 95 % interval covers
    # the field's true r 90 to 99 times (binomial range, common practice).
    covered = 0
    for seed in range(100):
        scene, result = _judge(1000 + seed, r=0.3, peak_a=600, ratio=0.5, leak=0.3)
        low, high = result.after_corrected.interval
        covered += low <= scene.true_r <= high
    assert 90 <= covered <= 99


@pytest.mark.slow
def test_false_overlap_rate_on_independent_pairs_is_at_most_alpha():
    # 240 seeded independent pairs, bright-into-dim included: overlap verdicts (persists, inflated,
    # revealed) at most as often as alpha = 0.05 allows (upper end of the binomial 95 % range,
    # scipy.stats.binom), and the after p-values of the randomisation test are not below uniform
    # (one-sided Kolmogorov-Smirnov, scipy.stats.kstest).
    settings = [dict(peak_a=3000, ratio=0.02, leak=0.3), dict(peak_a=3000, ratio=0.1, leak=0.6),
                dict(peak_a=1000, ratio=1.0, leak=0.3), dict(peak_a=200, ratio=0.5, leak=0.1)]
    false, p_values, n = 0, [], 0
    for i, options in enumerate(settings):
        for seed in range(60):
            scene = pair_scene(2000 + 100 * i + seed, r=0.0, shape=(128, 128), **options)
            result = analyse_pair(scene.raw, measured_matrix(scene, seed), ("A", "B"), seed=seed, rounds=999)
            false += result.verdict in ("persists", "inflated", "revealed")
            p_values.append(result.after.p_value)
            n += 1
    assert false <= stats.binom.ppf(0.975, n, 0.05)
    assert stats.kstest(p_values, "uniform", alternative="greater").pvalue > 0.01


# --- the demo, the command, bad input ------------------------------------------------------------------

def test_demo_pairs_get_their_verdicts(demo, demo_matrix_file):
    # The invented demo is built with an independent-but-bleeding pair and a truly overlapping pair.
    from unmix.io.images import read_image
    from unmix.matrix import load_matrix

    matrix = load_matrix(demo_matrix_file)
    raw = np.asarray(read_image(demo["sample"]).select_channels(matrix.channels).data)
    truth = json.loads(demo["truth"].read_text())
    abundances = read_image(demo["sample"].with_name("sample_truth.ome.tif")).data
    independent = analyse_pair(raw, matrix, tuple(truth["pairs"]["independent_but_bleeding"]))
    assert independent.verdict == "bleed-through-only"
    assert independent.before.pearson > 0.3 and abs(independent.after_corrected.r) < 0.05
    pair = tuple(truth["pairs"]["truly_overlapping"])
    overlapping = analyse_pair(raw, matrix, pair)
    assert overlapping.verdict == "persists"
    ka, kb = (matrix.labels.index(label) for label in pair)
    true_r = np.corrcoef(abundances[ka].ravel(), abundances[kb].ravel())[0, 1]
    low, high = overlapping.after_corrected.interval
    assert low <= true_r <= high


@pytest.fixture(scope="module")
def demo_matrix_file(tmp_path_factory, demo):
    from unmix.measure.controls import MeasureSettings, measure_files

    path = tmp_path_factory.mktemp("matrix") / "m.json"
    measure_files(demo["controls"], unstained=demo["unstained"], settings=MeasureSettings(n_boot=200)).save(path)
    return path


def test_coloc_command_json_csv_and_objects(demo, demo_matrix_file, tmp_path, capsys):
    from unmix.io.images import read_image

    sample = demo["sample"]
    out = tmp_path / "c.json"
    assert main(["coloc", str(sample), "--matrix", str(demo_matrix_file), "--labels", "Fernlight,Emberin",
                 "--rounds", "49", "--json", str(out), "--histograms", str(tmp_path / "h")]) == 0
    result = json.loads(out.read_text())
    assert result["pair"] == ["Fernlight", "Emberin"] and result["verdict"] == "bleed-through-only"
    for side in ("before", "after"):
        assert {"pearson", "spearman", "manders_m1", "manders_m2", "thresholds", "icq", "p_value"} <= set(result[side])
    assert isinstance(result["after"]["pearson_noise_corrected"], float)
    assert result["noise_model"] == "controls" and result["matrix_uncertainty"].startswith("joint")
    assert (tmp_path / "h" / "sample_Fernlight-Emberin.png").stat().st_size > 0
    # Given thresholds and a PSF-sized lower bound on the randomisation shift.
    assert main(["coloc", str(sample), "--matrix", str(demo_matrix_file), "--labels", "Fernlight,Emberin",
                 "--rounds", "19", "--thresholds", "40,60", "--psf", "1.2,520", "--json", str(out)]) == 0
    given = json.loads(out.read_text())
    assert given["before"]["thresholds"] == [40.0, 60.0] and given["after"]["threshold_method"] == "given"
    # Objects: one tiny object is reported with a note, not a crash.
    shape = np.asarray(read_image(sample).data).shape[1:]
    objects = np.zeros(shape, np.uint16)
    objects[:, : shape[1] // 2] = 1
    objects[: shape[0] // 2, shape[1] // 2:] = 2
    objects[-2:, -2:] = 3
    tifffile.imwrite(tmp_path / "objects.tif", objects)
    csv_path = tmp_path / "c.csv"
    capsys.readouterr()
    assert main(["coloc", str(sample), "--matrix", str(demo_matrix_file), "--labels", "Fernlight,Emberin",
                 "--labels", "Pondpetal,Emberin", "--objects", str(tmp_path / "objects.tif"),
                 "--rounds", "19", "--csv", str(csv_path)]) == 0
    rows = csv_path.read_text().splitlines()
    assert len(rows) == 1 + 2 * 3
    tiny = [row for row in rows[1:] if row.split(",")[3] == "3"]
    assert tiny and all("pixels" in row and ",inconclusive," in row for row in tiny)
    assert "nan" not in capsys.readouterr().out.lower()


def test_constant_channel_is_reported_as_undefined(demo_matrix_file, tmp_path, capsys):
    data = np.full((3, 64, 64), 150, np.uint16)
    data[0] = np.random.default_rng(2).integers(100, 400, (64, 64))
    path = tmp_path / "flat.ome.tif"
    tifffile.imwrite(path, data, ome=True, metadata={"axes": "CYX",
                                                     "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    assert main(["coloc", str(path), "--matrix", str(demo_matrix_file), "--labels", "Pondpetal,Fernlight",
                 "--rounds", "19", "--json", str(tmp_path / "o.json")]) == 0
    out = capsys.readouterr().out
    assert "undefined" in out and "nan" not in out.lower() and "constant" in out
    result = json.loads((tmp_path / "o.json").read_text())
    assert result["before"]["pearson"] is None and result["verdict"] == "inconclusive"  # nothing to judge


def _two_channel_files(tmp_path, matrix, image):
    matrix.save(tmp_path / "m.json")
    tifffile.imwrite(tmp_path / "img.ome.tif", image, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": list(matrix.channels)}})
    return tmp_path / "m.json", tmp_path / "img.ome.tif"


def test_warnings_say_what_the_verdict_cannot_rest_on(tmp_path, capsys):
    # A predicted matrix has no measurement uncertainty and no noise model; measured from fewer than
    # three fields, an interval covers sampling error only. Each is one warning line.
    from unmix.matrix import BleedThroughMatrix

    scene = pair_scene(21, r=0.0, peak_a=1000, leak=0.3, shape=(96, 96))
    measured = measured_matrix(scene, 21)
    predicted = BleedThroughMatrix(kind="predicted", channels=measured.channels, labels=measured.labels,
                                   primary=measured.primary, matrix=scene.matrix)
    matrix_path, image_path = _two_channel_files(tmp_path, predicted, scene.raw.astype(np.uint16))
    capsys.readouterr()
    assert main(["coloc", str(image_path), "--matrix", str(matrix_path), "--labels", "A,B", "--rounds", "19",
                 "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "no measurement uncertainty" in err and "no noise model" in err and "estimated from each image" in err
    few = BleedThroughMatrix.from_dict({**measured.to_dict(), "qc": {"labels": {"A": {"fields": 2},
                                                                                 "B": {"fields": 5}}}})
    few.save(matrix_path)
    assert main(["coloc", str(image_path), "--matrix", str(matrix_path), "--labels", "A,B", "--rounds", "19",
                 "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "fewer than 3 control fields" in err and "labels A " in err and "noise model" not in err


def test_a_mask_too_small_for_an_interval_is_reported(tmp_path, capsys):
    scene = pair_scene(22, r=0.3, peak_a=1000, leak=0.3, shape=(96, 96))
    matrix_path, image_path = _two_channel_files(tmp_path, measured_matrix(scene, 22), scene.raw.astype(np.uint16))
    mask = np.zeros((96, 96), np.uint8)
    mask[40:48, 40:48] = 1  # 64 pixels
    tifffile.imwrite(tmp_path / "mask.tif", mask)
    assert main(["coloc", str(image_path), "--matrix", str(matrix_path), "--labels", "A,B", "--mask",
                 str(tmp_path / "mask.tif"), "--rounds", "19", "--json", str(tmp_path / "o.json")]) == 0
    result = json.loads((tmp_path / "o.json").read_text())
    assert result["verdict"] == "inconclusive" and "too few for an interval" in result["after"]["note"]


def test_label_names_cannot_escape_the_histogram_folder(tmp_path, capsys):
    # A label name from a user's matrix file becomes part of a file name only after sanitising.
    from unmix.io.atomic import safe_file_name
    from unmix.matrix import BleedThroughMatrix

    assert safe_file_name("../../etc/passwd") == "_.._etc_passwd"
    assert safe_file_name("A/B\\C<D>") == "A_B_C_D_" and safe_file_name("...") == "_"
    evil = "../../outside"
    values = np.array([[1.0, 0.1], [0.3, 1.0]])
    BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=(evil, "B"), primary={evil: "a", "B": "b"},
                       matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01, background=np.zeros(2),
                       background_source="dark").save(tmp_path / "m.json")
    rng = np.random.default_rng(0)
    image = rng.integers(0, 100, (2, 48, 48)).astype(np.uint16)
    tifffile.imwrite(tmp_path / "img.ome.tif", image, ome=True, metadata={"axes": "CYX", "Channel": {"Name": ["a", "b"]}})
    folder = tmp_path / "deep" / "plots"
    assert main(["coloc", str(tmp_path / "img.ome.tif"), "--matrix", str(tmp_path / "m.json"), "--labels",
                 f"{evil},B", "--rounds", "19", "--histograms", str(folder), "--quiet"]) == 0
    written = [p for p in tmp_path.rglob("*.png")]
    assert written and all(p.parent == folder for p in written)


def _illuminated_fields(seed, count, shape=(96, 96)):
    """Independent gamma-distributed labels under one uneven illumination, per channel different."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    centre = np.array(shape) / 2
    illumination = np.stack([1.0 - 0.6 * ((yy - centre[0]) ** 2 + (xx - centre[1]) ** 2) / (2 * centre[0] ** 2),
                             1.0 - 0.5 * ((yy - centre[0] + 10) ** 2 + (xx - centre[1]) ** 2) / (2 * centre[0] ** 2)])
    fields = [(100 + rng.gamma(16.0, 100.0, (2,) + shape) * illumination).astype(np.float32) for _ in range(count)]
    return fields, illumination


def _identity_matrix():
    from unmix.matrix import BleedThroughMatrix

    return BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("A", "B"), primary={"A": "a", "B": "b"},
                              matrix=np.eye(2), ci95_low=np.eye(2), ci95_high=np.eye(2),
                              background=np.full(2, 100.0), background_source="dark",
                              noise_model={"read_variance": [1.0, 1.0], "gain": [1.0, 1.0], "source": "controls"})


def test_flat_fields_applied_before_unmixing_remove_illumination_correlation():
    # Uneven illumination alone makes two independent channels correlate (common practice); dividing
    # each channel by its own flat removes it, and the result says that it was applied.
    fields, illumination = _illuminated_fields(4, 1)
    matrix = _identity_matrix()
    plain = analyse_pair(fields[0], matrix, ("A", "B"), rounds=19, matrix_draws=0)
    corrected = analyse_pair(fields[0], matrix, ("A", "B"), rounds=19, matrix_draws=0, flat=illumination)
    assert plain.flat_field == "none" and corrected.flat_field == "flat images, applied before unmixing"
    assert plain.before.pearson > 0.1 and abs(corrected.before.pearson) < 0.05


def test_illumination_estimated_per_channel_creates_no_ratio_correlation():
    # Dividing two channels by one common estimate (e.g. a blur of their sum) correlates their ratios
    # (Pearson 1897); a per-channel estimate from several fields of the batch must not. Independent
    # labels stay at r ~ 0 after correction (the field's own r of the true labels, scipy pearsonr).
    from unmix.coloc.illumination import illumination_estimate

    fields, illumination = _illuminated_fields(5, 8)
    flats = illumination_estimate(fields, [100.0, 100.0])
    inner = (slice(None), slice(12, -12), slice(12, -12))  # two smoothing widths from the edges
    np.testing.assert_allclose(flats[inner], (illumination / illumination.mean(axis=(1, 2), keepdims=True))[inner],
                               rtol=0.08)
    result = analyse_pair(fields[0], _identity_matrix(), ("A", "B"), rounds=19, matrix_draws=0, flat=flats)
    assert abs(result.before.pearson) < 0.05
    with pytest.raises(ValueError, match="at least 3"):
        illumination_estimate(fields[:2])


def test_many_objects_each_in_its_own_box(tmp_path):
    # 144 small objects (4 x 4 pixels each, on a 12 x 12 grid): each is measured inside its box widened
    # by a margin, never as a full-size mask; every object gets its row.
    scene = pair_scene(23, r=0.3, peak_a=1000, leak=0.3, shape=(192, 192))
    matrix_path, image_path = _two_channel_files(tmp_path, measured_matrix(scene, 23), scene.raw.astype(np.uint16))
    objects = np.zeros((192, 192), np.uint32)
    for i in range(12):
        for j in range(12):
            objects[8 + 15 * i: 12 + 15 * i, 8 + 15 * j: 12 + 15 * j] = 1 + 12 * i + j
    tifffile.imwrite(tmp_path / "objects.tif", objects)
    assert main(["coloc", str(image_path), "--matrix", str(matrix_path), "--labels", "A,B", "--objects",
                 str(tmp_path / "objects.tif"), "--rounds", "19", "--csv", str(tmp_path / "o.csv"), "--quiet"]) == 0
    rows = (tmp_path / "o.csv").read_text().splitlines()[1:]
    assert sorted(int(row.split(",")[3]) for row in rows) == list(range(1, 145))
    assert all(",16," in row for row in rows)  # before_n_pixels of each 4 x 4 object


def test_figure_names_are_unique_per_input(tmp_path, capsys):
    # sample.v1 and sample.v2, or two files of one name in different folders, must not share a figure.
    scene = pair_scene(24, r=0.0, peak_a=800, leak=0.3, shape=(64, 64))
    matrix_path, image_path = _two_channel_files(tmp_path, measured_matrix(scene, 24), scene.raw.astype(np.uint16))
    (tmp_path / "other").mkdir()
    copies = [tmp_path / "sample.v1.ome.tif", tmp_path / "sample.v2.ome.tif", tmp_path / "other" / "img.ome.tif"]
    for copy in copies:
        copy.write_bytes(image_path.read_bytes())
    folder = tmp_path / "figures"
    assert main(["coloc", str(image_path), *map(str, copies), "--matrix", str(matrix_path), "--labels", "A,B",
                 "--rounds", "19", "--histograms", str(folder), "--quiet"]) == 0
    names = sorted(p.name for p in folder.iterdir())
    assert len(names) == 4 and names[2:] == ["sample.v1_A-B.png", "sample.v2_A-B.png"]
    assert sum(name.startswith("img_") for name in names) == 2  # the two img.ome.tif, told apart
    (tmp_path / "afile").write_text("x")
    assert main(["coloc", str(image_path), "--matrix", str(matrix_path), "--labels", "A,B", "--rounds", "19",
                 "--histograms", str(tmp_path / "afile")]) == 2
    assert "is a file" in capsys.readouterr().err


def test_autofluorescence_label_is_a_nuisance_judged_only_when_asked():
    # A matrix whose second label is the cells' autofluorescence (as measure --autofluorescence writes it): it
    # is left out of default pairs, and a pair that names it is still judged (independent labels, leak 0.3:
    # the simulation's known truth is bleed-through only).
    from dataclasses import replace

    from unmix.coloc.verdict import analyse_pair, nuisance_labels

    scene = pair_scene(3)
    matrix = measured_matrix(scene, 3)
    matrix = replace(matrix, qc={"labels": {"A": {"fields": 3}, "B": {"fields": 3, "role": "autofluorescence"}}})
    assert nuisance_labels(matrix) == ("B",)
    assert analyse_pair(scene.raw, matrix, ("A", "B"), rounds=199).verdict == "bleed-through-only"
