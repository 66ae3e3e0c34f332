"""Per-channel illumination estimated from several images of a batch.

Uneven illumination makes two channels correlate even when the labels do
not, so each channel is divided by its own flat field before unmixing.
Without flat-field images, each channel's illumination is estimated from
many fields: the pixel-wise median over the fields (specimen structures
fall at different places in different fields and average out), smoothed
over a sixteenth of the field. Dividing both channels by a common estimate
(for example a blur of their sum) is never done: a shared divisor creates
correlation between ratios of otherwise independent quantities (Pearson
1897).

References
----------
.. [1] K. Pearson, "Mathematical contributions to the theory of evolution. On
   a form of spurious correlation which may arise when indices are used in
   the measurement of organs", Proc. R. Soc. Lond. 60:489-498 (1897).
"""

from __future__ import annotations

import numpy as np

MIN_IMAGES = 3
_FLOOR = 1e-3  # relative to the mean: never divide by (nearly) nothing


def illumination_estimate(images, background=None) -> np.ndarray:
    """Per-channel flat fields (C, Y, X), each of mean 1, from several images (each C, Y, X).

    Parameters
    ----------
    images : sequence of ndarray (C, Y, X)
        Fields of one batch, same size and channels.
    background : sequence of float, optional
        Per-channel level subtracted first (default: none).
    """
    from scipy import ndimage

    stack = np.stack([np.asarray(image, dtype=np.float64) for image in images])
    if stack.shape[0] < MIN_IMAGES:
        raise ValueError(f"images: need at least {MIN_IMAGES} fields to estimate illumination, got {stack.shape[0]}")
    if background is not None:
        stack = stack - np.asarray(background, dtype=np.float64)[None, :, None, None]
    median = np.median(stack, axis=0)
    sigma = max(median.shape[1:]) / 16
    flats = np.stack([ndimage.gaussian_filter(np.maximum(channel, 0), sigma, mode="nearest") for channel in median])
    means = flats.mean(axis=(1, 2), keepdims=True)
    if np.any(means <= 0):
        raise ValueError("images: a channel has no signal above background to estimate its illumination from")
    flats = flats / means
    return np.maximum(flats, _FLOOR)
