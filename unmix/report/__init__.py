"""Results -> what people read: the HTML report, figures and terminal tables.

In: matrices, comparisons and colocalization results. Out: one self-contained
HTML report (:mod:`.html`), matplotlib figures (:mod:`.plots`) and
terminal tables (:mod:`.summary`). Imported only by the command line, the
demo and the napari plugin.
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "build_report": "html",
    "write_report": "html",
    "load_coloc_results": "html",
    "table": "summary",
    "matrix_summary": "summary",
    "matrix_rows": "summary",
})
