"""The per-pixel unmixing kernels against reference solvers and published data."""

from __future__ import annotations

import json
import pickle
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import nnls

from benchmarks.compare_nnls import compare, random_matrix, random_pixels
from unmix.engine.solver import MAX_LABELS, Unmixer
from unmix.errors import InputError, InputWarning
from unmix.matrix import CONDITION_LIMIT, check_unmixable, scaled_condition_number

SCIPY_CASES = json.loads((Path(__file__).parent / "data" / "scipy_nnls_cases.json").read_text())


# --- scipy's own NNLS test cases (scipy/optimize/tests/test_nnls.py), each either solved with
# --- scipy's answer or refused by the documented rule.

def test_scipy_case_rank_deficient_square_is_refused():
    # scipy: arange(25).reshape(5, 5), rank 2, solved to a zero residual. Here: refused, the
    # labels cannot be told apart (the condition rule of unmix.matrix).
    with pytest.raises(InputError, match="rank-deficient"):
        Unmixer(np.arange(25.0).reshape(-1, 5))


def test_scipy_case_tall_exact_recovery():
    # scipy: 50 x 10 uniform(-10, 10), every other x zero, b = A x: x recovered to 1e-10 and
    # the residual below 1e-12. The same checks here, same seed.
    rng = np.random.default_rng(1685225766635251)
    a = rng.uniform(low=-10, high=10, size=[50, 10])
    x = np.abs(rng.uniform(low=-2, high=2, size=[10]))
    x[::2] = 0
    b = a @ x
    ours = Unmixer(a).unmix(b[:, None], dtype=np.float64)[:, 0]
    np.testing.assert_allclose(ours, x, rtol=0, atol=1e-10)
    assert np.linalg.norm(a @ ours - b) < 1e-12


@pytest.mark.parametrize("shape, message", [
    ((100, 120), "at most 16"),  # scipy's "wide" case (more unknowns than equations)
    ((67, 67), "at most 16"),  # scipy's two "inner loop" cases: 67 and 68 unknowns
    ((68, 68), "at most 16"),
    ((5, 8), "8 labels but only 5 channels"),  # scipy's first review example (5 x 8)
    ((5, 12), "12 labels but only 5 channels"),  # scipy's 32-bit regression case (5 x 12)
])
def test_scipy_cases_beyond_the_label_rules_are_refused(shape, message):
    # These scipy cases have more unknowns than 16 or than equations: refused here, by rule.
    with pytest.raises(ValueError, match=message):
        Unmixer(np.random.default_rng(0).normal(size=shape))


def test_scipy_case_badly_scaled_columns():
    # scipy: an 89 x 5 matrix whose columns span 18 decades, b = ones: x = [0.61124315,
    # 8.22262829, 0, 0, 0], residual 1.0556460808977297. Unscaled its condition number is 5e13;
    # with unit columns it is 8, so the rule accepts it.
    case = SCIPY_CASES["badly_scaled_columns"]
    a, b = np.array(case["A"]), np.array(case["b"])
    assert np.linalg.cond(a) > 1e13 and scaled_condition_number(a) < 10
    ours = Unmixer(a).unmix(b[:, None], dtype=np.float64)[:, 0]
    np.testing.assert_allclose(ours, [0.61124315, 8.22262829, 0.0, 0.0, 0.0], rtol=1e-7)
    np.testing.assert_allclose(np.linalg.norm(a @ ours - b), 1.0556460808977297, rtol=1e-12)


def test_scipy_case_two_labels_one_active():
    # scipy: 4 x 2 example, x = [54.3047953202271, 0.0].
    a = np.array([[0.2508259992635229, -0.24031300195203256], [0.510647748500133, 0.2872936081767836],
                  [0.8196387904102849, -0.03520620107046682], [0.030739759120097084, -0.07768656359879388]])
    b = np.array([24.456141951303913, 28.047143273432333, 41.10526799545987, -1.2078282698324068])
    ours = Unmixer(a).unmix(b[:, None], dtype=np.float64)[:, 0]
    np.testing.assert_allclose(ours, [54.3047953202271, 0.0], rtol=1e-7)


