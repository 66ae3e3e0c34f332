"""Measure, predict and remove fluorescence bleed-through.

The public API is imported lazily, so that the command line starts fast and
pays only for the libraries a subcommand uses::

    import unmix
    matrix = unmix.measure_files({"LabelA": ["a.ome.tif"], "LabelB": ["b.ome.tif"]})
    matrix.save("matrix.json")
"""

from importlib import import_module

from ._version import __version__

_EXPORTS = {
    "Image": "images",
    "read_image": "images",
    "read_images": "images",
    "write_ome_tiff": "images",
    "write_ome_zarr": "images",
    "BleedThroughMatrix": "matrix",
    "load_matrix": "matrix",
    "MeasureSettings": "measure",
    "measure_matrix": "measure",
    "measure_files": "measure",
    "Unmixer": "solve",
    "apply_matrix": "batch",
    "ApplySettings": "batch",
    "load_description": "optics",
    "Description": "optics",
    "predict": "predict",
    "rank_setups": "predict",
    "compare": "compare",
    "InputError": "errors",
    "InputWarning": "errors",
    "run_demo": "demo",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'unmix' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
