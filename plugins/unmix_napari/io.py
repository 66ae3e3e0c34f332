"""Reader, writer and sample-data contributions: files <-> napari layer data."""

from __future__ import annotations

from pathlib import Path

import numpy as np

MATRIX_METADATA = "unmix_matrix"
CHANNEL_NAMES = "channel_names"


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
    names = tuple(meta.get("name", f"label{i}") for i, (_, meta, _) in enumerate(layer_data))
    axes = "C" + "ZYX"[-(data.ndim - 1):] if data.ndim <= 4 else "CTZYX"[: data.ndim]
    provenance = {"written_by": "unmix napari plugin"}
    for _, meta, _ in layer_data:
        if "unmix_provenance" in meta.get("metadata", {}):
            provenance = meta["metadata"]["unmix_provenance"]
            break
    write_ome_tiff(path, Image(data, axes, names), provenance=provenance)
    return [str(path)]


def demo_layers():
    """The demo scenario: each control, the unstained specimen and the sample as multichannel layers."""
    from unmix.demo import demo_inputs
    from unmix.io.images import read_image

    inputs = demo_inputs()
    layers = []
    files = [(f"control {label} {i + 1}", path) for label, paths in inputs["controls"].items()
             for i, path in enumerate(paths)]
    files += [("unstained", inputs["unstained"]), ("dark", inputs["dark"]), ("sample", inputs["sample"])]
    for name, path in files:
        image = read_image(path)
        layers.append((np.asarray(image.data), {
            "name": name, "visible": name == "sample", "colormap": "gray",
            "metadata": {CHANNEL_NAMES: list(image.channel_names), "source": str(path)}}, "image"))
    return layers
