"""napari plugin for reviewing bleed-through: measure, unmix and judge overlap on screen.

One module per dock widget (``measure_widget``, ``unmix_widget``,
``overlap_widget``, ``prediction_widget``); what they share is in ``layers``;
the reader, writer and sample data are in ``io``. The widgets only translate
between napari layers and the :mod:`unmix` library; all computation lives in
the library and runs in thread workers.
"""

_WIDGETS = {"MeasureWidget": "measure_widget", "UnmixWidget": "unmix_widget",
            "OverlapWidget": "overlap_widget", "PredictionWidget": "prediction_widget"}
__all__ = list(_WIDGETS)


def __getattr__(name):
    if name in _WIDGETS:
        from importlib import import_module

        return getattr(import_module(f".{_WIDGETS[name]}", __name__), name)
    raise AttributeError(name)
