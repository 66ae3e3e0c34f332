"""Noise-weighted unmixing, per-pixel standard errors and spillover spreading, against outside references
and simulations with known truth."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.optimize import nnls

from unmix.engine.solver import Unmixer
from unmix.measure.spreading import label_noise, spreading_matrix
from unmix.engine.uncertainty import estimator_rows, standard_errors
from unmix.engine.weighting import unmix_weighted

# An invented 6-channel, 3-label set-up: bleed-through coefficients, and per channel a read
# variance and a gain (variance = read + gain x signal) like a camera's photon-transfer line.
MATRIX = np.array([[1.0, 0.18, 0.02], [0.35, 1.0, 0.10], [0.10, 0.45, 1.0], [0.02, 0.20, 0.55],
                   [0.30, 0.05, 0.0], [0.0, 0.15, 0.30]])
NOISE = {"read_variance": np.array([25.0, 30.0, 20.0, 40.0, 15.0, 60.0]),
         "gain": np.array([1.5, 2.0, 1.2, 3.0, 0.8, 2.5])}
PRIMARY = [0, 1, 2]


def _camera(rng, signal):
    """Photon-transfer noise: gain x Poisson(signal / gain) + Gaussian read noise (known truth)."""
    gain = NOISE["gain"].reshape((-1,) + (1,) * (signal.ndim - 1))
    read = NOISE["read_variance"].reshape(gain.shape)
    electrons = rng.poisson(np.maximum(signal, 0) / gain)
    return gain * electrons + rng.normal(0.0, 1.0, signal.shape) * np.sqrt(read)


def _column_covariance(relative):
    """Each label's column of coefficients uncertain by `relative` (zero at its primary channel)."""
    cov = np.zeros((3, 6, 6))
    for k in range(3):
        sd = relative * MATRIX[:, k] + 0.003
        sd[PRIMARY[k]] = 0.0
        cov[k] = np.diag(sd**2)
    return cov


# --- weighted least squares against numpy and scipy on whitened problems

def _whitened(y, first):
    """The weights the solver documents: 1 / (read + gain x max(M a_first, 0)) per channel."""
    variance = NOISE["read_variance"][:, None] + NOISE["gain"][:, None] * np.maximum(MATRIX @ first, 0)
    return 1.0 / np.sqrt(variance)


@pytest.mark.parametrize("method", ["ls", "nnls"])
def test_weighted_matches_whitened_reference_solvers(method):
    # Reference: numpy.linalg.lstsq (LS) and scipy.optimize.nnls (NNLS) on the whitened problem
    # diag(w^1/2) M a = diag(w^1/2) y; for LS the variance is diag((M^T W M)^-1) (Lawson &
    # Hanson 1974, ch. 7).
    rng = np.random.default_rng(1)
    truth = rng.uniform(0, 800, (3, 3000))
    truth[:, :1000] *= rng.random((3, 1000)) < 0.5
    y = _camera(rng, MATRIX @ truth)
    unmixer = Unmixer(MATRIX, method=method)
    ours, errors = unmix_weighted(unmixer, y, NOISE)
    weights = _whitened(y, unmixer.unmix(y, dtype=np.float64))
    for i in range(0, 3000, 11):
        a, b = MATRIX * weights[:, i:i + 1], y[:, i] * weights[:, i]
        reference = np.linalg.lstsq(a, b, rcond=None)[0] if method == "ls" else nnls(a, b)[0]
        np.testing.assert_allclose(ours[:, i], reference, rtol=1e-6, atol=1e-4)
        if method == "ls":
            np.testing.assert_allclose(errors[:, i], np.sqrt(np.diag(np.linalg.inv(a.T @ a))), rtol=1e-6)


def test_weighting_lowers_the_variance_under_shot_noise():
    # Gauss-Markov: with unequal channel noise the weighted estimate varies less than the plain
    # one. Simulation with known truth: one bright mixture, 20,000 noise draws.
    rng = np.random.default_rng(2)
    truth = np.array([[3000.0], [200.0], [1500.0]]) * np.ones((1, 20000))
    y = _camera(rng, MATRIX @ truth)
    plain = Unmixer(MATRIX, method="ls").unmix(y, dtype=np.float64)
    weighted, errors = unmix_weighted(Unmixer(MATRIX, method="ls"), y, NOISE)
    assert np.all(weighted.var(axis=1) < plain.var(axis=1)) and weighted[0].var() < 0.85 * plain[0].var()
    variance = (errors.astype(np.float64) ** 2).mean(axis=1)
    assert np.all(np.abs(weighted.mean(axis=1) - truth[:, 0]) < 4 * np.sqrt(variance / 20000))
    # The reported variance is the spread seen across the draws (within 5 %).
    np.testing.assert_allclose(weighted.var(axis=1), variance, rtol=0.05)