def test_scipy_case_one_of_five_labels_active():
    # scipy: 25 x 5 example, x = [0, 0, 76.3611306173957, 0, 0] to 5e-14.
    case = SCIPY_CASES["one_label_active"]
    a, b = np.array(case["A"]), np.array(case["b"])
    ours = Unmixer(a).unmix(b[:, None], dtype=np.float64)[:, 0]
    np.testing.assert_allclose(ours, [0.0, 0.0, 76.3611306173957, 0.0, 0.0], atol=5e-13)


def test_scipy_case_square_exact():
    # scipy: 3 x 3 with b = [-1, 2, 2]: x = [1, 2, 3], residual 0.
    a = np.array([[1.0, 0.5, -1.0], [1.0, 0.5, 0.0], [-1.0, 0.0, 1.0]])
    ours = Unmixer(a).unmix(np.array([[-1.0], [2.0], [2.0]]), dtype=np.float64)[:, 0]
    np.testing.assert_allclose(ours, [1.0, 2.0, 3.0], rtol=1e-12)


# --- randomised comparison with scipy.optimize.nnls (the large one: tests/benchmarks/compare_nnls.py)

@pytest.mark.slow
def test_random_problems_float32_every_label_count_match_scipy():
    # Reference: scipy.optimize.nnls (Lawson & Hanson 1974) on float32 pixels, every K from 1 to
    # 16, C up to 64, column-scaled condition numbers up to the limit 1e6, float32 abundances:
    # no objective or solution mismatch beyond rounding, no negative abundance.
    rows = compare(np.random.default_rng(11), 200, 8, range(1, MAX_LABELS + 1), (np.float32,), np.float32)
    assert sum(r["problems"] for r in rows.values()) > 1300 and set(rows) == {0, 1, 2, 3, 4, 5}
    assert all(r["objective"] == r["solution"] == r["negative"] == 0 for r in rows.values()), rows


@pytest.mark.slow
def test_random_problems_float64_match_scipy():
    # Reference: scipy.optimize.nnls on float64 pixels, float64 abundances (label counts of both
    # kernel kinds, the ones scipy's cases compile too).
    rows = compare(np.random.default_rng(12), 80, 8, [2, 3, 5, 10], (np.float64,), np.float64)
    assert sum(r["problems"] for r in rows.values()) > 380
    assert all(r["objective"] == r["solution"] == r["negative"] == 0 for r in rows.values()), rows


def test_nnls_equals_ls_where_ls_is_non_negative():
    # The KKT conditions: where the unconstrained solution is feasible it is the NNLS solution.
    rng = np.random.default_rng(4)
    matrix = rng.random((4, 3)) + np.eye(4, 3)
    pixels = random_pixels(rng, matrix, 5000).astype(np.float32)
    ls = Unmixer(matrix, method="ls").unmix(pixels)
    exact = Unmixer(matrix).unmix(pixels)
    inside = np.all(ls >= 0, axis=0)
    assert inside.mean() > 0.1 and (~inside).mean() > 0.1
    np.testing.assert_allclose(exact[:, inside], ls[:, inside], rtol=1e-5, atol=1e-3)
    assert exact.min() >= 0


def test_ls_matches_numpy_lstsq():
    # Reference: numpy.linalg.lstsq, up to cond 1e5.
    rng = np.random.default_rng(3)
    for k, condition in ((3, 10.0), (5, 1e3), (10, 1e5)):
        matrix = random_matrix(rng, 40, k, condition)
        pixels = random_pixels(rng, matrix, 500)
        ours = Unmixer(matrix, method="ls").unmix(pixels, dtype=np.float64)
        reference = np.linalg.lstsq(matrix, pixels, rcond=None)[0]
        scale = np.abs(reference).max()
        np.testing.assert_allclose(ours, reference, rtol=0, atol=1e-9 * scaled_condition_number(matrix) * scale)


