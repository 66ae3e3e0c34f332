"""The Measure dock widget: control layers -> the bleed-through matrix."""

from __future__ import annotations

import warnings

import numpy as np
from napari.layers import Labels as LabelsLayer
from napari.utils.notifications import show_info
from qtpy.QtWidgets import (QFileDialog, QLabel, QLineEdit, QPlainTextEdit, QPushButton, QSpinBox,
                            QTableWidget, QVBoxLayout)

from unmix.report.summary import matrix_rows

from .layers import (LayerChoice, Panel, Worker, fill_table, form_layout, guarded, layer_image, notify_error,
                     set_matrix)


class MeasureWidget(Panel):
    """Pick a control layer per label (and an unstained or dark layer), measure, review, save.

    Optionally: the cells' autofluorescence as an extra label (from the unstained layer, cells from a labels
    layer or thresholded), and a chromatic registration measured on a bead layer (or read from a file)
    applied to the controls first.
    """

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        self.matrix = None
        self.registration = None
        layout = QVBoxLayout(self.body)
        intro = QLabel("Single-label controls: a label name and a control layer per row (several rows with one "
                       "label are several fields of it)")
        intro.setWordWrap(True)
        layout.addWidget(intro)
        self.rows_layout = form_layout()
        layout.addLayout(self.rows_layout)
        self.rows = []
        for _ in range(3):
            self.add_row()
        more = QPushButton("Add a label")
        more.clicked.connect(lambda *_: self.add_row())
        layout.addWidget(more)
        references = form_layout()
        self.unstained = LayerChoice(napari_viewer, optional=True)
        self.dark = LayerChoice(napari_viewer, optional=True)
        self.bootstrap = QSpinBox()
        self.bootstrap.setRange(100, 10000)
        self.bootstrap.setValue(1000)
        self.autofluorescence = QLineEdit()
        self.autofluorescence.setPlaceholderText("none (name it to add it as a label)")
        self.cells = LayerChoice(napari_viewer, types=(LabelsLayer,), optional=True)
        self.beads = LayerChoice(napari_viewer, optional=True)
        self.registration_path = QLineEdit()
        self.registration_path.setPlaceholderText("none, or a file from 'unmix align'")
        references.addRow("Unstained specimen", self.unstained)
        references.addRow("Dark frame", self.dark)
        references.addRow("Autofluorescence label", self.autofluorescence)
        references.addRow("Cells of the unstained (optional)", self.cells)
        references.addRow("Bead image (registration)", self.beads)
        references.addRow("or a registration file", self.registration_path)
        references.addRow("Bootstrap replicates", self.bootstrap)
        layout.addLayout(references)
        align = QPushButton("Measure the registration on the beads")
        align.clicked.connect(self.align)
        layout.addWidget(align)
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
        choice = LayerChoice(self.viewer, optional=True)
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

    @guarded
    def measure(self):
        from unmix.measure.controls import MeasureSettings, measure_matrix

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
        autofluorescence = self.autofluorescence.text().strip() or None
        cells = self.cells.layer()
        registration = self.registration
        if registration is None and self.registration_path.text().strip():
            from unmix.measure.registration import load_registration

            registration = load_registration(self.registration_path.text().strip())

        def work():
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                matrix = measure_matrix(controls, unstained=layer_image(unstained) if unstained else None,
                                        dark=layer_image(dark) if dark else None, settings=settings,
                                        registration=registration, autofluorescence=autofluorescence,
                                        autofluorescence_mask=None if cells is None else np.asarray(cells.data))
            return matrix, [str(w.message) for w in caught if issubclass(w.category, UserWarning)]

        self.runner.start(work, self._show, "Measuring bleed-through")

    @guarded
    def align(self):
        """Measure the chromatic registration on the chosen bead layer; measuring then applies it."""
        from unmix.measure.registration import fit_from_beads

        beads = self.beads.layer()
        if beads is None:
            raise ValueError("choose the layer of a multicolour bead image first")
        image = layer_image(beads)

        def work():
            return fit_from_beads([image])

        self.runner.start(work, self._show_registration, "Measuring the registration")

    def _show_registration(self, registration):
        self.registration = registration
        lines = [f"Registration onto {registration.reference} (applied to the controls when measuring):"]
        for c, channel in enumerate(registration.channels):
            dz, dy, dx = registration.shifts[c]
            lines.append(f"  {channel}: dy {dy:+.2f} px, dx {dx:+.2f} px, dz {dz:+.2f} planes, "
                         f"residual {registration.residual_px[c]:.2f} px")
        self.messages.setPlainText("\n".join(lines))
        show_info("registration measured; Measure applies it to the controls")

    def _show(self, result):
        matrix, messages = result
        self.matrix = matrix
        fill_table(self.table, ["channel \\ label", *matrix.labels], matrix_rows(matrix))
        lines = [f"Condition number {matrix.condition_number():.2f}; noise penalty "
                 + ", ".join(f"{label} {p:.2f}" for label, p in zip(matrix.labels, matrix.noise_penalty()))]
        flags = matrix.qc.get("flags", [])
        # Each flag was also a warning of the measurement: say it once.
        lines += [f"QC: {flag}" for flag in flags] + [f"warning: {m}" for m in dict.fromkeys(messages)
                                                       if m not in flags]
        self.messages.setPlainText("\n".join(lines))
        set_matrix(self.viewer, matrix)
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
            notify_error(exc)

