"""Spectra and optics -> the predicted bleed-through matrix, and its comparison with a measured one.

In: a description file (labels' spectra, sources, filters, detectors). Out: a
predicted matrix (:mod:`.prediction`) and, given a measured matrix, a verdict
per coefficient (:mod:`.comparison`). Sits beside :mod:`unmix.measure`:
neither imports the other.
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "Description": "description",
    "load_description": "description",
    "with_channel_parts": "description",
    "Prediction": "prediction",
    "predict": "prediction",
    "rank_setups": "prediction",
    "Comparison": "comparison",
    "compare": "comparison",
    "aligned_prediction": "comparison",
    "write_comparison": "comparison",
})