def test_weighted_non_finite_pixels_give_nan():
    y = np.full((6, 5), 100.0)
    y[2, 1] = np.nan
    y[0, 3] = np.inf
    ours, errors = unmix_weighted(Unmixer(MATRIX), y, NOISE)
    assert np.isnan(ours[:, [1, 3]]).all() and np.isnan(errors[:, [1, 3]]).all()
    assert np.isfinite(ours[:, [0, 2, 4]]).all()


# --- the standard error's parts against direct formulas

def test_estimator_rows_are_the_pseudo_inverse_on_the_support():
    # Reference: numpy.linalg.pinv of the support's columns; a label off the support gets its row
    # on the support with it added.
    unmixer = Unmixer(MATRIX)
    rows = estimator_rows(unmixer, 0b101)
    np.testing.assert_allclose(rows[[0, 2]], np.linalg.pinv(MATRIX[:, [0, 2]]), atol=1e-12)
    np.testing.assert_allclose(rows[1], np.linalg.pinv(MATRIX)[1], atol=1e-12)


def test_standard_error_of_least_squares_is_the_sandwich_formula():
    # Reference: sqrt(diag(L Sigma L^T) + sum_k a_k^2 diag(L Cov_k L^T)) with numpy's pinv.
    rng = np.random.default_rng(3)
    a = rng.uniform(0, 500, (3, 40))
    cov = _column_covariance(0.05)
    errors = standard_errors(Unmixer(MATRIX, method="ls"), a, NOISE, cov)
    pinv = np.linalg.pinv(MATRIX)
    for i in range(40):
        sigma = np.diag(NOISE["read_variance"] + NOISE["gain"] * np.maximum(MATRIX @ a[:, i], 0))
        expected = np.diag(pinv @ sigma @ pinv.T) + sum(a[k, i] ** 2 * np.diag(pinv @ cov[k] @ pinv.T)
                                                        for k in range(3))
        np.testing.assert_allclose(errors[:, i], np.sqrt(expected), rtol=1e-5)


def test_standard_errors_nan_where_abundances_are_nan_and_need_a_source():
    a = np.array([[1.0, np.nan], [2.0, 3.0], [0.0, 1.0]])
    errors = standard_errors(Unmixer(MATRIX), a, NOISE)
    assert np.isnan(errors[:, 1]).all() and np.isfinite(errors[:, 0]).all()
    with pytest.raises(ValueError, match="noise model"):
        standard_errors(Unmixer(MATRIX), a)


# --- coverage: simulation with known truth, 100 seeded repeats

def _abundance_at_snr(snr):
    """Equal abundances of the three labels, scaled so that the least-squares noise of the
    noisiest label is abundance / snr (the brightness-aware noise of unmix.measure.spreading)."""
    low, high = 1e-3, 1e7
    for _ in range(200):
        mid = np.sqrt(low * high)
        worst = np.min(mid / label_noise(MATRIX, NOISE, np.full(3, mid)))
        low, high = (mid, high) if worst < snr else (low, mid)
    return np.full(3, np.sqrt(low * high))


@pytest.mark.slow
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("snr", [5, 20, 100])
def test_standard_error_covers_the_truth(snr, weighted):
    # Known truth; per repeat a new matrix measurement (each column drawn from its covariance,
    # 3 % relative) and new photon-transfer noise. The 95 % interval a +- 1.96 SE must cover the
    # true abundance in 90 to 99 of 100 repeats (binomial range of a correct 95 % interval), for
    # every label.
    rng = np.random.default_rng(100 + snr + 1000 * weighted)
    truth = _abundance_at_snr(snr)
    cov = _column_covariance(0.03)
    covered = np.zeros(3, int)
    for _ in range(100):
        measured = MATRIX + np.stack([rng.multivariate_normal(np.zeros(6), cov[k]) for k in range(3)], axis=1)
        y = _camera(rng, (MATRIX @ truth)[:, None])
        unmixer = Unmixer(measured)
        if weighted:
            estimate, errors = unmix_weighted(unmixer, y, NOISE, column_covariance=cov)
        else:
            estimate = unmixer.unmix(y)
            errors = standard_errors(unmixer, estimate, NOISE, cov)
        covered += np.abs(estimate[:, 0] - truth) <= 1.96 * errors[:, 0]
    assert np.all((covered >= 90) & (covered <= 99)), covered


# --- spillover spreading against simulated single-label controls (Nguyen et al. 2013)

