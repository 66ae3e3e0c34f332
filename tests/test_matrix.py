"""The matrix file: round trip, validation, noise penalty and condition number."""

from __future__ import annotations

import json

import numpy as np
import pytest

from unmix.errors import InputError
from unmix.matrix import BleedThroughMatrix, load_matrix

M = np.array([[1.0, 0.3], [0.25, 1.0], [0.05, 0.2]])


def _matrix(**overrides):
    values = dict(kind="measured", channels=("c1", "c2", "c3"), labels=("A", "B"),
                  primary={"A": "c1", "B": "c2"}, matrix=M, ci95_low=M - 0.01, ci95_high=M + 0.01,
                  background=np.array([100.0, 101.0, 99.0]), background_source="dark",
                  saturation=np.array([4095.0] * 3), qc={"flags": []}, provenance={"x": 1})
    values.update(overrides)
    return BleedThroughMatrix(**values)


def test_round_trip(tmp_path):
    matrix = _matrix()
    path = matrix.save(tmp_path / "m.json")
    back = load_matrix(path)
    np.testing.assert_array_equal(back.matrix, M)
    assert back.to_dict() == matrix.to_dict()
    assert back.sha256() == matrix.sha256()
    assert [p.name for p in tmp_path.iterdir()] == ["m.json"]  # no temporary left


def test_csv_has_one_row_per_coefficient(tmp_path):
    text = _matrix().to_csv()
    rows = text.strip().splitlines()
    assert rows[0].startswith("channel,label,primary,coefficient,ci95_low,ci95_high")
    assert len(rows) == 1 + M.size


def test_noise_penalty_matches_monte_carlo_least_squares():
    # Reference: the variance of unconstrained least-squares abundances under
    # equal white noise, estimated with numpy.linalg.lstsq (Lawson & Hanson 1974).
    rng = np.random.default_rng(0)
    truth = np.array([50.0, 80.0])
    noisy = M @ truth + rng.normal(0, 1.0, size=(20000, 3))
    estimates = np.linalg.lstsq(M, noisy.T, rcond=None)[0]
    np.testing.assert_allclose(estimates.var(axis=1), _matrix().noise_penalty(), rtol=0.05)
    # Identity matrix: no amplification.
    eye = _matrix(matrix=np.eye(3)[:, :2], ci95_low=None, ci95_high=None)
    np.testing.assert_allclose(eye.noise_penalty(), [1.0, 1.0])


def test_condition_number_is_ratio_of_singular_values():
    # Reference: numpy.linalg.svd.
    s = np.linalg.svd(M, compute_uv=False)
    assert _matrix().condition_number() == pytest.approx(s[0] / s[-1])


def _edited(tmp_path, edit):
    data = _matrix().to_dict()
    edit(data)
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(data))
    return path


@pytest.mark.parametrize("edit, message", [
    (lambda d: d.update(format="other"), "format"),
    (lambda d: d.update(version=3), "version"),
    (lambda d: d.update(version=True), "version"),
    (lambda d: d.update(noise_model={"gain": [1, 1, 1]}), "noise_model"),
    (lambda d: d.update(noise_model={"read_variance": [1, 1, 1], "gain": [1, -1, 1], "source": "controls"}),
     "gain"),
    (lambda d: d.update(noise_model={"read_variance": [1, 1, 1], "gain": [1, 1, 1], "source": "guess"}),
     "source"),
    (lambda d: d.update(column_covariance=[[[1, 0, 0]] * 3] * 2), "column_covariance"),
    (lambda d: d.update(column_covariance=[[[0, 1, 0], [0, 0, 0], [0, 0, 0]]] * 2), "symmetric"),
    (lambda d: d.update(column_covariance=[[[0, 0, 0], [0, -1, 0], [0, 0, 0]]] * 2), "semi-definite"),
    (lambda d: d.update(kind="guessed"), "kind"),
    (lambda d: d.update(channels=["c1", "c1", "c3"]), "duplicate"),
    (lambda d: d.update(labels=[]), "labels"),
    (lambda d: d["primary"].update(B="c9"), "primary channel"),
    (lambda d: d["matrix"].pop(), "rows"),
    (lambda d: d["matrix"][0].__setitem__(0, 0.5), "not 1"),
    (lambda d: d["matrix"][1].__setitem__(0, "x"), "not a number"),
    (lambda d: d["ci95_low"][1].__setitem__(0, 0.9), "does not contain"),
    (lambda d: d.update(ci95_high=None), "both"),
    (lambda d: d.update(background=[1, 2]), "background"),
    (lambda d: d.update(background_source="guess"), "background_source"),
    (lambda d: d.update(saturation=[0, 1, 2]), "saturation"),
    (lambda d: d.update(qc=[1]), "qc"),
    (lambda d: d.update(kind="predicted"), "predicted"),
])
def test_invalid_matrix_files_are_named(tmp_path, edit, message):
    path = _edited(tmp_path, edit)
    with pytest.raises(InputError, match=message) as info:
        load_matrix(path)
    assert str(path) in str(info.value)


def test_version_1_files_still_load(tmp_path):
    # Files written before the noise model and the column covariance existed.
    data = _matrix().to_dict()
    data["version"] = 1
    del data["noise_model"], data["column_covariance"]
    path = tmp_path / "v1.json"
    path.write_text(json.dumps(data))
    matrix = load_matrix(path)
    assert matrix.noise_model is None and matrix.column_covariance is None
    np.testing.assert_array_equal(matrix.matrix, _matrix().matrix)


def test_noise_model_and_covariance_round_trip(tmp_path):
    covariance = np.zeros((2, 3, 3))
    covariance[0, 1:, 1:] = [[4e-4, 1e-4], [1e-4, 9e-4]]
    matrix = BleedThroughMatrix.from_dict({
        **_matrix().to_dict(), "column_covariance": covariance.tolist(),
        "noise_model": {"read_variance": [4.0, 5.0, 6.0], "gain": [0.5, 0.6, 0.7], "source": "controls"}})
    again = load_matrix(matrix.save(tmp_path / "m.json"))
    np.testing.assert_array_equal(again.column_covariance, covariance)
    np.testing.assert_array_equal(again.noise_model["gain"], [0.5, 0.6, 0.7])
    assert again.noise_model["source"] == "controls"


@pytest.mark.parametrize("text", ["", "{", "[1, 2]", '{"format": NaN}', "\udcff"])
def test_malformed_json(tmp_path, text):
    path = tmp_path / "bad.json"
    path.write_bytes(text.encode("utf-8", "surrogateescape"))
    with pytest.raises(InputError, match="bad.json"):
        load_matrix(path)


def test_non_finite_coefficient_refused(tmp_path):
    path = tmp_path / "inf.json"
    path.write_text(json.dumps(_matrix().to_dict()).replace("0.25", "1e999"))
    with pytest.raises(InputError, match="non-finite"):
        load_matrix(path)