def test_immunohistochemistry_stains_match_scikit_image():
    # Reference: skimage.color.rgb2hed on skimage.data.immunohistochemistry()
    # (Ruifrok & Johnston 2001 stain matrix; Beer-Lambert: optical density is
    # linear in the stain amounts). scikit-image clips each stain at 0 after
    # its least-squares step, so compare each stain where it is positive there.
    from skimage import data
    from skimage.color import rgb2hed
    from skimage.color.colorconv import rgb_from_hed
    from skimage.util import img_as_float

    rgb = img_as_float(data.immunohistochemistry())
    reference = rgb2hed(rgb)
    density = np.log(np.maximum(rgb, 1e-6)) / np.log(1e-6)  # scikit-image's optical density scaling
    pixels = np.moveaxis(density, -1, 0)  # channels first: R, G, B
    matrix = rgb_from_hed.T  # channels x stains
    ls = np.moveaxis(Unmixer(matrix, method="ls").unmix(pixels), 0, -1)
    exact = np.moveaxis(Unmixer(matrix).unmix(pixels), 0, -1)
    positive = reference > 0
    assert positive.mean() > 0.3
    np.testing.assert_allclose(ls[positive], reference[positive], rtol=1e-4, atol=1e-5)
    non_negative = np.all(ls >= 0, axis=-1)
    np.testing.assert_allclose(exact[non_negative], ls[non_negative], rtol=1e-4, atol=1e-5)


def test_round_trip_without_noise():
    # unmix(mix(a)) == a for non-negative a (simulation with known truth).
    rng = np.random.default_rng(5)
    matrix = np.array([[1.0, 0.3, 0.02], [0.12, 1.0, 0.35], [0.0, 0.04, 1.0], [0.05, 0.2, 0.5]])
    abundances = np.maximum(rng.normal(50, 80, size=(3, 64, 64)), 0).astype(np.float32)
    mixed = np.tensordot(matrix, abundances, axes=(1, 0)) + np.array([100.0, 90, 110, 95])[:, None, None]
    back = Unmixer(matrix).unmix(mixed.astype(np.float32), background=[100.0, 90, 110, 95])
    np.testing.assert_allclose(back, abundances, atol=2e-3)


@pytest.mark.parametrize("n_labels", range(1, MAX_LABELS + 1))
def test_nan_pixels_give_nan_everywhere(n_labels):
    # NaN or infinity in any channel gives NaN in every label; the other pixels of the same tiles
    # (constrained or not) are unaffected, for every label count and both methods.
    rng = np.random.default_rng(n_labels)
    n_channels = n_labels + 2
    matrix = np.eye(n_channels, n_labels) + 0.3 * rng.random((n_channels, n_labels))
    pixels = random_pixels(rng, matrix, 3000).astype(np.float32)
    bad = rng.choice(3000, 60, replace=False)
    pixels[rng.integers(0, n_channels, 60), bad] = rng.choice([np.nan, np.inf, -np.inf], 60)
    good = np.setdiff1d(np.arange(3000), bad)
    for method in ("nnls", "ls"):
        unmixer = Unmixer(matrix, method=method)
        out = unmixer.unmix(pixels)
        assert np.isnan(out[:, bad]).all()
        np.testing.assert_array_equal(out[:, good], unmixer.unmix(pixels[:, good]))
        assert np.isfinite(out[:, good]).all()


@pytest.mark.parametrize("n_labels", [2, 3, 5, 10])
def test_many_tiles_threads_and_pixel_types_match_scipy(n_labels):
    # Reference: scipy.optimize.nnls, on pixels spread over several tiles of
    # the kernel, split among threads at boundaries that are not tile-aligned,
    # in every pixel type the kernel is compiled for.
    rng = np.random.default_rng(n_labels)
    matrix = np.eye(n_labels + 1, n_labels) + 0.3 * rng.random((n_labels + 1, n_labels))
    pixels = np.clip(random_pixels(rng, matrix, 5003) + 50, 0, None)
    for dtype in (np.float32, np.float64, np.uint16):
        y = pixels.astype(dtype)
        ours = Unmixer(matrix).unmix(y, background=np.full(n_labels + 1, 50.0), threads=3)
        for i in rng.choice(y.shape[1], 300, replace=False):
            reference, _ = nnls(matrix, y[:, i].astype(np.float64) - 50.0)
            np.testing.assert_allclose(ours[:, i], reference, atol=1e-4 * np.abs(y[:, i]).max())


