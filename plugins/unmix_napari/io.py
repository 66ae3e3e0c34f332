"""Reader, writer and sample-data contributions: files <-> napari layer data."""

from __future__ import annotations

from pathlib import Path

import numpy as np

MATRIX_METADATA = "unmix_matrix"
CHANNEL_NAMES = "channel_names"
# Layers that are the channels of one multichannel image carry its name under this key (and their
# own channel's name under CHANNEL_NAMES); the widgets take the group as that image.
CHANNEL_GROUP = "unmix_channel_group"
# The voxel size in micrometres by axis ({"Z": ..., "Y": ..., "X": ...}) of a layer read from a file
# that records it: a stack's depths are then in micrometres.
VOXEL_SIZE = "unmix_voxel_size_um"


def matrix_reader(path):
    """A reader for matrix files (JSON of this tool); None for other JSON files."""
    if isinstance(path, list):
        path = path[0]
    try:
        from unmix.matrix import load_matrix

        load_matrix(path)
    except Exception:  # noqa: BLE001 - not ours: let another reader try
        return None
    return _read_matrix


def _read_matrix(path):
    """The matrix as a small image layer (channels x labels) carrying the whole file in its metadata."""
    from unmix.matrix import load_matrix

    if isinstance(path, list):
        path = path[0]
    matrix = load_matrix(path)
    return [(matrix.matrix.astype(np.float32), {
        "name": f"matrix {Path(path).name}", "colormap": "viridis", "contrast_limits": (0.0, 1.0),
        "metadata": {MATRIX_METADATA: matrix.to_dict(), "source": str(path)}}, "image")]


def write_unmixed(path, layer_data):
    """Save image layers (the unmixed labels, one channel each) as one OME-TIFF with provenance."""
    from unmix.io.images import Image, write_ome_tiff

    data = np.stack([np.asarray(data, dtype=np.float32) for data, _, _ in layer_data])
    # A layer that is one channel (an unmixed label, a channel of a sample) is saved under that
    # channel's name, so that the command line matches it (coloc --unmixed wants the labels).
    names = tuple(meta.get("metadata", {}).get(CHANNEL_NAMES, [None])[0] or meta.get("name", f"label{i}")
                  for i, (_, meta, _) in enumerate(layer_data))
    axes = "C" + "ZYX"[-(data.ndim - 1):] if data.ndim <= 4 else "CTZYX"[: data.ndim]
    provenance = {"written_by": "unmix napari plugin"}
    for _, meta, _ in layer_data:
        if "unmix_provenance" in meta.get("metadata", {}):
            provenance = meta["metadata"]["unmix_provenance"]
            break
    write_ome_tiff(path, Image(data, axes, names), provenance=provenance)
    return [str(path)]


def channel_layers(data, channel_names, group: str, metadata: dict | None = None) -> list:
    """One layer per channel of a multichannel image (C, ...): named "GROUP CHANNEL", coloured by
    the channel (:func:`unmix.report.style.channel_colour`), blended additively into a composite."""
    from napari.utils.colormaps import Colormap

    from unmix.report.style import channel_colour

    layers = []
    for c, channel in enumerate(channel_names):
        plane = data[c]
        colour = channel_colour(channel, c)
        layers.append((plane, {
            "name": f"{group} {channel}", "blending": "additive",
            "colormap": Colormap([[0, 0, 0, 1], [*colour, 1]], name=f"{group} {channel}"),
            "contrast_limits": (float(np.percentile(plane, 0.5)), float(np.percentile(plane, 99.8))),
            "metadata": {**(metadata or {}), CHANNEL_GROUP: group, CHANNEL_NAMES: [channel]}}, "image"))
    return layers


def demo_layers():
    """The demo scenario: the sample as one layer per channel (a composite), each control, the
    unstained specimen and the dark frame as hidden multichannel layers for the Measure widget."""
    from unmix.demo import demo_inputs
    from unmix.io.images import read_image

    inputs = demo_inputs()
    layers = []
    files = [(f"control {label} {i + 1}", path) for label, paths in inputs["controls"].items()
             for i, path in enumerate(paths)]
    files += [("unstained", inputs["unstained"]), ("dark", inputs["dark"])]
    for name, path in files:
        image = read_image(path)
        layers.append((np.asarray(image.data), {
            "name": name, "visible": False, "colormap": "gray",
            "metadata": {CHANNEL_NAMES: list(image.channel_names), "source": str(path)}}, "image"))
    sample = read_image(inputs["sample"])
    return layers + channel_layers(np.asarray(sample.data), sample.channel_names, "sample",
                                   {"source": str(inputs["sample"])})


def demo_stack_layers():
    """The demo's z-stack (C, Z, Y, X) as one layer per channel, shown in pixels like the demo sample; its
    voxel size (planes 0.3 µm apart) travels in the metadata, so the Overlap review gives depths in µm."""
    from unmix.demo import demo_inputs
    from unmix.io.images import read_image

    path = demo_inputs()["sample_stack"]
    stack = read_image(path)
    size = {axis: float(stack.pixel_size[axis]) for axis in "ZYX" if stack.pixel_size.get(axis)}
    return channel_layers(np.asarray(stack.data), stack.channel_names, "sample stack",
                          {"source": str(path), VOXEL_SIZE: size})
