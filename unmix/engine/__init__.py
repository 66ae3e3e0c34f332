"""Matrix + stacks -> label abundances.

In: a bleed-through matrix and pixels (arrays, or files in batch). Out:
per-pixel exact non-negative (or unconstrained) least-squares abundances,
and for files the unmixed outputs with their saturation masks. The solver
(:mod:`.solver`), its generated vectorised kernels (:mod:`.codegen` writes
:mod:`.unrolled`), the per-pixel exact fallback (:mod:`.pixel_solver`) and
the batch runner (:mod:`.batch`).
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "Unmixer": "solver",
    "apply_matrix": "batch",
    "ApplySettings": "batch",
    "FileResult": "batch",
})
