"""The Predicted leakage dock widget: a description file -> the predicted matrix, compared."""

from __future__ import annotations

from pathlib import Path

from qtpy.QtWidgets import QComboBox, QFileDialog, QHBoxLayout, QLabel, QLineEdit, QPushButton, QTableWidget, QVBoxLayout

from unmix.report.summary import comparison_rows, matrix_rows

from .layers import Panel, Worker, fill_table, guarded, session


class PredictionWidget(Panel):
    """A description file: the channels' spectra and filter bands, and predicted versus measured."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        self.prediction = None
        layout = QVBoxLayout(self.body)
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

    @guarded
    def predict(self):
        from unmix.optics.description import load_description
        from unmix.optics.prediction import predict

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
                from unmix.optics.comparison import compare

                comparison = compare(measured, prediction.matrix, where=text)
            return description, prediction, comparison

        self.runner.start(work, self._show, "Predicting")

    def _show(self, payload):
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg

        from unmix.report.plots import spectra_figure

        description, prediction, comparison = payload
        self.prediction = prediction
        if comparison is not None:
            header, *rows = comparison_rows(comparison)
            fill_table(self.table, header, rows)
            self.summary.setText(comparison.summary)
        else:
            fill_table(self.table, ["channel \\ label", *prediction.matrix.labels], matrix_rows(prediction.matrix))
            self.summary.setText("Predicted matrix (measure one to compare).")
        if self.canvas is not None:
            self.canvas_holder.removeWidget(self.canvas)
            self.canvas.deleteLater()
        self.canvas = FigureCanvasQTAgg(spectra_figure(description))
        self.canvas.setMinimumHeight(360)
        self.canvas_holder.addWidget(self.canvas)

