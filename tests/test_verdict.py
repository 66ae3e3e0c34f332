"""Before/after colocalization and verdicts: the contract's rules, noise theory, the demo."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from unmix.cli import main
from unmix.coloc.statistics import Coefficients, pearson
from unmix.engine.solver import Unmixer
from unmix.coloc.verdict import VERDICTS, analyse_pair, decide, noise_model


def _c(r, p):
    return Coefficients(r, None, None, None, None, "given", None, None, None, None, p, 100)


@pytest.mark.parametrize("before, after, bound, expected", [
    (_c(0.6, 0.01), _c(0.02, 0.4), 0.3, "bleed-through-only"),
    (_c(0.7, 0.01), _c(0.3, 0.01), 0.2, "inflated"),
    (_c(0.5, 0.01), _c(0.45, 0.01), 0.2, "persists"),
    (_c(0.05, 0.3), _c(0.4, 0.01), 0.2, "revealed"),
    (_c(0.05, 0.3), _c(0.02, 0.4), 0.2, "none"),
    (_c(-0.5, 1.0), _c(-0.6, 1.0), 0.2, "none"),  # exclusion is no overlap
    (_c(0.08, 0.01), _c(0.09, 0.01), 0.0, "none"),  # significant but below min_r
    (_c(None, None), _c(None, None), None, "none"),  # undefined r
])
def test_verdicts_follow_the_contract(before, after, bound, expected):
    assert decide(before, after, bound, min_r=0.1, alpha=0.05) == expected
    assert expected in VERDICTS


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


def test_noise_model_recovers_gain_and_read_noise():
    # Photon transfer (common practice): variance = read variance + gain x signal, on a
    # simulated camera image with smooth structure, Poisson shot noise and Gaussian read noise.
    from scipy import ndimage

    rng = np.random.default_rng(1)
    structure = ndimage.gaussian_filter(rng.random((512, 512)), 8)
    electrons = 400 * (structure - structure.min()) / np.ptp(structure)  # down to no signal at all
    gain, read = 2.0, 6.0  # ADU per electron, ADU
    image = gain * rng.poisson(electrons) + rng.normal(0, read, electrons.shape)
    read_variance, fitted_gain = noise_model(image, np.ones(image.shape, bool))
    assert fitted_gain == pytest.approx(gain, rel=0.15)
    # The read variance is an intercept far below the shot noise here; what the simulation
    # uses is the total variance at the signal levels present, which must be right.
    for level in np.percentile(image, [10, 50, 90]):
        assert read_variance + fitted_gain * level == pytest.approx(read**2 + gain * level, rel=0.15)


def test_demo_pairs_get_their_verdicts(demo, demo_matrix_file):
    # The invented demo is built with an independent-but-bleeding pair and a truly overlapping pair.
    from unmix.io.images import read_image
    from unmix.matrix import load_matrix

    matrix = load_matrix(demo_matrix_file)
    raw = np.asarray(read_image(demo["sample"]).select_channels(matrix.channels).data)
    truth = json.loads(demo["truth"].read_text())
    independent = analyse_pair(raw, matrix, tuple(truth["pairs"]["independent_but_bleeding"]), rounds=99)
    assert independent.verdict == "bleed-through-only"
    assert independent.before.pearson > 0.3 and independent.after.pearson < 0.1
    overlapping = analyse_pair(raw, matrix, tuple(truth["pairs"]["truly_overlapping"]), rounds=99)
    assert overlapping.verdict in ("persists", "inflated")
    low, high = overlapping.after_pearson_interval
    assert low <= overlapping.after.pearson <= high


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
                 "--labels", "Cobaltin,Emberin", "--objects", str(tmp_path / "objects.tif"), "--quick-objects",
                 "--rounds", "19", "--csv", str(csv_path)]) == 0
    rows = csv_path.read_text().splitlines()
    assert len(rows) == 1 + 2 * 3
    tiny = [row for row in rows[1:] if row.split(",")[3] == "3"]
    assert tiny and all("pixels" in row and ",none," in row for row in tiny)
    assert "nan" not in capsys.readouterr().out.lower()


def test_constant_channel_is_reported_as_undefined(demo_matrix_file, tmp_path, capsys):
    data = np.full((3, 64, 64), 150, np.uint16)
    data[0] = np.random.default_rng(2).integers(100, 400, (64, 64))
    path = tmp_path / "flat.ome.tif"
    tifffile.imwrite(path, data, ome=True, metadata={"axes": "CYX",
                                                     "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    assert main(["coloc", str(path), "--matrix", str(demo_matrix_file), "--labels", "Cobaltin,Fernlight",
                 "--rounds", "19", "--json", str(tmp_path / "o.json")]) == 0
    out = capsys.readouterr().out
    assert "undefined" in out and "nan" not in out.lower() and "constant" in out
    result = json.loads((tmp_path / "o.json").read_text())
    assert result["before"]["pearson"] is None and result["verdict"] == "none"


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


def test_flat_field_is_recorded_and_removes_illumination_correlation():
    # Uneven illumination alone makes two independent channels correlate (common practice);
    # dividing by the flats removes it, and the result says that it was applied.
    from unmix.matrix import BleedThroughMatrix

    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[0:96, 0:96]
    illumination = 1.0 - 0.6 * ((yy - 48) ** 2 + (xx - 48) ** 2) / (2 * 48**2)
    independent = rng.gamma(16.0, 100.0, (2, 96, 96))
    raw = (100 + independent * illumination).astype(np.float32)
    matrix = BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("A", "B"), primary={"A": "a", "B": "b"},
                                matrix=np.eye(2), ci95_low=np.eye(2), ci95_high=np.eye(2),
                                background=np.full(2, 100.0), background_source="dark")
    plain = analyse_pair(raw, matrix, ("A", "B"), rounds=19, simulations=0, matrix_draws=0)
    flats = np.stack([illumination, illumination])
    corrected = analyse_pair(raw, matrix, ("A", "B"), rounds=19, simulations=0, matrix_draws=0, flat=flats)
    assert plain.flat_field == "none" and corrected.flat_field == "flat images"
    assert plain.before.pearson > 0.1 and abs(corrected.before.pearson) < 0.05
