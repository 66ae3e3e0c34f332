"""Controls -> the measured bleed-through matrix.

In: single-label control images (several fields per label), an unstained
specimen or a dark frame. Out: a :class:`unmix.matrix.BleedThroughMatrix`
with 95 % intervals and QC figures. Also the per-channel background and
saturation levels (:mod:`.levels`) that later stages reuse.
"""

from .._lazy import lazy_exports

__getattr__, __dir__, __all__ = lazy_exports(__name__, {
    "MeasureSettings": "controls",
    "measure_matrix": "controls",
    "measure_files": "controls",
    "ChannelSummary": "levels",
    "summarise_channel": "levels",
    "saturation_level": "levels",
    "per_channel_levels": "levels",
})
