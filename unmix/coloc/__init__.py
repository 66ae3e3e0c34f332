"""Raw image + matrix -> colocalization before and after unmixing, and a verdict.

In: a raw multichannel image, its matrix and a pair of labels. Out:
coefficients (Pearson, Spearman, Manders, Li's ICQ, Costes thresholds,
randomisation p-values; :mod:`.statistics`) before and after unmixing,
and the verdict built on them (:mod:`.verdict`).
"""

from .._lazy import lazy_exports

# Randomisation rounds by default: here, not in .verdict, so that the command line's parser and
# the plugin's widgets can show it without importing the compiled kernels.
ROUNDS = 1000

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "Coefficients": "statistics",
    "PairResult": "verdict",
    "analyse_pair": "verdict",
    "VERDICTS": "verdict",
})
