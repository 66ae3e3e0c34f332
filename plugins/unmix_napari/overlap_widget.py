"""The Overlap review dock widget: colocalization before and after unmixing, with the verdict.

A plane is judged in 2-D; a z-stack in 3-D over its voxels (never a projection), with each plane's r;
a time series per time point, with its r and each label's signal over time. A range of planes or
time points restricts the measurement. All of it is the library's (:mod:`unmix.coloc`); the widget
only slices the layers and shows the results.
"""

from __future__ import annotations

import numpy as np
from napari.layers import Image as ImageLayer
from napari.layers import Labels as LabelsLayer
from qtpy.QtWidgets import QComboBox, QLabel, QPushButton, QSpinBox, QTableWidget, QVBoxLayout

from unmix.coloc import ROUNDS
from unmix.report.style import VERDICT_LOOK

from .io import VOXEL_SIZE
from .layers import (NONE, ChannelGroup, LayerChoice, Panel, Worker, default_image, fill_table, form_layout, guarded,
                     layer_image, narrow, session)

DEPTH, TIME = "depth (z-planes)", "time (time points)"


class OverlapWidget(Panel):
    """Two labels: coefficients before and after unmixing side by side, the verdict, the histograms;
    for stacks and time series also the curve over depth or time."""

    def __init__(self, napari_viewer):
        super().__init__()
        self.viewer = napari_viewer
        self.runner = Worker()
        self.result = None  # PairResult of a plane or a stack; a series' summary over time (dict)
        self.results = []  # a series: the PairResult of each time point
        self._watched = None
        layout = QVBoxLayout(self.body)
        form = form_layout()
        self.form = form
        self.label_a, self.label_b = narrow(QComboBox()), narrow(QComboBox())
        self.raw = LayerChoice(napari_viewer, prefer=lambda: default_image(self.viewer))
        self.mask = LayerChoice(napari_viewer, types=(LabelsLayer, ImageLayer), optional=True, groups=False)
        self.rounds = QSpinBox()
        self.rounds.setRange(19, 9999)
        self.rounds.setValue(ROUNDS)
        self.stack_axis = narrow(QComboBox())
        self.stack_axis.addItems([DEPTH, TIME])
        self.first, self.last = QSpinBox(), QSpinBox()
        self.first_label, self.last_label = QLabel("First plane"), QLabel("Last plane")
        form.addRow("Label A", self.label_a)
        form.addRow("Label B", self.label_b)
        form.addRow("Raw image layer", self.raw)
        form.addRow("Extra axis", self.stack_axis)
        form.addRow(self.first_label, self.first)
        form.addRow(self.last_label, self.last)
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
        self.canvases = []
        self.mask.currentTextChanged.connect(self._watch_mask)
        self.raw.currentTextChanged.connect(self._layer_changed)
        self.stack_axis.currentTextChanged.connect(self._axis_changed)
        # The label boxes follow the session's matrix: filled now, and again whenever it changes.
        session(napari_viewer).matrix_listeners.append(self.refresh_labels)
        self.refresh_labels()
        self._layer_changed()

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

    # --- the extra axis and its range -------------------------------------------------------

    def _layer_shape(self) -> tuple:
        """The chosen image's shape without its channels, read from the layers (nothing is copied)."""
        try:
            layer = self.raw.layer()
        except ValueError:
            return ()
        if isinstance(layer, ChannelGroup):
            return tuple(layer.layers[0].data.shape)
        return tuple(layer.data.shape[1:]) if layer is not None else ()

    def _layer_changed(self, *_):
        """Show the axis and range rows a stack or series needs; guess the axis from napari's labels."""
        shape = self._layer_shape()
        extra = len(shape) - 2
        self.form.setRowVisible(self.stack_axis, extra == 1)
        for widget in (self.first, self.last):
            self.form.setRowVisible(widget, extra >= 1)
        if extra == 1:
            labels = self.viewer.dims.axis_labels
            guess = TIME if len(labels) >= 3 and str(labels[-3]).lower().startswith("t") else DEPTH
            self.stack_axis.blockSignals(True)
            self.stack_axis.setCurrentText(guess)
            self.stack_axis.blockSignals(False)
        self._axis_changed()

    def _axis_changed(self, *_):
        """The range spans the extra axis: every plane, or every time point (a series of stacks: its time)."""
        shape = self._layer_shape()
        size = shape[0] if len(shape) > 2 else 1
        words = "time point" if self._mode(len(shape) + 1) == "time" else "plane"
        self.first_label.setText(f"First {words}")
        self.last_label.setText(f"Last {words}")
        for spin, value in ((self.first, 0), (self.last, size - 1)):
            spin.setRange(0, max(size - 1, 0))
            spin.setValue(value)

    def _mode(self, ndim: int) -> str:
        """'plane', 'depth' or 'time' for an image of `ndim` dimensions, channels included."""
        if ndim <= 3:
            return "plane"
        if ndim == 5 or self.stack_axis.currentText() == TIME:
            return "time"
        return "depth"

    # --- the mask ---------------------------------------------------------------------------

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

    # --- measuring --------------------------------------------------------------------------

    @guarded
    def compute(self):
        from unmix.coloc.records import result_record
        from unmix.coloc.timelapse import frame_signals, time_summary
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
        raw = image.select_channels(matrix.channels).data
        if raw.ndim == 3:
            raw = np.asarray(raw)
        if raw.ndim > 5:
            raise ValueError(f"layer {raw_layer.name!r} has {raw.ndim - 1} dimensions besides its channels; overlap "
                             "takes a plane, a z-stack, a time series or a time series of z-stacks")
        mode = self._mode(raw.ndim)
        shape = tuple(raw.shape[1:])
        first, last = (self.first.value(), self.last.value()) if mode != "plane" else (0, 0)
        if mode != "plane" and not 0 <= first <= last < shape[0]:
            raise ValueError(f"the range {first} to {last} lies outside the {shape[0]} "
                             f"{'time points' if mode == 'time' else 'planes'} of {raw_layer.name!r}; choose a first "
                             "no later than the last, inside them")
        unmixed = None
        if shared.raw_layer == raw_layer.name and all(label in shared.unmixed for label in matrix.labels) and all(
                shared.unmixed[label] in self.viewer.layers for label in matrix.labels):
            unmixed = np.stack([np.asarray(self.viewer.layers[shared.unmixed[label]].data) for label in matrix.labels])
            if unmixed.shape[1:] != shape:
                unmixed = None  # unmixed from another version of the layer: unmixed afresh here
        mask = self._mask(shape)
        rounds = self.rounds.value()
        z_step = _z_step(raw_layer) if mode == "depth" or raw.ndim == 5 else None

        if mode == "plane":
            def work():
                prepared = prepare_image(raw, matrix, unmixed=unmixed)
                return "plane", judge_pair(prepared, pair, mask=mask, rounds=rounds), pair_pixels(prepared, pair, mask)

            self.runner.start(work, self._show, "Measuring overlap")
            return
        chosen = slice(first, last + 1)

        def part(array, t=None):
            """`array` (..., extra axis, Y, X) cut to the range, or to time point `t`."""
            if array is None or array.ndim < len(shape):  # none, or one plane for every plane and time point
                return array
            index = chosen if t is None else t
            return array[index] if array.ndim == len(shape) else array[:, index]

        if mode == "depth":
            def work():
                prepared = prepare_image(part(raw), matrix, unmixed=part(unmixed))
                region = part(mask)
                result = judge_pair(prepared, pair, mask=region, rounds=rounds, z_spacing=z_step)
                record = result_record(result, image=raw_layer.name, matrix_sha256=matrix.sha256(),
                                       planes=(first, last))
                return "depth", result, pair_pixels(prepared, pair, region), record

            self.runner.start(work, self._show, "Measuring overlap in 3-D")
            return
        frames = list(range(first, last + 1))

        def work():  # a generator: napari's progress bar counts the time points
            results, signals = [], []
            for t in frames:
                prepared = prepare_image(part(raw, t), matrix, unmixed=part(unmixed, t))
                region = part(mask, t)
                results.append(judge_pair(prepared, pair, mask=region, rounds=rounds, z_spacing=z_step))
                signals.append(frame_signals(prepared, region))
                yield t
            return "time", results, time_summary(pair, frames, signals, results)

        self.runner.start(work, self._show, "Measuring overlap per time point", total=len(frames))

    def _mask(self, shape: tuple):
        """The mask layer as booleans: one plane for every plane and time point, or the image's shape."""
        mask_layer = self.mask.layer()
        if mask_layer is None:
            return None
        mask = np.asarray(mask_layer.data) > 0
        if mask.shape not in (shape[-2:], shape):
            raise ValueError(f"mask {mask_layer.name!r} has shape {mask.shape}, the image {shape}; draw the mask on "
                             f"the same image (one plane {shape[-2:]} counts for every plane and time point)")
        if not mask.any():
            raise ValueError(f"mask {mask_layer.name!r} selects no pixel; paint some first")
        return mask

    # --- showing ----------------------------------------------------------------------------

    def _show(self, payload):
        from unmix.report.plots import coloc_histograms, depth_profile_figure, time_figure

        kind, *rest = payload
        if kind == "time":
            results, summary = rest
            self.result, self.results = summary, results
            self._show_series(summary, results)
            self._set_figures([(time_figure(summary), 440)])
            return
        result, pixels = rest[:2]
        self.result, self.results = result, []
        self._show_verdict(result)
        rows = self._coefficient_rows(result)
        figures = []
        if kind == "depth":
            record = rest[2]
            first, last = record["planes"]
            step = f", {record['z_step_um']:g} µm apart" if record.get("z_step_um") else ""
            rows.insert(0, ["3-D, over voxels", f"planes {first} to {last}", f"{last - first + 1} planes" + step])
            trend = result.depth_trend or {}
            if trend.get("slope_per_plane") is not None:
                low, high = trend["interval"]
                rows.append(["depth trend per plane", "",
                             f"{trend['slope_per_plane']:+.4f} [{low:+.4f}, {high:+.4f}]"
                             + (" flagged" if trend["flagged"] else "")])
            figures.append((depth_profile_figure(record), 300))
        fill_table(self.table, ["", "before", "after"], rows, wrap_names=True)
        figures.append((coloc_histograms((pixels[0], pixels[1]), (pixels[2], pixels[3]), result, stacked=True), 640))
        self._set_figures(figures)

    def _show_verdict(self, result):
        from unmix.coloc.verdict import VERDICTS

        look = VERDICT_LOOK[result.verdict]
        where = "" if result.planes is None else f" In 3-D, over the voxels of {len(result.planes)} planes."
        self.verdict.setText(f"{look.symbol}  {look.heading} ({result.verdict}): {VERDICTS[result.verdict]}.{where}")
        self.verdict.setStyleSheet(f"background-color: {look.colour}; color: black; font-weight: bold; "
                                   "border: 1px solid #333;")

    def _show_series(self, summary, results):
        """Verdicts counted over the time points (in the verdict's colour when they all agree), the
        flags in words, and one table row per time point."""
        counts = sorted(summary["verdicts"].items(), key=lambda item: -item[1])
        n = len(summary["frames"])
        text = "Per time point: " + ", ".join(f"{VERDICT_LOOK[v].symbol} {v} at {count} of {n}" for v, count in counts)
        if summary["notes"]:
            text += ". " + "; ".join(summary["notes"])
        colour = VERDICT_LOOK[counts[0][0]].colour if len(counts) == 1 else "#FFFFFF"
        self.verdict.setText(text + ".")
        self.verdict.setStyleSheet(f"background-color: {colour}; color: black; font-weight: bold; "
                                   "border: 1px solid #333;")

        def value(x):
            return "undefined" if x is None else f"{x:.3f}"

        rows = []
        for t, result in zip(summary["frames"], results):
            corrected = result.after_corrected
            interval = "" if corrected.interval is None else \
                f" [{corrected.interval[0]:.3f}, {corrected.interval[1]:.3f}]"
            rows.append([str(t), result.verdict, value(result.before.pearson), value(corrected.r) + interval])
        fill_table(self.table, ["time", "verdict", "r before", "r after [95 %]"], rows)

    @staticmethod
    def _coefficient_rows(result) -> list:
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
        return rows

    def _set_figures(self, figures) -> None:
        """Replace the figures below the table: (matplotlib figure, minimum height in px) each."""
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg

        for canvas in self.canvases:
            self.canvas_holder.removeWidget(canvas)
            canvas.deleteLater()
        self.canvases = []
        for figure, height in figures:
            canvas = FigureCanvasQTAgg(figure)
            canvas.setMinimumHeight(height)
            self.canvas_holder.addWidget(canvas)
            self.canvases.append(canvas)


def _z_step(layer) -> float | None:
    """The spacing of a stack's planes in micrometres, when the layer was opened with its voxel size."""
    first = layer.layers[0] if isinstance(layer, ChannelGroup) else layer
    step = (first.metadata.get(VOXEL_SIZE) or {}).get("Z")
    return float(step) if isinstance(step, (int, float)) and step > 0 else None
