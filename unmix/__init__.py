"""Measure, predict and remove fluorescence bleed-through; judge colocalization before and after.

The pipeline, one sub-package per stage (data flows one way)::

    io -> measure -> engine -> coloc -> report -> cli, demo (and the napari plugin)
          optics (beside measure: the matrix predicted from spectra and optics)

:mod:`unmix.matrix` (the bleed-through matrix) and :mod:`unmix.errors` are
shared by every stage. The public API is imported lazily, so that the command
line starts fast and pays only for the libraries a subcommand uses::

    import unmix
    matrix = unmix.measure_files({"LabelA": ["a.ome.tif"], "LabelB": ["b.ome.tif"]})
    matrix.save("matrix.json")
"""

from pathlib import Path as _Path

from ._lazy import lazy_exports
from ._numba_cache import configure as _configure_numba_cache
from ._version import __version__

_configure_numba_cache(_Path(__file__).parent)

__getattr__, __dir__, _names = lazy_exports(__name__, {
    "Image": "io.images",
    "read_image": "io.images",
    "read_images": "io.images",
    "write_ome_tiff": "io.images",
    "write_ome_zarr": "io.images",
    "BleedThroughMatrix": "matrix",
    "load_matrix": "matrix",
    "MeasureSettings": "measure.controls",
    "measure_matrix": "measure.controls",
    "measure_files": "measure.controls",
    "Registration": "measure.registration",
    "fit_from_beads": "measure.registration",
    "fit_from_controls": "measure.registration",
    "load_registration": "measure.registration",
    "read_settings": "io.acquisition",
    "check_settings": "io.acquisition",
    "Unmixer": "engine.solver",
    "apply_matrix": "engine.batch",
    "ApplySettings": "engine.batch",
    "load_description": "optics.description",
    "Description": "optics.description",
    "predict": "optics.prediction",
    "rank_setups": "optics.prediction",
    "compare": "optics.comparison",
    "analyse_pair": "coloc.verdict",
    "InputError": "errors",
    "InputWarning": "errors",
    "run_demo": "demo.runner",
})
__all__ = ["__version__", *_names]
