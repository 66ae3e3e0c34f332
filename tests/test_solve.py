"""The per-pixel unmixing kernels against reference solvers and published data."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import nnls

from unmix.engine.solver import Unmixer


def _matrix_with_condition(rng, n_channels, n_labels, condition):
    u, _ = np.linalg.qr(rng.normal(size=(n_channels, n_channels)))
    v, _ = np.linalg.qr(rng.normal(size=(n_labels, n_labels)))
    singular = np.geomspace(1.0, 1.0 / condition, n_labels)
    return u[:, :n_labels] @ np.diag(singular) @ v.T


def _problems(rng, matrix, n):
    """Pixels mixing non-negative abundances, many of them exactly zero, plus noise."""
    k = matrix.shape[1]
    abundances = np.maximum(rng.normal(0.3, 1.0, size=(k, n)), 0) * 100
    pixels = matrix @ abundances + rng.normal(0, 3.0, size=(matrix.shape[0], n))
    return pixels.astype(np.float32)


def _objective(matrix, y, a):
    return float(np.sum((y - matrix @ a) ** 2))


def _kkt_violation(matrix, y, a):
    """Largest violation of a >= 0 and of gradient >= 0 off the support, relative to ||M^T y||."""
    gradient = matrix.T @ (matrix @ a - y)
    scale = np.abs(matrix.T @ y).max() + 1e-300
    off_support = a <= 0
    return max(float(-a.min()), float(-(gradient[off_support]).min(initial=0.0)) / scale)


@pytest.mark.parametrize("condition", [1.5, 10.0, 100.0])
def test_nnls_matches_scipy_for_moderate_condition(condition):
    # Reference: scipy.optimize.nnls (Lawson & Hanson 1974) on thousands of problems.
    rng = np.random.default_rng(int(condition * 10))
    checked = 0
    for _ in range(60):
        k = int(rng.integers(1, 9))
        c = int(rng.integers(k, 33))
        matrix = _matrix_with_condition(rng, c, k, condition if k > 1 else 1.0)
        pixels = _problems(rng, matrix, 40)
        ours = Unmixer(matrix).unmix(pixels).astype(np.float64)
        for i in range(pixels.shape[1]):
            y = pixels[:, i].astype(np.float64)
            reference, _ = nnls(matrix, y, maxiter=1000)
            scale = np.abs(y).max()
            np.testing.assert_allclose(ours[:, i], reference, atol=1e-3 * scale)
            f_ours, f_ref = _objective(matrix, y, ours[:, i]), _objective(matrix, y, reference)
            assert f_ours - f_ref <= 1e-5 * max(f_ref, 1e-6 * float(y @ y))
            checked += 1
    assert checked == 2400


def test_nnls_objective_and_kkt_up_to_condition_1e4():
    # Ill-conditioned matrices: abundances may differ, the objective must not.
    rng = np.random.default_rng(7)
    for _ in range(60):
        k = int(rng.integers(2, 9))
        c = int(rng.integers(k, 33))
        matrix = _matrix_with_condition(rng, c, k, 1e4)
        pixels = _problems(rng, matrix, 30)
        ours = Unmixer(matrix).unmix(pixels).astype(np.float64)
        for i in range(pixels.shape[1]):
            y = pixels[:, i].astype(np.float64)
            reference, _ = nnls(matrix, y, maxiter=5000)
            f_ours, f_ref = _objective(matrix, y, ours[:, i]), _objective(matrix, y, reference)
            assert f_ours - f_ref <= 1e-4 * max(f_ref, 1e-6 * float(y @ y))
            assert _kkt_violation(matrix, y, ours[:, i]) < 1e-4


def test_ls_matches_numpy_lstsq():
    # Reference: numpy.linalg.lstsq.
    rng = np.random.default_rng(3)
    matrix = rng.random((5, 3))
    pixels = _problems(rng, matrix, 500)
    ours = Unmixer(matrix, method="ls").unmix(pixels)
    reference = np.linalg.lstsq(matrix, pixels.astype(np.float64), rcond=None)[0]
    np.testing.assert_allclose(ours, reference, rtol=1e-5, atol=1e-3)


def test_nnls_equals_ls_where_ls_is_non_negative():
    rng = np.random.default_rng(4)
    matrix = rng.random((4, 3)) + np.eye(4, 3)
    pixels = _problems(rng, matrix, 5000)
    ls = Unmixer(matrix, method="ls").unmix(pixels)
    exact = Unmixer(matrix).unmix(pixels)
    inside = np.all(ls >= 0, axis=0)
    assert inside.mean() > 0.1 and (~inside).mean() > 0.1
    np.testing.assert_allclose(exact[:, inside], ls[:, inside], rtol=1e-5, atol=1e-3)
    assert exact.min() >= 0


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
    # unmix(mix(a)) == a for non-negative a.
    rng = np.random.default_rng(5)
    matrix = np.array([[1.0, 0.3, 0.02], [0.12, 1.0, 0.35], [0.0, 0.04, 1.0], [0.05, 0.2, 0.5]])
    abundances = np.maximum(rng.normal(50, 80, size=(3, 64, 64)), 0).astype(np.float32)
    mixed = np.tensordot(matrix, abundances, axes=(1, 0)) + np.array([100.0, 90, 110, 95])[:, None, None]
    back = Unmixer(matrix).unmix(mixed.astype(np.float32), background=[100.0, 90, 110, 95])
    np.testing.assert_allclose(back, abundances, atol=2e-3)


def test_nan_pixels_give_nan_everywhere():
    matrix = np.array([[1.0, 0.2], [0.3, 1.0]])
    pixels = np.ones((2, 4), np.float32)
    pixels[1, 1] = np.nan
    pixels[0, 3] = np.inf
    for method in ("nnls", "ls"):
        out = Unmixer(matrix, method=method).unmix(pixels)
        assert np.isnan(out[:, [1, 3]]).all() and np.isfinite(out[:, [0, 2]]).all()


@pytest.mark.parametrize("n_labels", [2, 3, 4, 5])
def test_many_tiles_and_threads_match_scipy(n_labels):
    # Reference: scipy.optimize.nnls, on pixels spread over several tiles of
    # the kernel, split among threads at boundaries that are not tile-aligned,
    # in every pixel type the kernel is compiled for.
    rng = np.random.default_rng(n_labels)
    matrix = np.eye(n_labels + 1, n_labels) + 0.3 * rng.random((n_labels + 1, n_labels))
    pixels = np.clip(_problems(rng, matrix, 5003) + 50, 0, None)
    for dtype in (np.float32, np.float64, np.uint16):
        y = pixels.astype(dtype)
        ours = Unmixer(matrix).unmix(y, background=np.full(n_labels + 1, 50.0), threads=3)
        for i in rng.choice(y.shape[1], 300, replace=False):
            reference, _ = nnls(matrix, y[:, i].astype(np.float64) - 50.0)
            np.testing.assert_allclose(ours[:, i], reference, atol=1e-3 * np.abs(y[:, i]).max())


@pytest.mark.parametrize("matrix, message", [
    (np.ones((2, 3)), "fewer channels"),
    (np.array([[1.0, 2.0], [2.0, 4.0], [3.0, 6.0]]), "rank-deficient"),
    (np.ones((10, 9)), "at most 8"),
])
def test_unusable_matrices_refused(matrix, message):
    with pytest.raises(ValueError, match=message):
        Unmixer(matrix)


def test_generated_kernels_are_current():
    # The committed unrolled kernels must be what the generator writes now.
    from unmix.engine import codegen
    assert codegen.TARGET.read_text(encoding="utf-8") == codegen.source(), \
        "run: python -m unmix.engine.codegen"
