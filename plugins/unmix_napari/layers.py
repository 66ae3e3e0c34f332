"""What the dock widgets share: the per-viewer session, layer choices, workers, notifications.

The widgets only translate between napari layers and the :mod:`unmix` library; long work runs in
napari thread workers with a progress bar, and every error becomes a notification. A multichannel
image shown as one layer per channel (a channel group, see :data:`.io.CHANNEL_GROUP`) is offered as
one choice and handed to the library as one image. Every widget is a :class:`Panel`: its contents
scroll, and docked where another of ours is, it joins it as a tab, so the image keeps its room.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass, field

import numpy as np
from napari.layers import Image as ImageLayer
from napari.qt.threading import create_worker
from napari.utils.notifications import show_error, show_info
from qtpy.QtCore import QSize, Qt, QTimer
from qtpy.QtWidgets import (QComboBox, QDockWidget, QFormLayout, QHeaderView, QLineEdit, QMainWindow, QScrollArea,
                            QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget)

from .io import CHANNEL_GROUP, CHANNEL_NAMES, MATRIX_METADATA

NONE = "(none)"
SESSION_MATRIX = "measured in this session"
PANEL_WIDTH = 440  # px: the dock's opening width
PANEL_MIN_WIDTH = 360  # px: narrower, the forms would need a horizontal scroll bar


@dataclass
class _Session:
    matrix: object = None  # BleedThroughMatrix
    unmixed: dict = field(default_factory=dict)  # label -> layer name
    raw_layer: str | None = None
    matrix_listeners: list = field(default_factory=list)  # called with the new matrix


_SESSIONS: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def session(viewer) -> _Session:
    """The state shared by the widgets of one viewer."""
    if viewer not in _SESSIONS:
        _SESSIONS[viewer] = _Session()
    return _SESSIONS[viewer]


def set_matrix(viewer, matrix) -> None:
    """Make `matrix` the session's current matrix and tell the widgets that follow it."""
    shared = session(viewer)
    shared.matrix = matrix
    for listener in list(shared.matrix_listeners):
        try:
            listener(matrix)
        except RuntimeError:  # its widget was closed and deleted: stop telling it
            shared.matrix_listeners.remove(listener)


class Panel(QWidget):
    """A dock widget whose contents scroll, and which joins our other docked widgets as a tab.

    Subclasses lay their contents out in ``self.body``. Several widgets docked one under the
    other would each get a strip of the window's height and widen the dock area to the widest
    of them; as tabs, one shows at a time at full height.
    """

    def __init__(self):
        super().__init__()
        self.body = QWidget()
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setWidget(self.body)
        outer = QVBoxLayout(self)
        outer.setContentsMargins(0, 0, 0, 0)
        outer.addWidget(scroll)
        self.setMinimumWidth(PANEL_MIN_WIDTH)
        self._joined = False

    def sizeHint(self):
        # The dock area opens at this width; the contents scroll vertically and the figures shrink
        # to it, so the image canvas keeps most of the window.
        hint = super().sizeHint()
        return QSize(min(hint.width(), PANEL_WIDTH), hint.height())

    def showEvent(self, event):
        super().showEvent(event)
        if not self._joined:
            self._joined = True
            QTimer.singleShot(0, self.join_other_panels)

    def join_other_panels(self) -> None:
        """Tabify this widget's dock with the last of our docks in the same dock area, if any."""
        dock = self.parentWidget()
        while dock is not None and not isinstance(dock, QDockWidget):
            dock = dock.parentWidget()
        window = dock.parentWidget() if dock is not None else None
        if not isinstance(window, QMainWindow):
            return
        area = window.dockWidgetArea(dock)
        others = [d for d in window.findChildren(QDockWidget) if d is not dock and d.isVisible()
                  and window.dockWidgetArea(d) == area and d.findChild(Panel) is not None]
        if others:
            window.tabifyDockWidget(others[-1], dock)
            dock.show()
            dock.raise_()


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

    def start(self, function, on_done, description: str, total: int = 0):
        """Run `function` in a thread and hand its result to `on_done`. A generator function with a
        `total` moves the progress bar one step per value it yields (and returns the result); otherwise
        the bar shows that work goes on."""
        if self.busy:
            show_info("still working on the previous request")
            return
        self.busy = True
        # Handlers given at creation: with its own "errored" handler, the worker does not re-raise
        # into the event loop (the error becomes a notification instead).
        self.worker = create_worker(function, _progress={"desc": description, "total": total},
                                    _connect={"returned": on_done, "errored": notify_error, "finished": self._finished})

    def _finished(self):
        self.busy = False


def form_layout() -> QFormLayout:
    """A form whose fields go below their labels when the panel is too narrow for both side by
    side, so that the panel never needs a horizontal scroll bar."""
    form = QFormLayout()
    form.setRowWrapPolicy(QFormLayout.RowWrapPolicy.WrapLongRows)
    return form


def narrow(combo: QComboBox) -> QComboBox:
    """A drop-down that may be narrower than its longest entry (the entries stay readable in its list)."""
    combo.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToMinimumContentsLengthWithIcon)
    combo.setMinimumContentsLength(10)
    return combo


@dataclass(frozen=True)
class ChannelGroup:
    """The layers that are the channels of one multichannel image, in channel order."""

    name: str
    layers: tuple


