"""Matrix + stacks -> label abundances and their uncertainty.

In: a bleed-through matrix and pixels (arrays, or files in batch). Out:
per-pixel exact non-negative (or unconstrained) least-squares abundances,
optionally noise-weighted, their standard errors, and for files the unmixed
outputs with their saturation masks. The solver (:mod:`.solver`), its
generated vectorised kernels (:mod:`.codegen` writes :mod:`.unrolled`), the
generic per-pixel kernel (:mod:`.pixel_solver`), noise weighting
(:mod:`.weighting`, kernel :mod:`.weighted_solver`), standard errors
(:mod:`.uncertainty`) and the batch runner (:mod:`.batch`). The spillover
spreading of a matrix is a measured property: :mod:`unmix.measure.spreading`.
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "Unmixer": "solver",
    "unmix_weighted": "weighting",
    "standard_errors": "uncertainty",
    "apply_matrix": "batch",
    "ApplySettings": "batch",
    "FileResult": "batch",
})