def test_generated_kernels_match_the_per_pixel_solver():
    # The generated kernels write out, with scalars, the method of pixel_solver.solve_reduced
    # (array by array): two implementations of one method, same abundances to rounding.
    from unmix.engine.pixel_solver import solve_reduced

    rng = np.random.default_rng(8)
    for k in (3, 6, 11):
        matrix = random_matrix(rng, 20, k, 100.0)
        pixels = random_pixels(rng, matrix, 1500)
        unmixer = Unmixer(matrix)
        red = unmixer.reduction
        ours = unmixer.unmix(pixels, dtype=np.float64)
        x, scratch = np.empty(k), [np.empty(k) for _ in range(3)]
        for i in range(pixels.shape[1]):
            assert solve_reduced(red.qt @ pixels[:, i], red.table, red.tolerance, np.empty((0, 0)),
                                 np.empty((3, 0, 0)), x, *scratch) > 0
            np.testing.assert_allclose(ours[:, i], red.scale * x, rtol=0, atol=1e-9 * np.abs(ours[:, i]).max())


# --- matrices that cannot be unmixed

def test_condition_limit_names_the_collinear_labels():
    # Four labels, two of whose columns differ by 1e-7 (scaled condition number about 1e8).
    matrix = np.array([[1.0, 0.1, 0.0, 0.1], [0.2, 1.0, 0.1, 1.0], [0.0, 0.3, 1.0, 0.3 + 1e-7],
                       [0.1, 0.0, 0.2, 0.0]])
    with pytest.raises(InputError, match=r"labels 'B', 'D' are nearly collinear") as error:
        check_unmixable(matrix, ["A", "B", "C", "D"], where="m.json")
    assert "above the limit 1e+06" in str(error.value) and "\n" not in str(error.value)
    with pytest.raises(InputError, match="column 1, column 3"):
        Unmixer(matrix)


def test_condition_warning_between_1e3_and_the_limit():
    matrix = np.array([[1.0, 1.0], [0.0, 2e-3], [0.0, 0.0]])  # scaled condition number about 1000
    matrix[:, 1] /= np.linalg.norm(matrix[:, 1])
    condition = scaled_condition_number(matrix)
    assert 1e3 < condition < CONDITION_LIMIT
    with pytest.warns(InputWarning, match="hard to tell apart"):
        check_unmixable(matrix, ["A", "B"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Unmixer(matrix)  # the solver itself refuses or accepts, it does not warn


@pytest.mark.parametrize("matrix, message", [
    (np.ones((2, 3)), "3 labels but only 2 channels"),
    (np.array([[1.0, 2.0], [2.0, 4.0], [3.0, 6.0]]), "rank-deficient"),
    (np.array([[1.0, 0.0], [0.0, 0.0]]), "zero in every channel"),
    (np.array([[1.0, np.nan], [0.0, 1.0]]), "NaN"),
    (np.ones((20, 17)), "at most 16"),
])
def test_unusable_matrices_refused(matrix, message):
    with pytest.raises(ValueError, match=message):
        Unmixer(matrix)


def test_unmixer_sent_to_another_process_carries_no_table():
    # Dask tasks pickle the solver: the matrix travels, the support table is rebuilt there.
    unmixer = Unmixer(np.eye(9, 8) + 0.1)
    unmixer.unmix(np.ones((9, 5), np.float32))
    payload = pickle.dumps(unmixer)
    assert len(payload) < 4000
    np.testing.assert_array_equal(pickle.loads(payload).unmix(np.ones((9, 5), np.float32)),
                                  unmixer.unmix(np.ones((9, 5), np.float32)))


def test_generated_kernels_are_current():
    # The committed unrolled kernels must be what the generator writes now.
    from unmix.engine import codegen
    assert codegen.TARGET.read_text(encoding="utf-8") == codegen.source(), \
        "run: python -m unmix.engine.codegen"
