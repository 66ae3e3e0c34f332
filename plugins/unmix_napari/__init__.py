"""napari plugin for reviewing bleed-through: measure, unmix and judge overlap on screen.

The widgets only translate between napari layers and the :mod:`unmix`
library; all computation lives in the library and runs in thread workers.
"""

__all__ = ["MeasureWidget", "UnmixWidget", "OverlapWidget", "PredictionWidget"]


def __getattr__(name):
    if name in __all__:
        from . import widgets

        return getattr(widgets, name)
    raise AttributeError(name)
