"""Colocalization of z-stacks and time series: 3-D coefficients, the XY-only randomisation, the depth
profile, projections, time-lapse checks, and the command on stacks."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from pair_scenes import ANISOTROPIC, measured_matrix, pair_scene, series_matrix, time_series, write_stack
from scipy import ndimage, stats

from unmix.cli import main
from unmix.coloc import statistics as coloc
from unmix.coloc.sums import Moments, Spectra
from unmix.coloc.verdict import analyse_pair



def _independent_stack(seed, shape=(12, 64, 64)):
    rng = np.random.default_rng(seed)
    a = ndimage.gaussian_filter(rng.normal(size=shape), ANISOTROPIC)
    b = ndimage.gaussian_filter(rng.normal(size=shape), ANISOTROPIC)
    return a, b


def test_3d_coefficients_against_scikit_image_and_scipy():
    # References: skimage.measure.pearson_corr_coeff, manders_coloc_coeff, manders_overlap_coeff on the
    # flattened voxels; scipy.stats.spearmanr.
    from skimage.measure import manders_coloc_coeff, manders_overlap_coeff, pearson_corr_coeff

    rng = np.random.default_rng(1)
    shared = ndimage.gaussian_filter(rng.random((10, 48, 48)), ANISOTROPIC)
    a = 100 * shared + ndimage.gaussian_filter(rng.random((10, 48, 48)), 2) * 50
    b = 80 * shared + ndimage.gaussian_filter(rng.random((10, 48, 48)), 2) * 60
    mask = np.zeros(a.shape, bool)
    mask[2:9, 5:40, 8:44] = True
    result = coloc.coefficients(a, b, mask, thresholds=(40.0, 35.0), rounds=0)
    flat_a, flat_b = a[mask], b[mask]
    assert result.pearson == pytest.approx(pearson_corr_coeff(flat_a, flat_b)[0], rel=1e-9)
    assert result.spearman == pytest.approx(stats.spearmanr(flat_a, flat_b)[0], rel=1e-9)
    assert result.manders_m1 == pytest.approx(manders_coloc_coeff(flat_a, flat_b > 35.0), rel=1e-9)
    assert result.manders_m2 == pytest.approx(manders_coloc_coeff(flat_b, flat_a > 40.0), rel=1e-9)
    assert result.overlap == pytest.approx(manders_overlap_coeff(flat_a, flat_b), rel=1e-9)
    # Costes' thresholds of a stack equal those of its voxels laid out as one plane.
    as_plane = coloc.coefficients(flat_a[None, :], flat_b[None, :], rounds=0)
    assert coloc.coefficients(a, b, mask, rounds=0).thresholds == pytest.approx(as_plane.thresholds)


@pytest.mark.parametrize("masked", [True, False])
def test_same_xy_shift_on_every_plane_equals_np_roll_per_plane(masked):
    # Every plane shifted by the same (dy, dx), no wrap between planes: numpy.roll per plane, then one
    # Pearson r over all voxels (numpy.corrcoef). A partial mask and the whole plane take different
    # paths through the Fourier sums.
    a, b = _independent_stack(2, (5, 32, 40))
    b = b + 0.4 * a
    mask = np.ones(a.shape, bool)
    if masked:
        mask[:, :4] = False
    spectra, moments = Spectra(a.shape[1:]), Moments()
    for z in range(a.shape[0]):
        spectra.add(a[z], b[z], mask[z])
        moments.add(a[z][mask[z]], b[z][mask[z]])
    shifted = spectra.shifted_correlations(moments)
    for dy, dx in ((0, 0), (3, 7), (31, 1), (16, 20)):
        rolled = np.roll(b, (-dy, -dx), axis=(1, 2))
        expected = np.corrcoef(a[mask], rolled[mask])[0, 1]
        assert shifted[dy, dx] == pytest.approx(expected, abs=1e-9)


@pytest.mark.slow
def test_3d_randomisation_of_independent_labels_is_uniform():
    # 200 seeded independent pairs with an anisotropic blur: p uniform (scipy.stats.kstest) and the
    # false-positive rate at alpha = 0.05 inside the binomial 95 % range (scipy.stats.binom).
    p_values = []
    for seed in range(200):
        a, b = _independent_stack(100 + seed, (8, 48, 48))
        p_values.append(coloc.coefficients(a, b, rounds=199, seed=seed).p_value)
    assert stats.kstest(p_values, "uniform").pvalue > 0.01
    false = sum(p < 0.05 for p in p_values)
    assert stats.binom.ppf(0.025, 200, 0.05) <= false <= stats.binom.ppf(0.975, 200, 0.05)


def test_a_projection_inflates_co_occurrence_of_independent_labels():
    # Bolte & Cordelieres (2006): a maximum projection stacks several depths, so independent sparse
    # labels appear to co-occur. Manders M1 of the projection is well above that of the 3-D voxels.
    rng = np.random.default_rng(3)
    shape = (24, 64, 64)
    spots = [np.zeros(shape) for _ in range(2)]
    for image in spots:
        image[tuple(rng.integers(0, n, 120) for n in shape)] = 1.0
    a, b = (ndimage.gaussian_filter(s, ANISOTROPIC) for s in spots)
    # Thresholds at a tenth of each image's peak: a spot counts where it stands out (common practice).
    three_d = coloc.coefficients(a, b, thresholds=(0.1 * a.max(), 0.1 * b.max()), rounds=0)
    pa, pb = a.max(axis=0), b.max(axis=0)
    projected = coloc.coefficients(pa, pb, thresholds=(0.1 * pa.max(), 0.1 * pb.max()), rounds=0)
    assert projected.manders_m1 > 2 * three_d.manders_m1
    assert projected.overlap > 2 * three_d.overlap


def test_z_stack_verdicts_and_depth_profile():
    # A 3-D field: bleed-through only in one pair, real overlap inflated in the other.
    scene = pair_scene(31, r=0.0, peak_a=2000, ratio=0.3, leak=0.3, shape=(6, 96, 96), psf_sigma=ANISOTROPIC)
    result = analyse_pair(scene.raw, measured_matrix(scene, 31), ("A", "B"), z_spacing=0.4)
    assert result.verdict == "bleed-through-only"
    assert result.dimensions.startswith("3-D, 6 planes")
    assert len(result.planes) == 6 and all(p["voxels"] > 0 for p in result.planes)
    assert result.depth_trend["flagged"] is False
    assert result.depth_trend["slope_per_um"] == pytest.approx(result.depth_trend["slope_per_plane"] / 0.4)
    scene = pair_scene(32, r=0.4, peak_a=2000, ratio=0.5, leak=0.3, shape=(6, 96, 96), psf_sigma=ANISOTROPIC)
    result = analyse_pair(scene.raw, measured_matrix(scene, 32), ("A", "B"))
    assert result.verdict == "inflated"
    low, high = result.after_corrected.interval
    assert low <= scene.true_r <= high


def test_a_trend_with_depth_is_flagged():
    # The labels share structure near the top of the stack only (an axial shift or scattering would do
    # the same): the corrected r falls with depth and the trend says so.
    rng = np.random.default_rng(5)
    from pair_scenes import BACKGROUND_E, GAIN, OFFSET, READ_NOISE, structure

    shape = (8, 96, 96)
    s1, s2 = structure(rng, shape, ANISOTROPIC), structure(rng, shape, ANISOTROPIC)
    share = np.linspace(0.9, 0.0, shape[0])[:, None, None]
    electrons = np.stack([1500 * s1, 1500 * (share * s1 + (1 - share) * s2)])
    raw = GAIN * rng.poisson(electrons + BACKGROUND_E) + rng.normal(0, GAIN * READ_NOISE, electrons.shape) + OFFSET
    from pair_scenes import PairScene

    scene = PairScene(raw=raw, abundances=GAIN * electrons, matrix=np.eye(2), background=np.full(2, OFFSET + GAIN
                                                                                                    * BACKGROUND_E),
                      true_r=0.0)
    result = analyse_pair(raw, measured_matrix(scene, 5), ("A", "B"))
    trend = result.depth_trend
    assert trend["flagged"] and trend["slope_per_plane"] < -0.05 and "depth" in trend["note"]
    values = [p["pearson_noise_corrected"] for p in result.planes]
    assert values[0] > 0.7 and values[-1] < 0.2


def test_coloc_command_on_a_stack_with_ranges_and_masks(tmp_path, capsys):
    scene = pair_scene(41, r=0.0, peak_a=2000, ratio=0.3, leak=0.3, shape=(5, 64, 64), psf_sigma=ANISOTROPIC)
    measured_matrix(scene, 41).save(tmp_path / "m.json")
    stack = write_stack(tmp_path / "stack.ome.tif", scene.raw, z_um=0.5)
    base = ["coloc", str(stack), "--matrix", str(tmp_path / "m.json"), "--labels", "A,B", "--rounds", "99"]
    assert main(base + ["--json", str(tmp_path / "all.json"), "--csv", str(tmp_path / "all.csv")]) == 0
    record = json.loads((tmp_path / "all.json").read_text())
    assert record["dimensions"].startswith("3-D, 5 planes") and record["planes"] == [0, 4]
    assert len(record["plane_profile"]) == 5 and record["depth_trend"]["slope_per_um"] is not None
    assert "depth_trend_per_plane" in (tmp_path / "all.csv").read_text().splitlines()[0]
    assert main(base + ["--planes", "1:3", "--json", str(tmp_path / "part.json")]) == 0
    part = json.loads((tmp_path / "part.json").read_text())
    assert part["planes"] == [1, 3] and len(part["plane_profile"]) == 3
    capsys.readouterr()
    assert main(base + ["--plane", "2", "--json", str(tmp_path / "one.json")]) == 0
    one = json.loads((tmp_path / "one.json").read_text())
    assert one["dimensions"] == "2-D plane" and one["planes"] == [2, 2]
    # A 3-D mask of the stack's shape, and a plane mask for every plane, give the same measurement.
    mask = np.zeros((5, 64, 64), np.uint8)
    mask[:, 10:50, 5:60] = 1
    tifffile.imwrite(tmp_path / "mask3d.tif", mask)
    tifffile.imwrite(tmp_path / "mask2d.tif", mask[0])
    for name in ("mask3d", "mask2d"):
        assert main(base + ["--mask", str(tmp_path / f"{name}.tif"), "--json", str(tmp_path / f"{name}.json")]) == 0
    r3, r2 = (json.loads((tmp_path / f"{n}.json").read_text()) for n in ("mask3d", "mask2d"))
    assert r3["after"]["pearson_noise_corrected"] == pytest.approx(r2["after"]["pearson_noise_corrected"])
    assert r3["pixels"] == 5 * 40 * 55


def test_stack_bad_input_and_warnings(tmp_path, capsys):
    scene = pair_scene(42, r=0.0, peak_a=1000, shape=(4, 48, 48), psf_sigma=ANISOTROPIC)
    measured_matrix(scene, 42).save(tmp_path / "m.json")
    stack = write_stack(tmp_path / "stack.ome.tif", scene.raw)
    base = ["coloc", str(stack), "--matrix", str(tmp_path / "m.json"), "--labels", "A,B", "--rounds", "19"]
    for extra, words in ((["--planes", "2:9"], "--planes 2:9"), (["--plane", "7"], "--plane 7"),
                         (["--frames", "0:3"], "--frames 0:3"), (["--planes", "x"], "FIRST:LAST")):
        capsys.readouterr()
        assert main(base + extra) == 2
        err = capsys.readouterr().err.strip().splitlines()
        errors = [line for line in err if line.startswith("error:")]
        assert len(errors) == 1 and words in errors[0]
        assert all(line.startswith("warning:") for line in err if line not in errors)
    tifffile.imwrite(tmp_path / "bad_mask.tif", np.ones((3, 48, 48), np.uint8))
    assert main(base + ["--mask", str(tmp_path / "bad_mask.tif")]) == 2
    err = capsys.readouterr().err
    assert "bad_mask.tif" in err and "shape" in err
    tifffile.imwrite(tmp_path / "float_objects.tif", np.full((48, 48), 1.5, np.float32))
    assert main(base + ["--objects", str(tmp_path / "float_objects.tif")]) == 2
    assert "non-integer" in capsys.readouterr().err
    # No voxel size: a warning, depths in planes.
    assert main(base + ["--quiet"]) == 0
    assert "no voxel size" in capsys.readouterr().err
    # A stack with one plane is measured as a plane, and says so.
    single = tmp_path / "single.tif"
    tifffile.imwrite(single, np.round(scene.raw[:, :1]).astype(np.uint16))  # plain TIFF, axes given
    assert main(["coloc", str(single), "--matrix", str(tmp_path / "m.json"), "--labels", "A,B", "--rounds", "19",
                 "--axes", "CZYX", "--channel-names", "ch0,ch1", "--json", str(tmp_path / "single.json"),
                 "--quiet"]) == 0
    assert "measured as a 2-D plane" in capsys.readouterr().err
    assert json.loads((tmp_path / "single.json").read_text())["dimensions"] == "2-D plane"


def test_time_series_verdict_per_frame_with_bleaching_and_fit_checks(tmp_path, capsys):
    data, matrix = time_series(51, frames=4, bleach=0.15, photoconvert=0.5)
    matrix_path = series_matrix(matrix, tmp_path / "m.json")
    path = write_stack(tmp_path / "series.ome.tif", data, axes="TCZYX", names=("c0", "c1", "c2"))
    assert main(["coloc", str(path), "--matrix", str(matrix_path), "--labels", "A,B", "--rounds", "99", "--json",
                 str(tmp_path / "t.json")]) == 0
    document = json.loads((tmp_path / "t.json").read_text())
    assert [r["frame"] for r in document["results"]] == [0, 1, 2, 3]
    summary = document["time_summaries"][0]
    assert sum(summary["verdicts"].values()) == 4
    assert summary["bleaching"]["A"]["flagged"] and not summary["bleaching"]["B"]["flagged"]
    assert summary["bleaching"]["A"]["fall"] == pytest.approx(1 - 0.85**3, abs=0.03)
    assert summary["residual"]["flagged"] and "no longer fits" in summary["residual"]["note"]
    out = capsys.readouterr().out
    assert "bleaching" in out and "no longer fits" in out
    # Without those faults nothing is flagged; --frames picks time points.
    clean, _ = time_series(52, frames=3)
    path = write_stack(tmp_path / "clean.ome.tif", clean, axes="TCZYX", names=("c0", "c1", "c2"))
    assert main(["coloc", str(path), "--matrix", str(matrix_path), "--labels", "A,B", "--rounds", "99",
                 "--frames", "1:2", "--json", str(tmp_path / "c.json")]) == 0
    document = json.loads((tmp_path / "c.json").read_text())
    assert [r["frame"] for r in document["results"]] == [1, 2]
    summary = document["time_summaries"][0]
    assert not summary["bleaching"]["A"]["flagged"] and not summary["residual"]["flagged"]
    ratios = summary["residual"]["ratio"]
    assert all(0.8 < r < 1.2 for r in ratios)  # a fitting matrix leaves what noise leaves


def test_depth_and_time_figures_draw(tmp_path):
    # The report's curves: a z-stack result's plane profile and a time series summary (PNG written).
    from unmix.report.plots import depth_profile_figure, save_png, time_figure

    scene = pair_scene(61, r=0.3, peak_a=1500, leak=0.3, shape=(4, 64, 64), psf_sigma=ANISOTROPIC)
    record = analyse_pair(scene.raw, measured_matrix(scene, 61), ("A", "B"), rounds=49).to_dict()
    record["plane_profile"], record["planes"] = record.pop("planes"), [0, 3]
    assert save_png(depth_profile_figure(record), tmp_path / "depth.png").stat().st_size > 0
    summary = {"pair": ["A$x^$", "B"], "frames": [0, 1, 2], "pearson_noise_corrected": [0.3, None, 0.28],
               "intervals": [[0.25, 0.35], None, [0.2, 0.36]], "bleach_limit": 0.2,
               "bleaching": {"A$x^$": {"mean_signal": [100.0, 80.0, 60.0], "flagged": True},
                             "B": {"mean_signal": [50.0, 50.0, 49.0], "flagged": False}}}
    assert save_png(time_figure(summary), tmp_path / "time.png").stat().st_size > 0


def test_compiled_kernels_stay_inside_their_arrays(tmp_path):
    # numba does not check indices unless asked (NUMBA_BOUNDSCHECK=1, numba documentation): run the
    # colocalization of a plane and of a stack, with and without a mask, in a fresh process that checks
    # every index (and compiles afresh, in its own cache folder).
    import os
    import subprocess
    import sys
    from pathlib import Path

    script = """
import sys
sys.path.insert(0, {tests!r})
import numpy as np
from pair_scenes import measured_matrix, pair_scene
from unmix.coloc.verdict import analyse_pair
for shape in ((48, 48), (3, 32, 32)):
    scene = pair_scene(1, r=0.3, shape=shape, psf_sigma=1.5)
    matrix = measured_matrix(scene, 1)
    mask = np.ones(shape, bool)
    mask[..., :5] = False
    for region in (None, mask):
        analyse_pair(scene.raw, matrix, ("A", "B"), rounds=19, mask=region)
print("ok")
""".format(tests=str(Path(__file__).parent))
    env = {**os.environ, "NUMBA_BOUNDSCHECK": "1", "NUMBA_CACHE_DIR": str(tmp_path / "cache")}
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=900)
    assert run.returncode == 0 and run.stdout.strip().endswith("ok"), run.stderr[-2000:]
