"""What the dock widgets share: the per-viewer session, layer choices, workers, notifications.

The widgets only translate between napari layers and the :mod:`unmix` library; long work runs in
napari thread workers with a progress bar, and every error becomes a notification.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass, field

import numpy as np
from napari.layers import Image as ImageLayer
from napari.qt.threading import create_worker
from napari.utils.notifications import show_error, show_info
from qtpy.QtCore import Qt
from qtpy.QtWidgets import QComboBox, QLineEdit, QTableWidget, QTableWidgetItem

from .io import CHANNEL_NAMES, MATRIX_METADATA

NONE = "(none)"
SESSION_MATRIX = "measured in this session"


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


def notify_error(exc: BaseException) -> None:
    from unmix.errors import InputError

    if isinstance(exc, (InputError, ValueError, KeyError, OSError)):
        show_error(str(exc))
    else:
        show_error(f"internal error: {type(exc).__name__}: {exc}")


def guarded(method):
    """Run a button handler; any error becomes a notification, never an exception in the event loop."""
    def handler(self, *args):
        try:
            return method(self)
        except Exception as exc:  # noqa: BLE001 - the viewer must keep working
            notify_error(exc)
            return None

    handler.__name__ = method.__name__
    handler.__doc__ = method.__doc__
    return handler


class Worker:
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
                                    _connect={"returned": on_done, "errored": notify_error, "finished": self._finished})

    def _finished(self):
        self.busy = False


class LayerChoice(QComboBox):
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
    from unmix.io.images import Image

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


def fill_table(widget: QTableWidget, header, rows) -> None:
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


def chosen_matrix(viewer, choice: QComboBox, path_edit: QLineEdit):
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


def refresh_matrix_sources(viewer, choice: QComboBox):
    current = choice.currentText()
    choice.clear()
    choice.addItem(SESSION_MATRIX)
    choice.addItems([layer.name for layer in viewer.layers if MATRIX_METADATA in layer.metadata])
    choice.addItem("file")
    if current:
        choice.setCurrentText(current)

