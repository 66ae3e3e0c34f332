"""Autofluorescence as a label: its signature measured on the cells of an unstained specimen.

Cells fluoresce on their own (flavins, NAD(P)H, lipofuscin...) with a
spectrum of their own. Subtracting one background level per channel removes
it only where it is uniform, and the median of an unstained field whose
cells cover less than half of it is the level *between* the cells, so the
cells' own autofluorescence stays in every channel and is unmixed into the
labels. With at least one channel more than the labels it can instead be
unmixed as a label of its own: its column of the matrix is measured from the
unstained specimen's cell pixels exactly as a label's from its control (the
neighbour-mean instrument and the slope against its brightest channel), and
the background subtracted becomes the level between the cells.

The cells are a mask given by the user, or the pixels whose smoothed sum of
channels (each above its background) lies above Otsu's threshold (Otsu
1979), which separates cells from the space between them when both are
present.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9:62-66 (1979) (from memory).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..errors import InputError

_SMOOTHING = 2.0  # Gaussian sigma (pixels) of the sum thresholded for cells


def check_autofluorescence(name: str, labels: Sequence[str], channels: Sequence[str], unstained) -> None:
    """InputError unless an autofluorescence label `name` can be measured and separated."""
    if not name or not str(name).strip():
        raise InputError("--autofluorescence: give the name of the autofluorescence label")
    if unstained is None:
        raise InputError(f"--autofluorescence {name}: needs --unstained, an unlabelled specimen whose cells show "
                         "the autofluorescence")
    if name in labels:
        raise InputError(f"--autofluorescence {name}: a label of that name has a --control; choose another name")
    if len(channels) < len(labels) + 1:
        raise InputError(
            f"--autofluorescence {name}: {len(channels)} channels cannot separate {len(labels)} labels plus "
            f"autofluorescence (needs at least {len(labels) + 1} channels); without it the unstained specimen's "
            "level is subtracted as background, which leaves the cells' own autofluorescence in the labels")


def cell_mask(stack: np.ndarray, given, where: str, read_options: dict | None = None) -> tuple[np.ndarray, str]:
    """The cells of an unstained specimen (C, P, Y, X): a (Y, X) or (P, Y, X) boolean mask, and how it was made.

    `given` is a mask (array, Image or path; non-zero = cell) or None (thresholded).
    """
    if given is not None:
        mask = _given_mask(given, read_options or {})
        if mask.shape != stack.shape[-2:] and mask.shape != stack.shape[1:]:
            raise InputError(f"--autofluorescence-mask: has shape {mask.shape}, the unstained specimen {where} "
                             f"{stack.shape[-2:]}; give a mask of the same size")
        how = "given"
    else:
        from scipy import ndimage
        from skimage.filters import threshold_otsu

        from .levels import summarise_channel

        above = sum(np.asarray(stack[c], dtype=np.float64) - summarise_channel(stack[c]).background
                    for c in range(stack.shape[0]))
        smooth = ndimage.gaussian_filter(np.nan_to_num(above), (0,) * (above.ndim - 2) + (_SMOOTHING,) * 2)
        if np.ptp(smooth) <= 0:
            raise InputError(f"{where}: the unstained specimen is flat: no cells to measure autofluorescence "
                             "on; give --autofluorescence-mask or another field")
        mask = smooth > threshold_otsu(smooth)
        how = "thresholded (Otsu)"
    if not mask.any():
        raise InputError(f"{where}: no cell pixels in the unstained specimen; give a mask with cells")
    return mask, how


def _given_mask(given, read_options: dict) -> np.ndarray:
    from ..io.images import Image, read_image

    if isinstance(given, (str, bytes)) or hasattr(given, "__fspath__"):
        given = read_image(given)
    data = np.asarray(given.data if isinstance(given, Image) else given)
    while data.ndim > 2 and data.shape[0] == 1:
        data = data[0]
    return data != 0
