"""How results look, wherever they are shown: the report, the figures and the napari plugin.

One definition each, so that a verdict looks the same in the browser and in the viewer:

- :data:`VERDICT_LOOK`: each colocalization verdict's symbol, colour and short heading. The
  colours are from the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"), told apart
  by people with the common colour-vision deficiencies; every verdict also has its own symbol and
  words, so no reading depends on colour.
- :data:`COMPARISON_LOOK`: colour and marker of the measured-versus-predicted verdicts.
- :data:`LABEL_COLOURS`: the display colour of the k-th label in composites (the report's sample
  thumbnails, the plugin's unmixed layers), as napari colormap names and RGB.
- :func:`wavelength_colour`: the perceived colour of a wavelength, for spectra plots;
  :func:`channel_colour`: an image channel's colour, from the wavelength in its name.
"""

from __future__ import annotations

import colorsys
from dataclasses import dataclass


@dataclass(frozen=True)
class VerdictLook:
    symbol: str
    colour: str       # background colour, hex; text on it is black
    heading: str      # the verdict in a few words


VERDICT_LOOK = {
    "bleed-through-only": VerdictLook("✗", "#E69F00", "Bleed-through only"),
    "inflated": VerdictLook("▼", "#F0E442", "Real, inflated by bleed-through"),
    "persists": VerdictLook("✓", "#56B4E9", "Real overlap (persists)"),
    "revealed": VerdictLook("▲", "#CC79A7", "Revealed by unmixing"),
    "none": VerdictLook("○", "#BBBBBB", "No overlap"),
    "inconclusive": VerdictLook("?", "#FFFFFF", "Inconclusive"),
}

# Measured-versus-predicted verdict -> (colour, matplotlib marker): Okabe-Ito hues, distinct shapes.
COMPARISON_LOOK = {
    "agrees": ("#009E73", "o"),
    "higher": ("#D55E00", "^"),
    "lower": ("#0072B2", "v"),
    "below-detection": ("#999999", "s"),
}

# (napari colormap name, RGB 0-1) of the k-th label; additive blending of the first three gives
# white where all three are bright.
LABEL_COLOURS = (
    ("cyan", (0.0, 1.0, 1.0)), ("magenta", (1.0, 0.0, 1.0)), ("yellow", (1.0, 1.0, 0.0)),
    ("green", (0.0, 1.0, 0.0)), ("red", (1.0, 0.0, 0.0)), ("blue", (0.0, 0.0, 1.0)),
    ("bop orange", (1.0, 0.5, 0.0)), ("gray", (1.0, 1.0, 1.0)),
)


def label_colour(k: int) -> tuple[str, tuple[float, float, float]]:
    """(napari colormap name, RGB) of the k-th label, cycling through :data:`LABEL_COLOURS`."""
    return LABEL_COLOURS[k % len(LABEL_COLOURS)]


def wavelength_colour(nm: float, *, on_white: bool = False) -> tuple[float, float, float]:
    """The perceived colour (RGB 0-1) of light of wavelength `nm`.

    Piecewise-linear hues over 380-750 nm with the brightness falling off at both ends of the
    visible range (a common approximation, from memory); outside it, grey. With `on_white` the
    colour is darkened enough to read as a line or text on a white page (yellow and green
    otherwise vanish).
    """
    if nm < 380 or nm > 750:
        return (0.5, 0.5, 0.5)
    stops = ((380, (0.38, 0.0, 0.6)), (440, (0.0, 0.0, 1.0)), (490, (0.0, 1.0, 1.0)), (510, (0.0, 1.0, 0.0)),
             (580, (1.0, 1.0, 0.0)), (645, (1.0, 0.0, 0.0)), (750, (0.5, 0.0, 0.0)))
    for (lo, c_lo), (hi, c_hi) in zip(stops, stops[1:]):
        if nm <= hi:
            t = (nm - lo) / (hi - lo)
            rgb = tuple(a + t * (b - a) for a, b in zip(c_lo, c_hi))
            break
    if on_white:
        hue, lightness, saturation = colorsys.rgb_to_hls(*rgb)
        rgb = colorsys.hls_to_rgb(hue, min(lightness, 0.42), saturation)
    return tuple(float(v) for v in rgb)


def channel_colour(name: str, index: int) -> tuple[float, float, float]:
    """Display colour of an image channel: the colour of the wavelength its name gives (``green525``,
    ``em 610``: a number within 380-750 nm), else the `index`-th label colour."""
    import re

    for number in re.findall(r"(?<!\d)\d{3}(?!\d)", name):
        if 380 <= int(number) <= 750:
            return wavelength_colour(float(number))
    return label_colour(index)[1]


def hex_colour(rgb) -> str:
    return "#" + "".join(f"{round(255 * v):02X}" for v in rgb)
