"""Dock widgets: they translate between napari layers and the unmix library, nothing more.

Long work runs in napari thread workers with a progress bar; every error
becomes a notification and leaves the viewer working. The measured matrix
and the unmixed layers are shared between the widgets of one viewer.
"""

from __future__ import annotations

import warnings
import weakref
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from napari.layers import Image as ImageLayer
from napari.layers import Labels as LabelsLayer
from napari.qt.threading import create_worker
from napari.utils.notifications import show_error, show_info
from qtpy.QtCore import Qt
from qtpy.QtWidgets import (QComboBox, QFileDialog, QFormLayout, QHBoxLayout, QLabel, QLineEdit, QPlainTextEdit,
                            QPushButton, QSpinBox, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from unmix.summary import matrix_rows

from .io import CHANNEL_NAMES, MATRIX_METADATA

NONE = "(none)"
SESSION_MATRIX = "measured in this session"
# Colormaps for unmixed labels, in order (distinct hues, colour-blind safe first).
LABEL_COLORMAPS = ("cyan", "magenta", "yellow", "green", "red", "blue", "bop orange", "gray")
# Verdict -> (symbol, background colour): colour-blind-safe hues, each with its own symbol and words.
VERDICT_LOOK = {
    "bleed-through-only": ("✗", "#E69F00"),
    "inflated": ("▼", "#F0E442"),
    "persists": ("✓", "#56B4E9"),
    "revealed": ("▲", "#CC79A7"),
    "none": ("○", "#BBBBBB"),
}


@dataclass
class _Session:
    matrix: object = None  # BleedThroughMatrix
    unmixed: dict = field(default_factory=dict)  # label -> layer name
    raw_layer: str | None = None


_SESSIONS: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def session(viewer) -> _Session:
    """The state shared by the widgets of one viewer."""
    if viewer not in _SESSIONS:
        _SESSIONS[viewer] = _Session()
    return _SESSIONS[viewer]


def _report(exc: BaseException) -> None:
    from unmix.errors import InputError

    if isinstance(exc, (InputError, ValueError, KeyError, OSError)):
        show_error(str(exc))
    else:
        show_error(f"internal error: {type(exc).__name__}: {exc}")


def _guarded(method):
    """Run a button handler; any error becomes a notification, never an exception in the event loop."""
    def handler(self, *args):
        try:
            return method(self)
        except Exception as exc:  # noqa: BLE001 - the viewer must keep working
            _report(exc)
            return None

    handler.__name__ = method.__name__
    handler.__doc__ = method.__doc__
    return handler


class _Worker:
    """Runs one function at a time in a napari thread worker, with napari's progress bar."""

    def __init__(self):
        self.busy = False
        self.worker = None

    def start(self, function, on_done, description: str):
        if self.busy:
            show_info("still working on the previous request")
            return
        self.busy = True
        # Handlers given at creation: with its own "errored" handler, the worker does not re-raise
        # into the event loop (the error becomes a notification instead).
        self.worker = create_worker(function, _progress={"desc": description},
                                    _connect={"returned": on_done, "errored": _report, "finished": self._finished})

    def _finished(self):
        self.busy = False


class _LayerChoice(QComboBox):
    """A drop-down of the viewer's layers of some types, kept current as layers come and go."""

    def __init__(self, viewer, types=(ImageLayer,), optional: bool = False):
        super().__init__()
        self.viewer, self.types, self.optional = viewer, types, optional
        viewer.layers.events.inserted.connect(self.refresh)
        viewer.layers.events.removed.connect(self.refresh)
        self.refresh()

    def refresh(self, *_):
        current = self.currentText()
        self.clear()
        if self.optional:
            self.addItem(NONE)
        self.addItems([layer.name for layer in self.viewer.layers if isinstance(layer, self.types)])
        if current:
            self.setCurrentText(current)

    def layer(self):
        name = self.currentText()
        if not name or name == NONE:
            return None
        if name not in self.viewer.layers:
            raise ValueError(f"layer {name!r} is no longer in the viewer; choose another")
        return self.viewer.layers[name]


def layer_image(layer, channel_axis: int = 0):
    """The library's Image for a multichannel image layer: channels first, names from metadata."""
    from unmix.images import Image

    if not isinstance(layer, ImageLayer):
        raise ValueError(f"layer {layer.name!r} is not an image layer; choose a multichannel image")
    data = layer.data
    if data.ndim < 3:
        raise ValueError(f"layer {layer.name!r} has {data.ndim} dimensions; a multichannel image has at least 3 "
                         "(channels, Y, X)")
    if not -data.ndim <= channel_axis < data.ndim:
        raise ValueError(f"channel axis {channel_axis} does not exist in layer {layer.name!r} ({data.ndim} dimensions)")
    data = np.moveaxis(data, channel_axis, 0) if channel_axis != 0 else data
    names = layer.metadata.get(CHANNEL_NAMES) or [f"ch{i}" for i in range(data.shape[0])]
    if len(names) != data.shape[0]:
        raise ValueError(f"layer {layer.name!r}: {len(names)} channel names for {data.shape[0]} channels")
    axes = "C" + "TZYX"[-(data.ndim - 1):]
    return Image(data, axes, tuple(names), source=layer.name)


def _table(widget: QTableWidget, header, rows) -> None:
    widget.clear()
    widget.setColumnCount(len(header))
    widget.setRowCount(len(rows))
    widget.setHorizontalHeaderLabels([str(h) for h in header])
    for r, row in enumerate(rows):
        for c, value in enumerate(row):
            item = QTableWidgetItem(str(value))
            item.setFlags(item.flags() & ~Qt.ItemFlag.ItemIsEditable)
            widget.setItem(r, c, item)
    widget.verticalHeader().setVisible(False)
    widget.resizeColumnsToContents()


# --- Measure ------------------------------------------------------------------

class MeasureWidget(QWidget):
    """Pick a control layer per label (and an unstained or dark layer), measure, review, save."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = _Worker()
        self.matrix = None
        layout = QVBoxLayout(self)
        layout.addWidget(QLabel("Single-label controls: a label name and a control layer per row "
                                "(several rows with one label are several fields of it)"))
        self.rows_layout = QFormLayout()
        layout.addLayout(self.rows_layout)
        self.rows = []
        for _ in range(3):
            self.add_row()
        more = QPushButton("Add a label")
        more.clicked.connect(lambda *_: self.add_row())
        layout.addWidget(more)
        references = QFormLayout()
        self.unstained = _LayerChoice(napari_viewer, optional=True)
        self.dark = _LayerChoice(napari_viewer, optional=True)
        self.bootstrap = QSpinBox()
        self.bootstrap.setRange(100, 10000)
        self.bootstrap.setValue(1000)
        references.addRow("Unstained specimen", self.unstained)
        references.addRow("Dark frame", self.dark)
        references.addRow("Bootstrap replicates", self.bootstrap)
        layout.addLayout(references)
        self.measure_button = QPushButton("Measure the bleed-through matrix")
        self.measure_button.clicked.connect(self.measure)
        layout.addWidget(self.measure_button)
        self.table = QTableWidget()
        layout.addWidget(self.table)
        self.messages = QPlainTextEdit()
        self.messages.setReadOnly(True)
        self.messages.setMaximumHeight(110)
        layout.addWidget(self.messages)
        save = QPushButton("Save the matrix file…")
        save.clicked.connect(self._ask_save)
        layout.addWidget(save)

    def add_row(self, label: str = "", layer: str | None = None):
        name = QLineEdit(label)
        name.setPlaceholderText("label name")
        choice = _LayerChoice(self.viewer, optional=True)
        if layer:
            choice.setCurrentText(layer)
        self.rows_layout.addRow(name, choice)
        self.rows.append((name, choice))

    def set_controls(self, controls: dict):
        """Fill the rows: label -> control layer name, or a list of names (several fields)."""
        pairs = [(label, layer) for label, layers in controls.items()
                 for layer in ([layers] if isinstance(layers, str) else layers)]
        while len(self.rows) < len(pairs):
            self.add_row()
        for (name_edit, choice), (label, layer) in zip(self.rows, pairs):
            name_edit.setText(label)
            choice.setCurrentText(layer)

    @_guarded
    def measure(self):
        from unmix.measure import MeasureSettings, measure_matrix

        controls = {}
        for name_edit, choice in self.rows:
            label, layer = name_edit.text().strip(), choice.layer()
            if not label and layer is None:
                continue
            if not label or layer is None:
                raise ValueError("each control row needs both a label name and a control layer")
            used = [other for other, fields in controls.items() if any(f.source == layer.name for f in fields)]
            if used:
                raise ValueError(f"layer {layer.name!r} is given twice (for {used[0]!r} and {label!r}); a control "
                                 "field belongs to one label, once")
            fields = controls.setdefault(label, [])
            fields.append(layer_image(layer))  # rows with the same label are fields of one control
        if not controls:
            raise ValueError("choose at least one control layer and name its label")
        unstained = self.unstained.layer()
        dark = self.dark.layer()
        settings = MeasureSettings(n_boot=self.bootstrap.value())

        def work():
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                matrix = measure_matrix(controls, unstained=layer_image(unstained) if unstained else None,
                                        dark=layer_image(dark) if dark else None, settings=settings)
            return matrix, [str(w.message) for w in caught if issubclass(w.category, UserWarning)]

        self.runner.start(work, self._show, "Measuring bleed-through")

    def _show(self, result):
        matrix, messages = result
        self.matrix = matrix
        session(self.viewer).matrix = matrix
        _table(self.table, ["channel \\ label", *matrix.labels], matrix_rows(matrix))
        lines = [f"Condition number {matrix.condition_number():.2f}; noise penalty "
                 + ", ".join(f"{label} {p:.2f}" for label, p in zip(matrix.labels, matrix.noise_penalty()))]
        lines += [f"QC: {flag}" for flag in matrix.qc.get("flags", [])] + [f"warning: {m}" for m in messages]
        self.messages.setPlainText("\n".join(lines))
        show_info("bleed-through matrix measured; the Unmix and Overlap widgets use it")

    def _ask_save(self, *_):
        path, _ = QFileDialog.getSaveFileName(self, "Save the matrix file", "matrix.json", "Matrix (*.json)")
        if path:
            self.save(path)

    def save(self, path):
        """Write the measured matrix file (JSON) to `path`; a notification if there is none."""
        try:
            if self.matrix is None:
                raise ValueError("no matrix yet: measure one first")
            self.matrix.save(path)
            show_info(f"wrote {path}")
        except Exception as exc:  # noqa: BLE001 - the viewer must keep working
            _report(exc)


def _matrix_choice(viewer, choice: QComboBox, path_edit: QLineEdit):
    """The matrix the user chose: measured in this session, a matrix layer, or a file."""
    from unmix.matrix import BleedThroughMatrix, load_matrix

    text = choice.currentText()
    if text == SESSION_MATRIX:
        matrix = session(viewer).matrix
        if matrix is None:
            raise ValueError("no matrix measured yet: measure one in the Measure widget, or choose a matrix file")
        return matrix
    if text == "file":
        if not path_edit.text().strip():
            raise ValueError("give the path of a matrix file")
        return load_matrix(path_edit.text().strip())
    layer = viewer.layers[text]
    return BleedThroughMatrix.from_dict(layer.metadata[MATRIX_METADATA], where=layer.name)


def _refresh_matrix_sources(viewer, choice: QComboBox):
    current = choice.currentText()
    choice.clear()
    choice.addItem(SESSION_MATRIX)
    choice.addItems([layer.name for layer in viewer.layers if MATRIX_METADATA in layer.metadata])
    choice.addItem("file")
    if current:
        choice.setCurrentText(current)


# --- Unmix --------------------------------------------------------------------

class UnmixWidget(QWidget):
    """Unmix a multichannel image layer: one layer per label and the saturation mask."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = _Worker()
        layout = QFormLayout(self)
        self.image = _LayerChoice(napari_viewer)
        self.channel_axis = QSpinBox()
        self.channel_axis.setRange(0, 5)
        self.matrix_source = QComboBox()
        self.matrix_path = QLineEdit()
        self.matrix_path.setPlaceholderText("matrix.json (when the source is 'file')")
        browse = QPushButton("Browse…")
        browse.clicked.connect(self._browse)
        row = QHBoxLayout()
        row.addWidget(self.matrix_path)
        row.addWidget(browse)
        self.method = QComboBox()
        self.method.addItems(["nnls", "ls"])
        for signal in (napari_viewer.layers.events.inserted, napari_viewer.layers.events.removed):
            signal.connect(lambda *_: _refresh_matrix_sources(self.viewer, self.matrix_source))
        _refresh_matrix_sources(napari_viewer, self.matrix_source)
        layout.addRow("Image layer", self.image)
        layout.addRow("Channel axis", self.channel_axis)
        layout.addRow("Matrix", self.matrix_source)
        layout.addRow("Matrix file", row)
        layout.addRow("Method", self.method)
        self.button = QPushButton("Unmix")
        self.button.clicked.connect(self.unmix)
        layout.addRow(self.button)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        layout.addRow(self.status)

    def _browse(self, *_):
        path, _ = QFileDialog.getOpenFileName(self, "Matrix file", "", "Matrix (*.json)")
        if path:
            self.matrix_path.setText(path)
            self.matrix_source.setCurrentText("file")

    @_guarded
    def unmix(self):
        from unmix.solve import Unmixer

        layer = self.image.layer()
        if layer is None:
            raise ValueError("choose the image layer to unmix")
        matrix = _matrix_choice(self.viewer, self.matrix_source, self.matrix_path)
        image = layer_image(layer, self.channel_axis.value())
        missing = [c for c in matrix.channels if c not in image.channel_names]
        if missing:
            raise ValueError(f"layer {layer.name!r} lacks channels {missing} that the matrix needs (it has "
                             f"{list(image.channel_names)}); set the layer's channel names or choose another matrix")
        image = image.select_channels(matrix.channels)
        background = matrix.background
        if background is None:
            from unmix.levels import summarise_channel

            background = np.array([summarise_channel(np.asarray(image.data[c][..., ::4, ::4])).background
                                   for c in range(image.n_channels)])
        unmixer = Unmixer(matrix.matrix, method=self.method.currentText())
        levels = matrix.saturation

        def work():
            data = image.data
            if hasattr(data, "map_blocks"):  # dask: lazily, block by block (larger than memory)
                blocks = data.rechunk({0: -1})
                abundances = blocks.map_blocks(lambda b: unmixer.unmix(np.asarray(b), background),
                                               dtype=np.float32, chunks=((len(matrix.labels),),) + blocks.chunks[1:])
                saturated = None
            else:
                abundances = unmixer.unmix(np.asarray(data), background)
                saturated = np.zeros(data.shape[1:], np.uint8)
                if levels is not None:
                    for c in range(data.shape[0]):
                        saturated |= data[c] >= levels[c]
            return abundances, saturated

        def done(result):
            abundances, saturated = result
            names = {}
            for k, label in enumerate(matrix.labels):
                plane = abundances[k]
                sample = np.asarray(plane[(slice(None, None, max(1, plane.shape[0] // 64)),) * plane.ndim]) \
                    if hasattr(plane, "compute") else plane
                high = float(np.nanpercentile(sample, 99.5)) if np.isfinite(sample).any() else 1.0
                name = self._add_or_update(plane, label, {
                    "colormap": LABEL_COLORMAPS[k % len(LABEL_COLORMAPS)], "blending": "additive",
                    "contrast_limits": (0.0, max(high, 1e-6)),
                    "metadata": {"unmix_provenance": {"matrix_sha256": matrix.sha256(), "method": unmixer.method,
                                                      "source_layer": layer.name}}})
                names[label] = name
            if saturated is not None:
                name = f"saturated ({layer.name})"
                if name in self.viewer.layers:
                    self.viewer.layers[name].data = saturated
                else:
                    self.viewer.add_labels(saturated, name=name, opacity=0.6)
            shared = session(self.viewer)
            shared.unmixed, shared.raw_layer = names, layer.name
            if shared.matrix is None:
                shared.matrix = matrix
            count = "" if saturated is None else f"; {int(saturated.sum())} saturated pixels marked"
            self.status.setText(f"unmixed {layer.name!r} into {', '.join(matrix.labels)}{count}")

        self.runner.start(work, done, "Unmixing")

    def _add_or_update(self, data, label, options) -> str:
        name = f"{label} (unmixed)"
        if name in self.viewer.layers:
            self.viewer.layers[name].data = data
        else:
            self.viewer.add_image(data, name=name, **options)
        return name


# --- Overlap review ----------------------------------------------------------

class OverlapWidget(QWidget):
    """Two labels: coefficients before and after unmixing side by side, the verdict, the histograms."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = _Worker()
        self.result = None
        self._watched = None
        self.setMinimumWidth(600)
        layout = QVBoxLayout(self)
        form = QFormLayout()
        self.label_a, self.label_b = QComboBox(), QComboBox()
        self.raw = _LayerChoice(napari_viewer)
        self.mask = _LayerChoice(napari_viewer, types=(LabelsLayer, ImageLayer), optional=True)
        self.rounds = QSpinBox()
        self.rounds.setRange(19, 9999)
        self.rounds.setValue(200)
        form.addRow("Label A", self.label_a)
        form.addRow("Label B", self.label_b)
        form.addRow("Raw image layer", self.raw)
        form.addRow("Mask (optional)", self.mask)
        form.addRow("Randomisation rounds", self.rounds)
        layout.addLayout(form)
        refresh = QPushButton("Use the labels of the current matrix")
        refresh.clicked.connect(lambda *_: self.refresh_labels())
        layout.addWidget(refresh)
        self.button = QPushButton("Measure overlap before and after")
        self.button.clicked.connect(self.compute)
        layout.addWidget(self.button)
        self.verdict = QLabel("")
        self.verdict.setWordWrap(True)
        self.verdict.setMargin(6)
        layout.addWidget(self.verdict)
        self.table = QTableWidget()
        layout.addWidget(self.table)
        self.canvas_holder = QVBoxLayout()
        layout.addLayout(self.canvas_holder)
        self.canvas = None
        self.mask.currentTextChanged.connect(self._watch_mask)
        self.refresh_labels()

    def refresh_labels(self):
        matrix = session(self.viewer).matrix
        labels = list(matrix.labels) if matrix is not None else []
        for combo, default in ((self.label_a, 0), (self.label_b, 1)):
            current = combo.currentText()
            combo.clear()
            combo.addItems(labels)
            if current in labels:
                combo.setCurrentText(current)
            elif len(labels) > default:
                combo.setCurrentIndex(default)

    def _watch_mask(self, *_):
        """Recompute when the user edits the mask (painting a labels layer, or new data)."""
        if self._watched is not None:
            for event in ("data", "paint"):
                if hasattr(self._watched.events, event):
                    getattr(self._watched.events, event).disconnect(self._mask_edited)
        layer = self.mask.layer() if self.mask.currentText() != NONE else None
        self._watched = layer
        if layer is not None:
            for event in ("data", "paint"):
                if hasattr(layer.events, event):
                    getattr(layer.events, event).connect(self._mask_edited)

    def _mask_edited(self, *_):
        if self.result is not None and not self.runner.busy:
            self.compute()

    @_guarded
    def compute(self):
        from unmix.verdict import analyse_pair, pair_planes, unmix_plane

        shared = session(self.viewer)
        matrix = shared.matrix
        if matrix is None:
            raise ValueError("no matrix yet: measure one (Measure widget) or unmix with a matrix file first")
        pair = (self.label_a.currentText(), self.label_b.currentText())
        if not all(pair) or pair[0] == pair[1]:
            raise ValueError("choose two different labels")
        raw_layer = self.raw.layer()
        if raw_layer is None:
            raise ValueError("choose the raw multichannel image layer")
        image = layer_image(raw_layer)
        missing = [c for c in matrix.channels if c not in image.channel_names]
        if missing:
            raise ValueError(f"layer {raw_layer.name!r} lacks channels {missing} of the matrix")
        raw = np.asarray(image.select_channels(matrix.channels).data)
        if raw.ndim != 3:
            raise ValueError(f"layer {raw_layer.name!r} is not one plane (C, Y, X); overlap is measured per plane")
        unmixed = None
        if shared.raw_layer == raw_layer.name and all(label in shared.unmixed for label in matrix.labels) and all(
                shared.unmixed[label] in self.viewer.layers for label in matrix.labels):
            unmixed = np.stack([np.asarray(self.viewer.layers[shared.unmixed[label]].data) for label in matrix.labels])
        mask_layer = self.mask.layer()
        mask = None
        if mask_layer is not None:
            mask = np.asarray(mask_layer.data) > 0
            if mask.shape != raw.shape[1:]:
                raise ValueError(f"mask {mask_layer.name!r} has shape {mask.shape}, the image {raw.shape[1:]}; "
                                 "draw the mask on the same plane")
            if not mask.any():
                raise ValueError(f"mask {mask_layer.name!r} selects no pixel; paint some first")
        rounds = self.rounds.value()

        def work():
            abundances = unmix_plane(raw, matrix) if unmixed is None else unmixed  # once, for both uses
            result = analyse_pair(raw, matrix, pair, unmixed=abundances, mask=mask, rounds=rounds)
            planes = pair_planes(raw, matrix, pair, abundances)
            keep = np.ones(raw.shape[1:], bool) if mask is None else mask
            return result, [p[keep] for p in planes]

        self.runner.start(work, self._show, "Measuring overlap")

    def _show(self, payload):
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg

        from unmix.plots import coloc_histograms
        from unmix.verdict import VERDICTS

        result, planes = payload
        self.result = result
        symbol, colour = VERDICT_LOOK[result.verdict]
        self.verdict.setText(f"{symbol}  {result.verdict}: {VERDICTS[result.verdict]}")
        self.verdict.setStyleSheet(f"background-color: {colour}; color: black; font-weight: bold; "
                                   "border: 1px solid #333;")

        def value(x, digits=3):
            return "undefined" if x is None else f"{x:.{digits}f}"

        rows = []
        for key, name in (("pearson", "Pearson r"), ("p_value", "p (randomisation)"), ("spearman", "Spearman rho"),
                          ("manders_m1", "Manders M1"), ("manders_m2", "Manders M2"), ("overlap", "Manders overlap"),
                          ("icq", "Li's ICQ")):
            rows.append([name, value(getattr(result.before, key)), value(getattr(result.after, key))])
        if result.after_pearson_interval:
            low, high = result.after_pearson_interval
            rows.append(["after r, matrix 95 %", "", f"{low:.3f} to {high:.3f}"])
        if result.bleed_through_only_pearson:
            rows.append(["before r from bleed-through alone", f"{result.bleed_through_only_pearson[0]:.3f}", ""])
        rows.append(["pixels (saturated left out)", f"{result.pixels} ({result.saturated_pixels})", ""])
        _table(self.table, ["", "before", "after"], rows)
        figure = coloc_histograms((planes[0], planes[1]), (planes[2], planes[3]), result)
        if self.canvas is not None:
            self.canvas_holder.removeWidget(self.canvas)
            self.canvas.deleteLater()
        self.canvas = FigureCanvasQTAgg(figure)
        self.canvas.setMinimumHeight(300)
        self.canvas_holder.addWidget(self.canvas)


# --- Prediction view ------------------------------------------------------------

class PredictionWidget(QWidget):
    """A description file: the channels' spectra and filter bands, and predicted versus measured."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = _Worker()
        self.prediction = None
        self.setMinimumWidth(600)
        layout = QVBoxLayout(self)
        row = QHBoxLayout()
        self.path = QLineEdit()
        self.path.setPlaceholderText("description.toml")
        browse = QPushButton("Browse…")
        browse.clicked.connect(self._browse)
        row.addWidget(self.path)
        row.addWidget(browse)
        layout.addLayout(row)
        self.acquisition = QComboBox()
        self.acquisition.addItems(["as described", "sequential", "simultaneous"])
        layout.addWidget(self.acquisition)
        self.button = QPushButton("Predict")
        self.button.clicked.connect(self.predict)
        layout.addWidget(self.button)
        self.summary = QLabel("")
        self.summary.setWordWrap(True)
        layout.addWidget(self.summary)
        self.table = QTableWidget()
        layout.addWidget(self.table)
        self.canvas_holder = QVBoxLayout()
        layout.addLayout(self.canvas_holder)
        self.canvas = None

    def _browse(self, *_):
        path, _ = QFileDialog.getOpenFileName(self, "Description file", "", "Description (*.toml)")
        if path:
            self.path.setText(path)

    @_guarded
    def predict(self):
        from unmix.optics import load_description
        from unmix.predict import predict

        text = self.path.text().strip()
        if not text:
            raise ValueError("give the path of a description file")
        mode = None if self.acquisition.currentText() == "as described" else self.acquisition.currentText()
        measured = session(self.viewer).matrix

        def work():
            description = load_description(Path(text))
            prediction = predict(description, mode)
            comparison = None
            if measured is not None and measured.kind == "measured":
                from unmix.compare import compare

                comparison = compare(measured, prediction.matrix, where=text)
            return description, prediction, comparison

        self.runner.start(work, self._show, "Predicting")

    def _show(self, payload):
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg

        from unmix.plots import spectra_figure

        description, prediction, comparison = payload
        self.prediction = prediction
        if comparison is not None:
            rows = [[r["channel"], r["label"], f"{r['measured']:.4f}", f"{r['predicted']:.4f}",
                     "-" if r["ratio"] is None else f"{r['ratio']:.2f}", r["verdict"]] for r in comparison.coefficients]
            _table(self.table, ["channel", "label", "measured", "predicted", "ratio", "verdict"], rows)
            self.summary.setText(comparison.summary)
        else:
            _table(self.table, ["channel \\ label", *prediction.matrix.labels], matrix_rows(prediction.matrix))
            self.summary.setText("Predicted matrix (measure one to compare).")
        if self.canvas is not None:
            self.canvas_holder.removeWidget(self.canvas)
            self.canvas.deleteLater()
        self.canvas = FigureCanvasQTAgg(spectra_figure(description))
        self.canvas.setMinimumHeight(360)
        self.canvas_holder.addWidget(self.canvas)
