"""The napari plugin in a real viewer (Xvfb + Mesa on a machine without a screen).

Each widget is driven programmatically on the demo data; results are checked against the
library called directly, and a screenshot of each docked widget is kept under tests/artifacts.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

if not os.environ.get("CI"):  # in CI these tests must run: a missing napari or screen is a failure
    pytest.importorskip("napari")
    if not os.environ.get("DISPLAY"):
        pytest.skip("no screen: run under xvfb-run (./dev.sh test does)", allow_module_level=True)
import napari  # noqa: E402, F401  (imported so that CI fails at once when napari is missing)

from unmix.measure.controls import MeasureSettings, measure_matrix  # noqa: E402
from unmix.engine.solver import Unmixer  # noqa: E402
from unmix_napari import layers  # noqa: E402
from unmix_napari.layers import SESSION_MATRIX, channel_groups, layer_image, session  # noqa: E402
from unmix_napari.measure_widget import MeasureWidget  # noqa: E402
from unmix_napari.overlap_widget import OverlapWidget  # noqa: E402
from unmix_napari.prediction_widget import PredictionWidget  # noqa: E402
from unmix_napari.unmix_widget import UnmixWidget  # noqa: E402

ARTIFACTS = Path(__file__).parent / "artifacts"
CONFIGS = Path(__file__).parent.parent / "configs"
WAIT_MS = 120_000


@pytest.fixture
def errors(monkeypatch):
    """Error notifications shown by the widgets."""
    shown = []
    monkeypatch.setattr(layers, "show_error", lambda message: shown.append(str(message)))
    return shown


@pytest.fixture
def viewer(make_napari_viewer):
    viewer = make_napari_viewer(show=True)
    viewer.open_sample("unmix", "demo")
    return viewer


def _screenshot(viewer, widget, name):
    viewer.window.remove_dock_widget("all")  # only this widget docked
    viewer.window.add_dock_widget(widget, name=name, area="right")
    viewer.window._qt_window.resize(1500, 1050)
    from qtpy.QtWidgets import QApplication

    for _ in range(5):  # let Qt lay the docked widget out before the picture is taken
        QApplication.processEvents()
    viewer.reset_view()
    # The panel's contents fit its width: they scroll up and down, never sideways.
    from qtpy.QtWidgets import QScrollArea

    scroll = widget.findChild(QScrollArea)
    assert not scroll.horizontalScrollBar().isVisible(), f"{name}: contents wider than the panel"
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / f"napari_{name.lower().replace(' ', '_')}.png"
    viewer.screenshot(str(path), canvas_only=False)
    assert path.stat().st_size > 10_000


def _screenshot_viewer(viewer, name):
    viewer.window._qt_window.resize(1500, 1050)
    from qtpy.QtWidgets import QApplication

    for _ in range(5):
        QApplication.processEvents()
    viewer.reset_view()
    ARTIFACTS.mkdir(exist_ok=True)
    viewer.screenshot(str(ARTIFACTS / name), canvas_only=False)
    assert (ARTIFACTS / name).stat().st_size > 10_000


def _measured(qtbot, viewer):
    widget = MeasureWidget(viewer)
    # The three fields of each label, as three rows with the same label name.
    widget.set_controls({label: [f"control {label} {field}" for field in (1, 2, 3)]
                         for label in ("Pondpetal", "Fernlight", "Emberin")})
    widget.unstained.setCurrentText("unstained")
    widget.bootstrap.setValue(200)
    widget.measure()
    qtbot.waitUntil(lambda: not widget.runner.busy and widget.matrix is not None, timeout=WAIT_MS)
    return widget


def _sample(viewer):
    """The demo sample (C, Y, X), from its channel layers."""
    return np.asarray(layer_image(channel_groups(viewer)["sample"]).data)


def test_sample_opens_as_one_layer_per_channel_named_and_coloured_by_it(viewer):
    names = [layer.name for layer in viewer.layers]
    assert "control Fernlight 3" in names and "unstained" in names and "sample" not in names
    channels = ["blue450", "green525", "orange600"]
    layers = [viewer.layers[f"sample {channel}"] for channel in channels]
    assert [layer.metadata["channel_names"] for layer in layers] == [[c] for c in channels]
    assert all(layer.visible and layer.blending == "additive" and layer.data.ndim == 2 for layer in layers)
    assert not any(viewer.layers[n].visible for n in names if n.startswith(("control", "unstained", "dark")))
    # Each channel in its own hue, the hue of the wavelength in its name: 450 nm blue, 525 nm green,
    # 600 nm orange (red above green, no blue), as any wavelength-to-colour table has them (from memory).
    tops = [np.asarray(layer.colormap.colors)[-1, :3] for layer in layers]
    assert np.argmax(tops[0]) == 2 and np.argmax(tops[1]) == 1 and tops[2][0] > tops[2][1] > tops[2][2] == 0
    # The channel layers are the shipped sample's channels (tifffile reads the file independently).
    import tifffile

    from unmix.demo import demo_inputs

    np.testing.assert_array_equal(_sample(viewer), tifffile.imread(demo_inputs()["sample"]))
    _screenshot_viewer(viewer, "napari_demo_sample_composite.png")


def test_measure_widget_equals_the_library(qtbot, viewer, errors):
    widget = _measured(qtbot, viewer)
    controls = {label: [layer_image(viewer.layers[f"control {label} {field}"]) for field in (1, 2, 3)]
                for label in ("Pondpetal", "Fernlight", "Emberin")}
    reference = measure_matrix(controls, unstained=layer_image(viewer.layers["unstained"]),
                               settings=MeasureSettings(n_boot=200))
    np.testing.assert_allclose(widget.matrix.matrix, reference.matrix)
    np.testing.assert_allclose(widget.matrix.ci95_high, reference.ci95_high)
    assert widget.table.rowCount() == 3 and "1 (primary)" in widget.table.item(0, 1).text()
    assert session(viewer).matrix is widget.matrix and not errors
    _screenshot(viewer, widget, "Measure")


def test_unmix_and_overlap_widgets(qtbot, viewer, errors, tmp_path):
    # Opened before the measurement, as a user docks all widgets first: the overlap widget fills its
    # label boxes when the matrix appears, and both widgets start on the sample, not a control.
    overlap = OverlapWidget(viewer)
    unmix = UnmixWidget(viewer)
    assert overlap.label_a.count() == 0
    assert unmix.image.currentText() == overlap.raw.currentText() == "sample"
    matrix = _measured(qtbot, viewer).matrix
    assert [overlap.label_a.itemText(i) for i in range(overlap.label_a.count())] == list(matrix.labels)
    assert (overlap.label_a.currentText(), overlap.label_b.currentText()) == matrix.labels[:2]
    unmix.matrix_source.setCurrentText(SESSION_MATRIX)
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy and "Emberin (unmixed)" in viewer.layers, timeout=WAIT_MS)
    expected = Unmixer(matrix.matrix).unmix(_sample(viewer), matrix.background)
    for k, label in enumerate(matrix.labels):
        np.testing.assert_array_equal(viewer.layers[f"{label} (unmixed)"].data, expected[k])
    # The demo sample saturates nowhere: no empty saturation layer.
    assert not (_sample(viewer) >= matrix.saturation[:, None, None]).any()
    assert not [layer for layer in viewer.layers if layer.name.startswith("saturated")]
    assert not any(viewer.layers[f"sample {c}"].visible for c in matrix.channels)  # the unmixed composite alone
    _screenshot(viewer, unmix, "Unmix")

    overlap.label_a.setCurrentText("Fernlight")
    overlap.label_b.setCurrentText("Emberin")
    overlap.rounds.setValue(199)
    overlap.compute()
    qtbot.waitUntil(lambda: not overlap.runner.busy and overlap.result is not None, timeout=WAIT_MS)
    assert overlap.result.verdict == "bleed-through-only"
    assert "bleed-through-only" in overlap.verdict.text() and overlap.verdict.text().startswith("✗")
    assert len(overlap.canvases) == 1 and not errors
    assert not overlap.form.isRowVisible(overlap.first)  # a plane: no range of planes to choose
    # Editing the mask recomputes: paint a labels layer and wait for a new result.
    mask = viewer.add_labels(np.zeros(viewer.layers["sample blue450"].data.shape, np.uint8), name="cells")
    overlap.mask.setCurrentText("cells")
    first = overlap.result
    mask.data = np.pad(np.ones((200, 200), np.uint8), ((50, 134), (50, 134)))
    qtbot.waitUntil(lambda: overlap.result is not first and not overlap.runner.busy, timeout=WAIT_MS)
    assert overlap.result.pixels <= 200 * 200
    _screenshot(viewer, overlap, "Overlap review")

    # The writer contribution: the unmixed layers as one OME-TIFF whose channels are the labels,
    # which the command line takes as the unmixed image of the sample (a real process).
    import subprocess
    import sys

    from unmix.demo import demo_inputs
    from unmix.io.images import read_image

    viewer.layers.selection = {viewer.layers[f"{label} (unmixed)"] for label in matrix.labels}
    written = viewer.layers.save(str(tmp_path / "unmixed.ome.tif"), selected=True, plugin="unmix")
    assert written and read_image(tmp_path / "unmixed.ome.tif").channel_names == matrix.labels
    matrix.save(tmp_path / "m.json")
    run = subprocess.run([sys.executable, "-m", "unmix.cli", "coloc", str(demo_inputs()["sample"]), "--matrix",
                          str(tmp_path / "m.json"), "--labels", "Fernlight,Emberin", "--unmixed",
                          str(tmp_path / "unmixed.ome.tif"), "--rounds", "19", "--quiet"],
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr


def test_overlap_review_of_a_z_stack_in_3d_and_per_time_point(qtbot, viewer, errors):
    # The demo's z-stack, judged by the widget in 3-D over its voxels, over a range of planes, and with
    # its extra axis taken as time; each result equals the library called directly on the same voxels.
    # Reference for the verdict: the scenario's simulated truth (Fernlight and Emberin placed
    # independently, Fernlight leaking into Emberin's channel: tests/test_demo.py).
    from unmix.coloc.verdict import judge_pair, prepare_image
    from unmix.demo import demo_inputs
    from unmix.io.images import read_image
    from unmix_napari.overlap_widget import TIME

    viewer.open_sample("unmix", "demo_stack")
    matrix = _measured(qtbot, viewer).matrix
    stack = np.asarray(read_image(demo_inputs()["sample_stack"]).data)
    np.testing.assert_array_equal(np.asarray(layer_image(channel_groups(viewer)["sample stack"]).data), stack)
    overlap = OverlapWidget(viewer)
    overlap.raw.setCurrentText("sample stack")
    assert overlap.form.isRowVisible(overlap.first) and (overlap.first.value(), overlap.last.value()) == (0, 7)
    overlap.label_a.setCurrentText("Fernlight")
    overlap.label_b.setCurrentText("Emberin")
    overlap.rounds.setValue(199)
    pair = ("Fernlight", "Emberin")

    def measured():
        previous = overlap.result
        overlap.compute()
        qtbot.waitUntil(lambda: not overlap.runner.busy and overlap.result is not previous, timeout=WAIT_MS)
        return overlap.result

    result = measured()
    reference = judge_pair(prepare_image(stack, matrix), pair, rounds=199, z_spacing=0.3)
    assert result.verdict == reference.verdict == "bleed-through-only"
    assert result.after_corrected.r == reference.after_corrected.r and len(result.planes) == 8
    assert result.depth_trend == reference.depth_trend and result.depth_trend["slope_per_um"] is not None
    assert "In 3-D, over the voxels of 8 planes" in overlap.verdict.text() and len(overlap.canvases) == 2
    _screenshot(viewer, overlap, "Overlap review z-stack")

    overlap.first.setValue(2)
    overlap.last.setValue(5)
    part = measured()
    reference = judge_pair(prepare_image(stack[:, 2:6], matrix), pair, rounds=199, z_spacing=0.3)
    assert len(part.planes) == 4 and part.after_corrected.r == reference.after_corrected.r
    assert part.verdict == reference.verdict

    overlap.stack_axis.setCurrentText(TIME)  # the same data read as a time series of planes
    assert overlap.first_label.text() == "First time point"
    overlap.first.setValue(1)
    overlap.last.setValue(3)
    summary = measured()
    assert summary["frames"] == [1, 2, 3] and len(overlap.results) == 3
    for t, result in zip(summary["frames"], overlap.results):
        reference = judge_pair(prepare_image(stack[:, t], matrix), pair, rounds=199)
        assert result.verdict == reference.verdict and result.after_corrected.r == reference.after_corrected.r
        assert result.planes is None  # each time point is one plane, judged in 2-D
    assert sum(summary["verdicts"].values()) == 3 and overlap.table.rowCount() == 3
    assert overlap.verdict.text().startswith("Per time point: ") and not errors
    _screenshot(viewer, overlap, "Overlap review time series")

    # A range upside down, and a mask of another stack's shape: a notification naming the fix each.
    overlap.first.setValue(3)
    overlap.last.setValue(1)
    overlap.compute()
    assert "range 3 to 1" in errors[-1] and "first no later than the last" in errors[-1]
    viewer.add_labels(np.ones((5, 128, 128), np.uint8), name="five planes")
    overlap.mask.setCurrentText("five planes")
    overlap.last.setValue(4)
    overlap.compute()
    assert "'five planes' has shape (5, 128, 128)" in errors[-1] and not overlap.runner.busy


def test_saturated_pixels_get_a_labels_layer_only_when_there_are_some(qtbot, make_napari_viewer, errors, tmp_path):
    viewer = make_napari_viewer()
    _matrix_file(tmp_path, saturation=np.full(3, 4095.0))
    rng = np.random.default_rng(0)
    plane = rng.integers(100, 3000, (3, 32, 32)).astype(np.uint16)
    plane[1, 5:8, 5:8] = 4095
    viewer.add_image(plane, name="img", metadata={"channel_names": ["blue450", "green525", "orange600"]})
    unmix = UnmixWidget(viewer)
    unmix.image.setCurrentText("img")
    unmix.matrix_source.setCurrentText("file")
    unmix.matrix_path.setText(str(tmp_path / "m.json"))
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy and "saturated (img)" in viewer.layers, timeout=WAIT_MS)
    assert int(viewer.layers["saturated (img)"].data.sum()) == 9
    viewer.layers["img"].data = np.minimum(plane, 4000)  # the same layer, now without saturation
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy and "saturated (img)" not in viewer.layers, timeout=WAIT_MS)
    assert not errors


def test_docked_widgets_are_tabs_and_the_image_keeps_its_room(viewer, qtbot):
    # Opened from the Plugins menu, as a user does (napari's own docking): the four widgets become
    # tabs of one dock, so the canvas keeps most of the window's width.
    from qtpy.QtWidgets import QApplication, QDockWidget

    window = viewer.window._qt_window
    window.resize(1500, 1050)
    names = ["Measure bleed-through", "Unmix", "Overlap review", "Predicted leakage"]
    docks = [viewer.window.add_plugin_dock_widget("unmix", name)[0] for name in names]
    for _ in range(10):
        QApplication.processEvents()
        qtbot.wait(20)
    assert all(isinstance(dock, QDockWidget) for dock in docks)
    tabbed = {d for d in window.tabifiedDockWidgets(docks[0])}
    assert tabbed == set(docks[1:])
    viewer.reset_view()
    ARTIFACTS.mkdir(exist_ok=True)
    viewer.screenshot(str(ARTIFACTS / "napari_four_widgets_docked.png"), canvas_only=False)
    # Stacked one under another they left the canvas about a quarter of the window (384 of 1500 px
    # here); as tabs it keeps more than the dock takes, beside napari's own layer docks.
    canvas = viewer.window._qt_viewer.canvas.native
    assert canvas.width() >= 0.45 * window.width() and canvas.width() > 1.3 * docks[0].width()


def test_prediction_widget_compares_with_the_measured_matrix(qtbot, viewer, errors):
    _measured(qtbot, viewer)
    widget = PredictionWidget(viewer)
    widget.path.setText(str(CONFIGS / "demo_optics.toml"))
    widget.predict()
    qtbot.waitUntil(lambda: not widget.runner.busy and widget.prediction is not None, timeout=WAIT_MS)
    verdicts = [widget.table.item(r, 5).text() for r in range(widget.table.rowCount())]
    assert "higher" in verdicts and "orange600" in widget.summary.text()
    assert widget.canvas is not None and not errors
    _screenshot(viewer, widget, "Predicted leakage")


def test_matrix_reader_gives_a_matrix_source(qtbot, viewer, errors, tmp_path):
    matrix = _measured(qtbot, viewer).matrix
    path = matrix.save(tmp_path / "m.json")
    viewer.open(str(path), plugin="unmix")
    layer = viewer.layers["matrix m.json"]
    assert layer.data.shape == (3, 3) and "unmix_matrix" in layer.metadata
    unmix = UnmixWidget(viewer)
    unmix.image.setCurrentText("sample")
    unmix.matrix_source.setCurrentText("matrix m.json")
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy, timeout=WAIT_MS)
    assert "Pondpetal (unmixed)" in viewer.layers and not errors


def test_bad_input_becomes_a_notification(qtbot, make_napari_viewer, errors):
    viewer = make_napari_viewer()
    viewer.add_image(np.zeros((2, 16, 16), np.uint16), name="two channels",
                     metadata={"channel_names": ["a", "b"]})
    unmix = UnmixWidget(viewer)
    unmix.image.setCurrentText("two channels")
    unmix.unmix()  # no matrix yet
    assert errors and "no matrix" in errors[-1]
    unmix.matrix_source.setCurrentText("file")
    unmix.matrix_path.setText(str(CONFIGS / "demo_optics.toml"))
    unmix.unmix()  # not a matrix file
    assert "demo_optics.toml" in errors[-1]
    overlap = OverlapWidget(viewer)
    overlap.compute()
    assert "no matrix" in errors[-1]
    measure = MeasureWidget(viewer)
    measure.set_controls({"A": "two channels", "B": "two channels"})
    measure.measure()
    qtbot.waitUntil(lambda: not measure.runner.busy, timeout=WAIT_MS)
    assert len(errors) >= 4 and measure.matrix is None  # reported, the viewer goes on
    prediction = PredictionWidget(viewer)
    prediction.predict()
    assert "description" in errors[-1]


def test_unmix_widget_keeps_dask_layers_lazy(qtbot, make_napari_viewer, errors, tmp_path):
    # A stack larger than memory stays a dask array: unmixed lazily, block by block.
    import dask.array as da

    viewer = make_napari_viewer()
    rng = np.random.default_rng(0)
    stack = rng.integers(100, 3000, (3, 4, 64, 64)).astype(np.uint16)  # C Z Y X
    viewer.add_image(da.from_array(stack, chunks=(1, 1, 64, 64)), name="big",
                     metadata={"channel_names": ["blue450", "green525", "orange600"]})
    from unmix.matrix import load_matrix

    path = _matrix_file(tmp_path)
    matrix = load_matrix(path)
    unmix = UnmixWidget(viewer)
    unmix.image.setCurrentText("big")
    unmix.matrix_source.setCurrentText("file")
    unmix.matrix_path.setText(str(path))
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy and "Emberin (unmixed)" in viewer.layers, timeout=WAIT_MS)
    layer = viewer.layers["Fernlight (unmixed)"]
    assert hasattr(layer.data, "compute") and not errors
    expected = Unmixer(matrix.matrix).unmix(stack, matrix.background)
    np.testing.assert_array_equal(np.asarray(layer.data), expected[1])


def _matrix_file(folder, saturation=None, noise_model=None):
    from unmix.matrix import BleedThroughMatrix

    values = np.array([[1.0, 0.02, 0.0], [0.25, 1.0, 0.0], [0.02, 0.39, 1.0]])
    return BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"),
                              labels=("Pondpetal", "Fernlight", "Emberin"),
                              primary={"Pondpetal": "blue450", "Fernlight": "green525", "Emberin": "orange600"},
                              matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01,
                              background=np.full(3, 100.0), background_source="dark",
                              saturation=saturation, noise_model=noise_model).save(folder / "m.json")


def test_unmix_widget_adds_standard_errors_as_hidden_layers(qtbot, make_napari_viewer, errors, tmp_path):
    # Noise-weighted, with standard errors: the same numbers as the library's solver (whose errors
    # are checked for coverage against seeded simulations in tests/test_uncertainty.py).
    from unmix.matrix import load_matrix

    viewer = make_napari_viewer()
    noise = {"read_variance": [25.0, 30.0, 20.0], "gain": [2.0, 2.5, 1.5], "source": "controls"}
    matrix = load_matrix(_matrix_file(tmp_path, noise_model=noise))
    plane = np.random.default_rng(3).integers(100, 3000, (3, 32, 32)).astype(np.uint16)
    viewer.add_image(plane, name="img", metadata={"channel_names": list(matrix.channels)})
    unmix = UnmixWidget(viewer)
    unmix.image.setCurrentText("img")
    unmix.matrix_source.setCurrentText("file")
    unmix.matrix_path.setText(str(tmp_path / "m.json"))
    unmix.weights.setCurrentText("noise")
    unmix.errors.setChecked(True)
    unmix.unmix()
    qtbot.waitUntil(lambda: not unmix.runner.busy and "Emberin (standard error)" in viewer.layers, timeout=WAIT_MS)
    expected, expected_errors = Unmixer.for_matrix(matrix, "nnls", "noise", True).solve(plane, matrix.background,
                                                                                       errors=True)
    for k, label in enumerate(matrix.labels):
        np.testing.assert_array_equal(viewer.layers[f"{label} (unmixed)"].data, expected[k])
        layer = viewer.layers[f"{label} (standard error)"]
        np.testing.assert_array_equal(layer.data, expected_errors[k])
        assert not layer.visible
    assert "standard errors" in unmix.status.text() and not errors



def test_measure_widget_autofluorescence_label_and_registration(qtbot, viewer, errors):
    # Two labels in three channels leave one for the cells' autofluorescence; a registration measured on a
    # bead layer (invented beads, no shift) is applied to the controls. Same result as the library.
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from fault_scenes import bead_field
    from unmix_napari.io import CHANNEL_NAMES

    from unmix.measure.registration import fit_from_beads

    from fault_scenes import cells, mixed_field

    names = ["blue450", "green525", "orange600"]
    viewer.add_image(bead_field(1, [(0.0, 0.0)] * 3), name="beads", metadata={CHANNEL_NAMES: names})
    rng = np.random.default_rng(2)
    _, glow = cells(rng, (256, 256))
    viewer.add_image(mixed_field(rng, np.array([[0.5], [1.0], [0.7]]), [glow * 300]), name="glowing cells",
                     metadata={CHANNEL_NAMES: names})  # an unstained specimen whose cells autofluoresce
    widget = MeasureWidget(viewer)
    widget.set_controls({label: [f"control {label} 1", f"control {label} 2"] for label in ("Pondpetal", "Fernlight")})
    widget.unstained.setCurrentText("glowing cells")
    widget.autofluorescence.setText("Glow")
    widget.bootstrap.setValue(200)
    widget.beads.setCurrentText("beads")
    widget.align()
    qtbot.waitUntil(lambda: not widget.runner.busy and widget.registration is not None, timeout=WAIT_MS)
    widget.measure()
    qtbot.waitUntil(lambda: not widget.runner.busy and widget.matrix is not None, timeout=WAIT_MS)
    assert widget.matrix.labels == ("Pondpetal", "Fernlight", "Glow") and not errors, errors
    registration = fit_from_beads([layer_image(viewer.layers["beads"])])
    controls = {label: [layer_image(viewer.layers[f"control {label} {field}"]) for field in (1, 2)]
                for label in ("Pondpetal", "Fernlight")}
    reference = measure_matrix(controls, unstained=layer_image(viewer.layers["glowing cells"]), autofluorescence="Glow",
                               registration=registration, settings=MeasureSettings(n_boot=200))
    np.testing.assert_allclose(widget.matrix.matrix, reference.matrix)
    assert widget.matrix.qc["labels"]["Glow"]["role"] == "autofluorescence"
