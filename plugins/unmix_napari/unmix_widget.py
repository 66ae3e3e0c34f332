"""The Unmix dock widget: an image layer + a matrix -> one layer per label."""

from __future__ import annotations

import numpy as np
from qtpy.QtWidgets import QComboBox, QFileDialog, QFormLayout, QHBoxLayout, QLabel, QLineEdit, QPushButton, QSpinBox

from unmix.report.style import label_colour

from .io import CHANNEL_NAMES
from .layers import (LayerChoice, Panel, Worker, chosen_matrix, default_image, guarded, layer_image,
                     refresh_matrix_sources, session, set_matrix)


class UnmixWidget(Panel):
    """Unmix a multichannel image layer: one layer per label and the saturation mask."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        layout = QFormLayout(self.body)
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
        for signal in (napari_viewer.layers.events.inserted, napari_viewer.layers.events.removed):
            signal.connect(lambda *_: refresh_matrix_sources(self.viewer, self.matrix_source))
        refresh_matrix_sources(napari_viewer, self.matrix_source)
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
                    "colormap": label_colour(k)[0], "blending": "additive",
                    "contrast_limits": (0.0, max(high, 1e-6)),
                    # The layer is one channel, named by its label: saved, it is that label's channel.
                    "metadata": {CHANNEL_NAMES: [label],
                                 "unmix_provenance": {"matrix_sha256": matrix.sha256(), "method": unmixer.method,
                                                      "source_layer": layer.name}}})
                names[label] = name
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
            self.status.setText(f"unmixed {layer.name!r} into {', '.join(matrix.labels)}{count} (the raw image is "
                                "hidden: tick its eye to compare)")

        self.runner.start(work, done, "Unmixing")

    def _add_or_update(self, data, label, options) -> str:
        name = f"{label} (unmixed)"
        if name in self.viewer.layers:
            self.viewer.layers[name].data = data
        else:
            self.viewer.add_image(data, name=name, **options)
        return name