def test_spreading_matrix_matches_simulated_single_label_controls():
    # Nguyen et al. (2013) measure the spread of label j into k from a single-stained control:
    # sqrt(sd_pos^2 - sd_neg^2) / sqrt(F_pos - F_neg), sd the robust spread of the compensated
    # (least-squares unmixed) k and F the median of j, in j's bright and negative populations
    # (sd as 84th percentile minus median, from memory). Here: simulated control images (known
    # truth, photon-transfer noise), 200,000 pixels per population.
    rng = np.random.default_rng(4)
    spread, floor = spreading_matrix(MATRIX, NOISE)
    unmixer = Unmixer(MATRIX, method="ls")
    for j in range(3):
        populations = []
        for brightness in (0.0, 4000.0):
            truth = np.zeros((3, 200_000))
            truth[j] = brightness
            populations.append(unmixer.unmix(_camera(rng, MATRIX @ truth), dtype=np.float64))
        negative, positive = populations
        delta = np.median(positive[j]) - np.median(negative[j])
        for k in range(3):
            sd = [np.percentile(p[k], 84.13) - np.median(p[k]) for p in (negative, positive)]
            measured = np.sqrt(sd[1] ** 2 - sd[0] ** 2) / np.sqrt(delta)
            assert measured == pytest.approx(spread[j, k], rel=0.03), (j, k)
        # The negative population shows the floor (read noise alone).
        np.testing.assert_allclose(negative.std(axis=1), floor, rtol=0.02)


# --- apply: the standard-error output and noise weighting from the matrix file

def _matrix_file(path, noise=True, covariance=True):
    from unmix.matrix import BleedThroughMatrix

    names = tuple(f"ch{c}" for c in range(6))
    return BleedThroughMatrix(
        kind="measured", channels=names, labels=("A", "B", "C"), primary={"A": "ch0", "B": "ch1", "C": "ch2"},
        matrix=MATRIX, ci95_low=MATRIX - 0.02, ci95_high=MATRIX + 0.02, background=np.full(6, 100.0),
        background_source="dark",
        noise_model={**NOISE, "source": "controls"} if noise else None,
        column_covariance=_column_covariance(0.03) if covariance else None).save(path)


def _sample(tmp_path, rng):
    import tifffile

    truth = rng.uniform(0, 1500, (3, 2, 24, 32))
    truth[1, :, :12] = 0
    pixels = _camera(rng, np.einsum("ck,kzyx->czyx", MATRIX, truth)) + 100.0
    path = tmp_path / "s.ome.tif"
    tifffile.imwrite(path, np.moveaxis(pixels, 0, 1).astype(np.float32), ome=True, photometric="minisblack",
                     metadata={"axes": "ZCYX", "Channel": {"Name": [f"ch{c}" for c in range(6)]}})
    return path, pixels


@pytest.mark.parametrize("weights", ["none", "noise"])
def test_apply_writes_standard_errors_beside_the_abundances(tmp_path, weights, capsys):
    from unmix.cli import main
    from unmix.io.images import read_image, read_provenance

    rng = np.random.default_rng(5)
    matrix_path = _matrix_file(tmp_path / "m.json")
    source, pixels = _sample(tmp_path, rng)
    code = main(["apply", "--matrix", str(matrix_path), str(source), "-o", str(tmp_path / "out"), "--uncertainty",
                 "--weights", weights])
    out = capsys.readouterr().out
    assert code == 0
    assert "Spillover spreading" in out
    abundances = read_image(tmp_path / "out" / "s.unmixed.ome.tif")
    errors = read_image(tmp_path / "out" / "s.standard-error.ome.tif")
    assert errors.channel_names == ("A", "B", "C") and errors.data.shape == abundances.data.shape
    unmixer = Unmixer(MATRIX, noise=NOISE, column_covariance=_column_covariance(0.03), weighted=weights == "noise")
    for z in range(2):
        expected, expected_errors = unmixer.solve(pixels[:, z].astype(np.float32), np.full(6, 100.0), errors=True)
        np.testing.assert_array_equal(abundances.data[:, z], expected)
        np.testing.assert_array_equal(errors.data[:, z], expected_errors)
    record = read_provenance(tmp_path / "out" / "s.unmixed.ome.tif")
    assert record["weights"] == {"requested": weights, "used": weights}
    assert record["uncertainty"]["noise"] == "noise model (controls)"
    assert record["uncertainty"]["matrix"] == "column covariance"
    spread, floor = spreading_matrix(MATRIX, NOISE)
    np.testing.assert_allclose(record["spreading"]["matrix"], spread)


