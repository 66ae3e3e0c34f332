"""The Overlap review dock widget: colocalization before and after unmixing, with the verdict."""

from __future__ import annotations

import numpy as np
from napari.layers import Image as ImageLayer
from napari.layers import Labels as LabelsLayer
from qtpy.QtWidgets import QComboBox, QFormLayout, QLabel, QPushButton, QSpinBox, QTableWidget, QVBoxLayout

from unmix.coloc import ROUNDS
from unmix.report.style import VERDICT_LOOK

from .layers import (NONE, LayerChoice, Panel, Worker, default_image, fill_table, guarded, layer_image, narrow,
                     session)


class OverlapWidget(Panel):
    """Two labels: coefficients before and after unmixing side by side, the verdict, the histograms."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        self.result = None
        self._watched = None
        layout = QVBoxLayout(self.body)
        form = QFormLayout()
        self.label_a, self.label_b = narrow(QComboBox()), narrow(QComboBox())
        self.raw = LayerChoice(napari_viewer, prefer=lambda: default_image(self.viewer))
        self.mask = LayerChoice(napari_viewer, types=(LabelsLayer, ImageLayer), optional=True, groups=False)
        self.rounds = QSpinBox()
        self.rounds.setRange(19, 9999)
        self.rounds.setValue(ROUNDS)
        form.addRow("Label A", self.label_a)
        form.addRow("Label B", self.label_b)
        form.addRow("Raw image layer", self.raw)
        form.addRow("Mask (optional)", self.mask)
        form.addRow("Randomisation rounds", self.rounds)
        layout.addLayout(form)
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
        # The label boxes follow the session's matrix: filled now, and again whenever it changes.
        session(napari_viewer).matrix_listeners.append(self.refresh_labels)
        self.refresh_labels()

    def refresh_labels(self, matrix=None):
        from unmix.coloc.verdict import nuisance_labels

        matrix = matrix if matrix is not None else session(self.viewer).matrix
        labels = list(matrix.labels) if matrix is not None else []
        # Autofluorescence measured as a label is offered, but never chosen by default.
        judged = [label for label in labels if label not in (nuisance_labels(matrix) if matrix is not None else ())]
        for combo, default in ((self.label_a, 0), (self.label_b, 1)):
            current = combo.currentText()
            combo.clear()
            combo.addItems(labels)
            if current in labels:
                combo.setCurrentText(current)
            elif len(judged) > default:
                combo.setCurrentText(judged[default])

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

    @guarded
    def compute(self):
        from unmix.coloc.verdict import judge_pair, pair_pixels, prepare_image

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
            prepared = prepare_image(raw, matrix, unmixed=unmixed)
            result = judge_pair(prepared, pair, mask=mask, rounds=rounds)
            return result, pair_pixels(prepared, pair, mask)

        self.runner.start(work, self._show, "Measuring overlap")

    def _show(self, payload):
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg

        from unmix.coloc.verdict import VERDICTS
        from unmix.report.plots import coloc_histograms

        result, planes = payload
        self.result = result
        look = VERDICT_LOOK[result.verdict]
        self.verdict.setText(f"{look.symbol}  {look.heading} ({result.verdict}): {VERDICTS[result.verdict]}")
        self.verdict.setStyleSheet(f"background-color: {look.colour}; color: black; font-weight: bold; "
                                   "border: 1px solid #333;")

        def value(x, digits=3):
            return "undefined" if x is None else f"{x:.{digits}f}"

        rows = []
        for key, name in (("pearson", "Pearson r"), ("p_value", "p (randomisation)"), ("spearman", "Spearman rho"),
                          ("manders_m1", "Manders M1"), ("manders_m2", "Manders M2"), ("overlap", "Manders overlap"),
                          ("icq", "Li's ICQ")):
            rows.append([name, value(getattr(result.before, key)), value(getattr(result.after, key))])
        corrected = result.after_corrected
        rows.append(["Pearson r, noise-corrected", value(result.before_corrected.r), value(corrected.r)])
        if corrected.interval:
            low, high = corrected.interval
            rows.append(["after r corrected, 95 %", "", f"{low:.3f} to {high:.3f}"])
        if result.inflation is not None:
            rows.append(["before r minus corrected after r", value(result.inflation), ""])
        rows.append(["pixels (saturated left out)", f"{result.pixels} ({result.saturated_pixels})", ""])
        fill_table(self.table, ["", "before", "after"], rows, wrap_names=True)
        figure = coloc_histograms((planes[0], planes[1]), (planes[2], planes[3]), result, stacked=True)
        if self.canvas is not None:
            self.canvas_holder.removeWidget(self.canvas)
            self.canvas.deleteLater()
        self.canvas = FigureCanvasQTAgg(figure)
        self.canvas.setMinimumHeight(640)
        self.canvas_holder.addWidget(self.canvas)