def channel_groups(viewer) -> dict:
    """Channel groups of the viewer's image layers, by group name."""
    groups: dict = {}
    for layer in viewer.layers:
        if isinstance(layer, ImageLayer) and layer.metadata.get(CHANNEL_GROUP):
            groups.setdefault(layer.metadata[CHANNEL_GROUP], []).append(layer)
    return {name: ChannelGroup(name, tuple(members)) for name, members in groups.items()}


def default_image(viewer) -> str | None:
    """The image a widget should start with: the one last unmixed in this session, else the last
    channel group (a sample opened as a composite), else the last visible multichannel image."""
    shared = session(viewer)
    groups = channel_groups(viewer)
    if shared.raw_layer and (shared.raw_layer in groups or shared.raw_layer in viewer.layers):
        return shared.raw_layer
    if groups:
        return list(groups)[-1]
    images = [layer.name for layer in viewer.layers if isinstance(layer, ImageLayer) and layer.visible
              and layer.ndim >= 3 and MATRIX_METADATA not in layer.metadata]
    return images[-1] if images else None


class LayerChoice(QComboBox):
    """A drop-down of the viewer's layers of some types, kept current as layers come and go.

    With `groups`, the channels of a multichannel image shown as separate layers are one entry,
    under the group's name. With `prefer`, the entry it names is chosen until the user chooses.
    """

    def __init__(self, viewer, types=(ImageLayer,), optional: bool = False, groups: bool = True, prefer=None):
        super().__init__()
        narrow(self)
        self.viewer, self.types, self.optional, self.groups, self.prefer = viewer, types, optional, groups, prefer
        self.chosen = False
        self.activated.connect(self._chosen)
        viewer.layers.events.inserted.connect(self.refresh)
        viewer.layers.events.removed.connect(self.refresh)
        self.refresh()

    def _chosen(self, *_):
        self.chosen = True

    def refresh(self, *_):
        current = self.currentText()
        self.blockSignals(True)
        self.clear()
        if self.optional:
            self.addItem(NONE)
        groups = channel_groups(self.viewer) if self.groups else {}
        self.addItems(list(groups))
        self.addItems([layer.name for layer in self.viewer.layers if isinstance(layer, self.types)
                       and not (groups and layer.metadata.get(CHANNEL_GROUP) in groups)])
        preferred = self.prefer() if self.prefer is not None and not self.chosen else None
        if preferred and self.findText(preferred) >= 0:
            self.setCurrentText(preferred)
        elif current:
            self.setCurrentText(current)
        self.blockSignals(False)
        if self.currentText() != current:  # the choice moved (its layer went, or a preferred one came)
            self.currentTextChanged.emit(self.currentText())

    def layer(self):
        """The chosen layer, a :class:`ChannelGroup`, or None."""
        name = self.currentText()
        if not name or name == NONE:
            return None
        groups = channel_groups(self.viewer) if self.groups else {}
        if name in groups:
            return groups[name]
        if name not in self.viewer.layers:
            raise ValueError(f"layer {name!r} is no longer in the viewer; choose another")
        return self.viewer.layers[name]


def layer_image(layer, channel_axis: int = 0):
    """The library's Image for a multichannel image layer, or a channel group: channels first,
    names from metadata."""
    from unmix.io.images import Image

    if isinstance(layer, ChannelGroup):
        planes = [member.data for member in layer.layers]
        if len({plane.shape for plane in planes}) > 1:
            raise ValueError(f"the channels of {layer.name!r} differ in shape; they are not one image")
        if any(hasattr(plane, "compute") for plane in planes):
            import dask.array as da

            data = da.stack([da.asarray(plane) for plane in planes])
        else:
            data = np.stack([np.asarray(plane) for plane in planes])
        names = [(member.metadata.get(CHANNEL_NAMES) or [member.name])[0] for member in layer.layers]
        axes = "C" + "TZYX"[-(data.ndim - 1):]
        return Image(data, axes, tuple(names), source=layer.name)
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


def fill_table(widget: QTableWidget, header, rows, wrap_names: bool = False) -> None:
    """Fill a read-only table, exactly as tall as its rows (the panel scrolls as a whole). With
    `wrap_names`, the first column (long names beside short numbers) takes the width the others
    leave and wraps."""
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
    columns = widget.horizontalHeader()
    columns.setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
    if wrap_names:
        columns.setSectionResizeMode(0, QHeaderView.ResizeMode.Stretch)
    widget.setWordWrap(wrap_names)
    widget.verticalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
    widget.resizeRowsToContents()
    if not widget.property("fits_its_rows"):
        # When a column's width changes (the dock laid out or resized), wrapped rows change height once
        # the event is handled: the table then takes their new height, so that it never scrolls inside
        # the scrolling panel.
        widget.horizontalHeader().sectionResized.connect(lambda *_: QTimer.singleShot(0, lambda: _fit_height(widget)))
        widget.setProperty("fits_its_rows", True)
    _fit_height(widget)


def _fit_height(widget: QTableWidget) -> None:
    widget.setFixedHeight(widget.horizontalHeader().sizeHint().height() + widget.verticalHeader().length()
                          + 2 * widget.frameWidth() + widget.horizontalScrollBar().sizeHint().height())


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