def test_apply_without_noise_model_warns_and_records_what_it_used(tmp_path, capsys):
    from unmix.cli import main
    from unmix.io.images import read_provenance

    source, _ = _sample(tmp_path, np.random.default_rng(6))
    matrix_path = _matrix_file(tmp_path / "m.json", noise=False, covariance=False)
    code = main(["apply", "--matrix", str(matrix_path), str(source), "-o", str(tmp_path / "out"), "--uncertainty",
                 "--weights", "noise", "--quiet"])
    err = capsys.readouterr().err.splitlines()
    assert code == 0
    assert any("falls back to equal weights" in line for line in err)
    assert any("leave out the detector noise" in line for line in err)
    record = read_provenance(tmp_path / "out" / "s.unmixed.ome.tif")
    assert record["weights"] == {"requested": "noise", "used": "none", "reason": "the matrix has no noise model"}
    assert record["uncertainty"]["noise"] is None
    assert record["uncertainty"]["matrix"] == "95 % intervals, coefficients taken as independent"


def test_apply_ome_zarr_standard_errors(tmp_path, capsys):
    # OME-Zarr in, OME-Zarr out: the standard-error store holds the same values as the TIFF path.
    from unmix.cli import main
    from unmix.io.images import Image, read_image, write_ome_zarr

    rng = np.random.default_rng(7)
    matrix_path = _matrix_file(tmp_path / "m.json")
    _, pixels = _sample(tmp_path, rng)
    source = write_ome_zarr(tmp_path / "z.ome.zarr", Image(pixels.astype(np.float32), "CZYX",
                                                           tuple(f"ch{c}" for c in range(6))))
    assert main(["apply", "--matrix", str(matrix_path), str(source), "-o", str(tmp_path / "out"), "--uncertainty",
                 "--quiet"]) == 0
    errors = read_image(tmp_path / "out" / "z.standard-error.ome.zarr")
    unmixer = Unmixer(MATRIX, noise=NOISE, column_covariance=_column_covariance(0.03))
    _, expected = unmixer.solve(pixels[:, 1].astype(np.float32), np.full(6, 100.0), errors=True)
    np.testing.assert_array_equal(np.asarray(errors.data)[:, 1], expected)


def test_apply_uncertainty_without_intervals_gives_noise_only_errors(tmp_path, capsys):
    from unmix.cli import main
    from unmix.io.images import read_image, read_provenance
    from unmix.matrix import load_matrix

    source, pixels = _sample(tmp_path, np.random.default_rng(8))
    matrix = load_matrix(_matrix_file(tmp_path / "full.json", covariance=False)).to_dict()
    matrix.update(ci95_low=None, ci95_high=None)
    path = tmp_path / "m.json"
    path.write_text(json.dumps(matrix))
    code = main(["apply", "--matrix", str(path), str(source), "-o", str(tmp_path / "out"), "--uncertainty", "--quiet"])
    err = capsys.readouterr().err.splitlines()
    assert code == 0 and any("has no intervals" in line and "uncertainty of the matrix" in line for line in err)
    record = read_provenance(tmp_path / "out" / "s.unmixed.ome.tif")
    assert record["uncertainty"]["matrix"] is None and record["uncertainty"]["noise"] == "noise model (controls)"
    errors = read_image(tmp_path / "out" / "s.standard-error.ome.tif").data
    _, expected = Unmixer(MATRIX, noise=NOISE).solve(pixels[:, 0].astype(np.float32), np.full(6, 100.0), errors=True)
    np.testing.assert_array_equal(errors[:, 0], expected)


def test_standard_errors_are_a_member_of_the_output_set(tmp_path, capsys):
    # Asked for later, the standard errors join the set with the set's identity; a run with other
    # weights is another run: refused without --overwrite (exit 2), and then replaces the whole set.
    from unmix.cli import main
    from unmix.io.images import read_provenance

    source, _ = _sample(tmp_path, np.random.default_rng(9))
    matrix_path = _matrix_file(tmp_path / "m.json")
    out = tmp_path / "out"
    base = ["apply", "--matrix", str(matrix_path), str(source), "-o", str(out), "--quiet"]
    assert main(base) == 0
    assert not (out / "s.standard-error.ome.tif").exists()
    assert main(base + ["--uncertainty"]) == 0
    identity = read_provenance(out / "s.unmixed.ome.tif")["identity"]
    assert read_provenance(out / "s.standard-error.ome.tif")["identity"] == identity
    entry = json.loads((out / "unmix-manifest.json").read_text())["outputs"]["s.unmixed.ome.tif"]
    assert "s.standard-error.ome.tif" in entry["members"]
    capsys.readouterr()
    assert main(base + ["--uncertainty", "--weights", "noise"]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert read_provenance(out / "s.standard-error.ome.tif")["identity"]["weights"] == "none"
    assert main(base + ["--uncertainty", "--weights", "noise", "--overwrite"]) == 0
    for member in ("unmixed", "saturation", "standard-error"):
        assert read_provenance(out / f"s.{member}.ome.tif")["identity"]["weights"] == "noise", member
