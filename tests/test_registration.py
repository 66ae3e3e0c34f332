"""Chromatic registration: shifts measured on beads or controls, and applied before measuring and unmixing."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from scipy import ndimage

from fault_scenes import bead_field, fault_control
from unmix.errors import InputError
from unmix.io.images import Image
from unmix.measure.controls import MeasureSettings, measure_matrix
from unmix.measure.registration import (Registration, channel_shift, fit_from_beads, fit_from_controls, high_pass,
                                        load_registration, register_plane, register_stack)

FAST = MeasureSettings(n_boot=300)
CHANNELS = ("a", "b", "c", "d")
TRUE_SHIFTS = [(0.0, 0.0), (0.43, -0.71), (1.27, 0.18), (-0.62, 2.09)]  # content displacement (dy, dx) per channel


def test_channel_shift_agrees_with_scikit_image_on_shifted_copies():
    # Reference: scikit-image's phase_cross_correlation on the same windows, and the known shift of a copy
    # moved by scipy.ndimage.shift (cubic spline): within 0.05 px.
    from skimage.registration import phase_cross_correlation

    rng = np.random.default_rng(1)
    image = np.zeros((128, 128))
    image[tuple(rng.integers(10, 118, (2, 40)))] = 1.0
    image = ndimage.gaussian_filter(image, 1.5)  # bead-like spots
    for shift in ((0.3, -1.2), (2.45, 0.8)):
        moved = ndimage.shift(image, shift, order=3, mode="wrap")
        ours, _ = channel_shift(high_pass(image), high_pass(moved), upsample=20)
        theirs, _, _ = phase_cross_correlation(high_pass(image), high_pass(moved), upsample_factor=20,
                                               normalization=None)
        np.testing.assert_allclose(ours, theirs)
        np.testing.assert_allclose(ours, -np.asarray(shift), atol=0.05)


def test_fourier_shift_matches_scipy_and_keeps_noise_white():
    # Reference: scipy.ndimage.shift (cubic spline) on a smooth image, away from the edges; white noise moved
    # by a half pixel stays white (neighbour correlation about 0, variance kept), which interpolation would not.
    from unmix.measure.registration import _fourier_shift

    rng = np.random.default_rng(2)
    image = ndimage.gaussian_filter(rng.random((96, 112)), 3.0)
    ours = _fourier_shift(image, (0.3, -1.7))
    reference = ndimage.shift(image, (0.3, -1.7), order=3, mode="nearest")
    np.testing.assert_allclose(ours[10:-10, 10:-10], reference[10:-10, 10:-10], atol=5e-3 * np.ptp(image))
    noise = rng.normal(0, 1, (256, 256))
    moved = _fourier_shift(noise, (0.5, 0.5))
    assert abs(np.corrcoef(moved[:, :-1].ravel(), moved[:, 1:].ravel())[0, 1]) < 0.02
    assert moved.std() == pytest.approx(1.0, rel=0.02)
    interpolated = ndimage.shift(noise, (0.5, 0.5), order=1)
    assert np.corrcoef(interpolated[:, :-1].ravel(), interpolated[:, 1:].ravel())[0, 1] > 0.3


def _beads(seed=1, shifts=TRUE_SHIFTS, **options):
    return Image(bead_field(seed, shifts, **options), "CYX", CHANNELS[:len(shifts)], source=f"beads{seed}.tif")


def test_shifts_from_beads_recover_the_known_shifts():
    # Simulation with known truth: each channel's beads displaced by a known sub-pixel shift; the
    # registration moves them back (shift = minus the displacement) to within 0.05 px.
    registration = fit_from_beads([_beads(1), _beads(2)])
    np.testing.assert_allclose(registration.shifts[:, 1:], -np.array(TRUE_SHIFTS), atol=0.05)
    assert registration.reference == "a" and np.all(registration.residual_px < 0.1)


def test_affine_from_beads_recovers_a_magnification_difference():
    # Channel b is magnified by 0.5 % about the centre (lateral chromatic aberration grows with the distance
    # from the axis): its displacement is 0.005 x (position - centre), up to 1.3 px at the corners.
    shape = (512, 512)
    rng = np.random.default_rng(3)
    image = np.zeros(shape)
    image[tuple(rng.integers(16, 496, (2, 150)))] = 1.0
    image = ndimage.gaussian_filter(image, 1.2) * 3000
    centre = (np.array(shape) - 1) / 2
    magnified = ndimage.affine_transform(image, np.eye(2) / 1.005, centre - centre / 1.005, order=3)
    data = np.stack([image, magnified]) + 100 + rng.normal(0, 4, (2,) + shape)
    registration = fit_from_beads([Image(data.astype(np.float32), "CYX", ("a", "b"))], affine=True)
    linear = registration.affine[1, :, :2]
    np.testing.assert_allclose(linear, -0.005 * np.eye(2), atol=0.001)
    np.testing.assert_allclose(registration.affine[1, :, 2], 0.0, atol=0.05)


def test_axial_offset_from_bead_stacks():
    # z-stacks of beads, channel b one and a half planes deeper: recovered within 0.1 plane.
    stack = bead_field(4, [(0.0, 0.0, 0.0), (1.5, 0.3, 0.0)], shape=(24, 128, 128), beads=30)
    registration = fit_from_beads([Image(stack, "CZYX", ("a", "b"))])
    np.testing.assert_allclose(registration.shifts[1], [-1.5, -0.3, 0.0], atol=0.1)


def test_shifts_from_controls_chain_the_channels():
    # Three channels; label A (primary a) leaks into b, label B (primary b) into c: the shift of c against a
    # follows from the two ties (known displacements b: +0.8 px in x, c: +0.8 - 0.5 px).
    a = fault_control(1, leaks=(0.3, 0.0), shift=(0.0, 0.8))
    b_data = fault_control(2, leaks=(0.4,), shift=(0.0, -0.5))
    b = np.stack([np.full_like(b_data[0], 108), b_data[0], b_data[1]])
    b[1] = np.real(np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(b[1].astype(float)), (0.0, 0.8)))).round()
    b[2] = np.real(np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(b[2].astype(float)), (0.0, 0.8)))).round()
    names = ("a", "b", "c")
    registration = fit_from_controls({"A": [Image(a, "CYX", names)], "B": [Image(b, "CYX", names)]})
    np.testing.assert_allclose(registration.shifts[:, 2], [0.0, -0.8, -0.3], atol=0.1)


def test_too_few_beads_are_refused_naming_the_minimum():
    with pytest.raises(InputError, match=r"beads1.tif: 3 beads stand 10 noise SDs.*channel a.*need at least 5"):
        fit_from_beads([_beads(1, beads=3)])
    with pytest.raises(InputError, match=r"beads1.tif: 0 beads.*need at least 5"):
        fit_from_beads([_beads(1, peak=20.0)])


def test_registered_control_is_measured_within_its_interval():
    # A control whose leak channel is displaced by 1 px: refused without a registration; with the
    # registration measured on beads, the coefficient's 95 % interval covers the true 0.3 and the residual
    # shift reported is below 0.5 px.
    shift = (0.0, 1.0)
    fields = [Image(fault_control(s, shift=shift), "CYX", ("a", "b"), source=f"f{s}.tif") for s in range(2)]
    with pytest.raises(InputError, match="shifted 1.0"):
        measure_matrix({"A": fields}, settings=FAST)
    registration = fit_from_beads([_beads(1, [(0.0, 0.0), shift])])
    matrix = measure_matrix({"A": fields}, settings=FAST, registration=registration)
    assert matrix.ci95_low[1, 0] <= 0.3 <= matrix.ci95_high[1, 0]
    assert matrix.qc["registration_shift_px"][1][0] < 0.5


def test_register_stack_crops_and_keeps_saturated_pixels_saturated():
    registration = Registration(("a", "b"), "a", np.array([[0.0, 0.0, 0.0], [0.0, 0.0, -1.4]]), (64, 64))
    stack = np.full((2, 1, 64, 64), 100.0)
    stack[1, 0, 30, 30] = 4095
    out = register_stack(stack, ("a", "b"), registration, levels=np.array([4095.0, 4095.0]))
    assert out.shape == (2, 1, 62, 58)  # ceil(shift) + 1 px cropped on both sides of each axis
    # The pixel landed at x = 30 - 1.4 (x = 25.6 after the crop of 3, y = 29 after the crop of 1): still saturated.
    assert out[1, 0, 29, 25:27].max() == 4095 and np.count_nonzero(out[1] == 4095) <= 9


def test_register_plane_marks_uncovered_borders():
    registration = Registration(("a", "b"), "a", np.array([[0.0, 0.0, 0.0], [0.0, 2.5, 0.0]]), (32, 32))
    out = register_plane(np.ones((2, 32, 32)), ("a", "b"), registration)
    assert np.isnan(out[1, :3]).all() and np.isnan(out[1, -3:]).all() and np.isfinite(out[1, 3:-3]).all()
    assert np.isfinite(out[0]).all()


def test_registration_file_round_trip_and_checks(tmp_path):
    registration = fit_from_beads([_beads(1)])
    path = registration.save(tmp_path / "r.json")
    back = load_registration(path)
    np.testing.assert_allclose(back.shifts, registration.shifts)
    assert back.channels == CHANNELS and back.shape == (256, 256)
    with pytest.raises(InputError, match=r"x.tif: the registration was measured on 256 x 256 images, the image is "
                                         r"128 x 128"):
        back.check(CHANNELS, (4, 128, 128), "x.tif")
    with pytest.raises(InputError, match=r"x.tif: the registration has channels"):
        back.check(("a", "z"), (2, 256, 256), "x.tif")
    data = json.loads(path.read_text())
    data["shift"]["b"] = [0.0, "far"]
    (tmp_path / "bad.json").write_text(json.dumps(data))
    with pytest.raises(InputError, match="bad.json.*'shift'"):
        load_registration(tmp_path / "bad.json")


def test_align_measure_and_apply_from_the_command_line(tmp_path, capsys):
    # The whole chain on invented data: beads -> align -> measure --registration -> apply --registration.
    from unmix.cli import main
    from unmix.io.images import read_image, write_ome_tiff

    shift = (0.0, 1.0)
    write_ome_tiff(tmp_path / "beads.ome.tif", _beads(1, [(0.0, 0.0), shift]))
    for s in range(2):
        write_ome_tiff(tmp_path / f"c{s}.ome.tif", Image(fault_control(s, shift=shift), "CYX", ("a", "b")))
    assert main(["align", "--beads", str(tmp_path / "beads.ome.tif"), "-o", str(tmp_path / "r.json")]) == 0
    assert "dx (px)" in capsys.readouterr().out
    assert main(["measure", "--control", f"A={tmp_path / 'c0.ome.tif'},{tmp_path / 'c1.ome.tif'}",
                 "--registration", str(tmp_path / "r.json"), "-o", str(tmp_path / "m.json"), "--bootstrap", "200",
                 "--quiet"]) == 0
    matrix = json.loads((tmp_path / "m.json").read_text())
    assert matrix["ci95_low"][1][0] <= 0.3 <= matrix["ci95_high"][1][0]
    assert main(["apply", "--matrix", str(tmp_path / "m.json"), str(tmp_path / "c0.ome.tif"), "-o",
                 str(tmp_path / "out"), "--registration", str(tmp_path / "r.json"), "--quiet"]) == 0
    unmixed = np.asarray(read_image(tmp_path / "out" / "c0.unmixed.ome.tif").data)
    assert np.isnan(unmixed[:, :, -1]).all() and np.isfinite(unmixed[:, 5:-5, 5:-5]).all()
    provenance = json.loads(tifffile.TiffFile(tmp_path / "out" / "c0.unmixed.ome.tif").ome_metadata.split(
        "<Description>")[1].split("</Description>")[0].replace("&quot;", '"'))
    assert provenance["registration"]["source"] == "beads"


def test_apply_reads_neighbouring_planes_for_an_axial_shift(tmp_path):
    # A z-stack whose channel b shows a's content one plane deeper; the registration moves b up by one plane
    # (dz = -1). With an identity matrix the unmixed label of b then equals channel a plane by plane, and the
    # last plane of b, which has no plane below it, is NaN (simulation with known truth).
    from unmix.engine.batch import ApplySettings, apply_matrix
    from unmix.io.images import read_image, write_ome_tiff
    from unmix.matrix import BleedThroughMatrix

    rng = np.random.default_rng(9)
    volume = rng.uniform(100, 1000, (6, 32, 32)).astype(np.float32)
    b = np.empty_like(volume)
    b[1:], b[0] = volume[:-1], 100.0
    write_ome_tiff(tmp_path / "stack.ome.tif", Image(np.stack([volume, b]), "CZYX", ("a", "b")))
    matrix = BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("A", "B"), primary={"A": "a", "B": "b"},
                                matrix=np.eye(2), ci95_low=np.eye(2), ci95_high=np.eye(2), background=np.zeros(2),
                                background_source="dark")
    registration = Registration(("a", "b"), "a", np.array([[0.0, 0.0, 0.0], [-1.0, 0.0, 0.0]]), (32, 32))
    apply_matrix(matrix, [tmp_path / "stack.ome.tif"], tmp_path / "out",
                 settings=ApplySettings(method="ls", registration=registration))
    out = np.asarray(read_image(tmp_path / "out" / "stack.unmixed.ome.tif").data)  # (C, Z, Y, X)
    np.testing.assert_allclose(out[1, :-1], volume[:-1], rtol=1e-5)
    assert np.isnan(out[1, -1]).all()
