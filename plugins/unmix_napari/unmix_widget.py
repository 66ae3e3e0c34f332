"""The Unmix dock widget: an image layer + a matrix -> one layer per label."""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import (QCheckBox, QComboBox, QFileDialog, QHBoxLayout, QLabel, QLineEdit,
                            QPushButton, QSpinBox)

from unmix.report.style import label_colour

from .io import CHANNEL_NAMES
from .layers import (LayerChoice, Panel, Worker, chosen_matrix, default_image, form_layout, guarded, layer_image,
                     refresh_matrix_sources, session, set_matrix)


class UnmixWidget(Panel):
    """Unmix a multichannel image layer: one layer per label, the saturation mask and, when asked
    for, each label's standard error (hidden layers, to inspect where an abundance is uncertain)."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        layout = form_layout()
        self.body.setLayout(layout)
        self.image = LayerChoice(napari_viewer, prefer=lambda: default_image(self.viewer))
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
        self.weights = QComboBox()
        self.weights.addItems(["none", "noise"])
        self.weights.setToolTip("noise: weigh channels by the matrix's detector noise model (weighted least squares)")
        self.errors = QCheckBox("add each label's standard error")
        self.errors.setToolTip("needs a measured matrix (noise model or intervals)")
        for signal in (napari_viewer.layers.events.inserted, napari_viewer.layers.events.removed):
            signal.connect(lambda *_: refresh_matrix_sources(self.viewer, self.matrix_source))
        refresh_matrix_sources(napari_viewer, self.matrix_source)
        layout.addRow("Image layer", self.image)
        layout.addRow("Channel axis", self.channel_axis)
        layout.addRow("Matrix", self.matrix_source)
        layout.addRow("Matrix file", row)
        layout.addRow("Method", self.method)
        layout.addRow("Weights", self.weights)
        layout.addRow("Uncertainty", self.errors)
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

    @guarded
    def unmix(self):
        from unmix.engine.solver import Unmixer

        layer = self.image.layer()
        if layer is None:
            raise ValueError("choose the image layer to unmix")
        matrix = chosen_matrix(self.viewer, self.matrix_source, self.matrix_path)
        image = layer_image(layer, self.channel_axis.value())
        missing = [c for c in matrix.channels if c not in image.channel_names]
        if missing:
            raise ValueError(f"layer {layer.name!r} lacks channels {missing} that the matrix needs (it has "
                             f"{list(image.channel_names)}); set the layer's channel names or choose another matrix")
        image = image.select_channels(matrix.channels)
        background = matrix.background
        if background is None:
            from unmix.measure.levels import summarise_channel

            background = np.array([summarise_channel(np.asarray(image.data[c][..., ::4, ::4])).background
                                   for c in range(image.n_channels)])
        with_errors = self.errors.isChecked()
        unmixer = Unmixer.for_matrix(matrix, self.method.currentText(), self.weights.currentText(), with_errors)
        levels = matrix.saturation

        def work():
            data = image.data
            errors = None
            if hasattr(data, "map_blocks"):  # dask: lazily, block by block (larger than memory)
                blocks = data.rechunk({0: -1})
                chunks = ((len(matrix.labels),),) + blocks.chunks[1:]
                abundances = blocks.map_blocks(lambda b: unmixer.solve(np.asarray(b), background)[0],
                                               dtype=np.float32, chunks=chunks)
                if with_errors:
                    errors = blocks.map_blocks(lambda b: unmixer.solve(np.asarray(b), background, errors=True)[1],
                                               dtype=np.float32, chunks=chunks)
                saturated = None
            else:
                abundances, errors = unmixer.solve(np.asarray(data), background, errors=with_errors)
                saturated = np.zeros(data.shape[1:], np.uint8)
                if levels is not None:
                    for c in range(data.shape[0]):
                        saturated |= data[c] >= levels[c]
            return abundances, saturated, errors

        def done(result):
            abundances, saturated, errors = result
            names = {}
            for k, label in enumerate(matrix.labels):
                plane = abundances[k]
                name = self._add_or_update(plane, label, {
                    "colormap": label_colour(k)[0], "blending": "additive",
                    "contrast_limits": _display_range(plane),
                    # The layer is one channel, named by its label: saved, it is that label's channel.
                    "metadata": {CHANNEL_NAMES: [label],
                                 "unmix_provenance": {"matrix_sha256": matrix.sha256(), "method": unmixer.method,
                                                      "source_layer": layer.name}}})
                names[label] = name
            for k, label in enumerate(matrix.labels if errors is not None else ()):
                self._add_or_update(errors[k], label, {
                    "colormap": "gray", "visible": False, "contrast_limits": _display_range(errors[k]),
                    "metadata": {CHANNEL_NAMES: [f"{label} standard error"]}}, kind="standard error")
            name = f"saturated ({layer.name})"
            if saturated is not None and saturated.any():
                if name in self.viewer.layers:
                    self.viewer.layers[name].data = saturated
                else:
                    self.viewer.add_labels(saturated, name=name, opacity=0.6)
            elif name in self.viewer.layers:  # nothing saturated now: no empty layer left from before
                self.viewer.layers.remove(name)
            shared = session(self.viewer)
            shared.unmixed, shared.raw_layer = names, layer.name
            if shared.matrix is None:
                set_matrix(self.viewer, matrix)
            # Show the unmixed composite alone: the raw channels stay in the viewer, hidden.
            for raw in getattr(layer, "layers", (layer,)):
                raw.visible = False
            count = "" if saturated is None else (f"; {int(saturated.sum())} saturated pixels marked" if saturated.any()
                                                  else "; no pixel saturated")
            extra = "" if errors is None else "; standard errors added as hidden layers"
            self.status.setText(f"unmixed {layer.name!r} into {', '.join(matrix.labels)}{count}{extra} (the raw image "
                                "is hidden: tick its eye to compare)")

        self.runner.start(work, done, "Unmixing")

    def _add_or_update(self, data, label, options, kind: str = "unmixed") -> str:
        name = f"{label} ({kind})"
        if name in self.viewer.layers:
            self.viewer.layers[name].data = data
        else:
            self.viewer.add_image(data, name=name, **options)
        return name


def _display_range(plane) -> tuple[float, float]:
    """0 to the 99.5th percentile of a plane (of a sample of it, when it is lazy)."""
    sample = np.asarray(plane[(slice(None, None, max(1, plane.shape[0] // 64)),) * plane.ndim]) \
        if hasattr(plane, "compute") else plane
    high = float(np.nanpercentile(sample, 99.5)) if np.isfinite(sample).any() else 1.0
    return 0.0, max(high, 1e-6)
