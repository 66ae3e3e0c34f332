"""Controls -> the measured bleed-through matrix.

In: single-label control images (several fields per label), an unstained
specimen or a dark frame. Out: a :class:`unmix.matrix.BleedThroughMatrix`
with 95 % intervals and QC figures (detector faults, registration, fields
that disagree). Also the per-channel background and saturation levels
(:mod:`.levels`) that later stages reuse, the chromatic registration
(:mod:`.registration`), the autofluorescence label (:mod:`.autofluorescence`),
the detector's noise model (:mod:`.noise`) and the spillover spreading that
follows from it (:mod:`.spreading`).
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
    "clipped_offset": "levels",
    "Registration": "registration",
    "fit_from_beads": "registration",
    "fit_from_controls": "registration",
    "load_registration": "registration",
    "register_stack": "registration",
    "register_plane": "registration",
    "spreading_matrix": "spreading",
    "label_noise": "spreading",
})
