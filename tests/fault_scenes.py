"""Simulated single-label controls with the detector faults that bias a measured matrix, and known truth.

A control is a field of blurred spots of varied brightness on a dark background, seen in a primary
channel and in leak channels (coefficient = leak x primary signal), imaged by a camera model: Poisson
shot noise, Gaussian read noise, gain and offset (common practice for scientific cameras). Each fault
is applied where it happens in a real instrument:

- compression: the detector's response x / (1 + x / knee) above the offset (a gain that falls as the
  signal rises);
- clipped offset: the offset set so low that the background's noise is cut at 0;
- correlated noise: the noise of every channel smoothed between neighbouring pixels (what
  deconvolution, denoising, lossy compression or line filtering leave behind);
- a lateral (dy, dx) or axial shift of one channel against the others (chromatic misregistration).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

GAIN = 2.0          # ADU per electron
OFFSET = 100.0      # ADU
READ_NOISE = 3.0    # electrons
BACKGROUND_E = 4.0  # electrons of diffuse background per pixel and channel


def spots(rng, shape, psf_sigma: float = 1.5, density: float = 1 / 120) -> np.ndarray:
    """Blurred spots of brightness 0.1-1 (peak about 1) on 0: signals that span the whole range (2-D or 3-D)."""
    image = np.zeros(shape)
    count = max(1, int(np.prod(shape) * density))
    index = tuple(rng.integers(0, n, count) for n in shape)
    np.add.at(image, index, rng.uniform(0.1, 1.0, count))
    # A z-stack's blur is about twice as long axially as laterally, in planes of the same size (common practice).
    sigma = (2 * max(psf_sigma, 1.0),) * (len(shape) - 2) + (max(psf_sigma, 1.0),) * 2
    image = ndimage.gaussian_filter(image, sigma, mode="wrap")
    return image / np.percentile(image, 99.9)


def fault_control(seed: int, *, leaks=(0.3,), peak: float = 800.0, shape=(256, 256), knee: float | None = None,
                  offset: float = OFFSET, correlated_sigma: float | None = None, shift=None, shifted_channel: int = 1,
                  psf_sigma: float = 1.5, density: float = 1 / 120, dtype=np.uint16) -> np.ndarray:
    """One control field (C, *shape) in ADU: channel 0 primary (peak `peak` ADU above background),
    channels 1.. leak channels with the coefficients `leaks`.

    `knee`: detector compression x / (1 + x / knee) of the signal above the offset, in ADU.
    `offset`: the camera offset in ADU (below about 3 noise SDs, the background is clipped at 0).
    `correlated_sigma`: the noise is smoothed by a Gaussian of this sigma in pixels (variance kept).
    `shift`: sub-pixel shift of channel `shifted_channel`, one value per spatial axis (Fourier shift).
    `density`: spots per pixel (per voxel in a z-stack).
    """
    rng = np.random.default_rng(seed)
    signal = spots(rng, shape, psf_sigma, density) * peak / GAIN
    coefficients = np.concatenate([[1.0], np.asarray(leaks, dtype=float)])
    electrons = coefficients.reshape((-1,) + (1,) * len(shape)) * signal + BACKGROUND_E
    noise = rng.poisson(electrons) - electrons + rng.normal(0, READ_NOISE, electrons.shape)
    if correlated_sigma:
        for c in range(noise.shape[0]):
            smooth = ndimage.gaussian_filter(noise[c], correlated_sigma)
            noise[c] = smooth * noise[c].std() / smooth.std()
    adu = GAIN * (electrons + noise)
    if shift is not None:
        adu[shifted_channel] = np.real(np.fft.ifftn(ndimage.fourier_shift(np.fft.fftn(adu[shifted_channel]),
                                                                          shift)))
    if knee is not None:
        adu = adu / (1 + np.maximum(adu, 0) / knee)
    raw = np.round(adu + offset)
    if np.issubdtype(dtype, np.integer):
        raw = np.clip(raw, 0, np.iinfo(dtype).max)
    return raw.astype(dtype)


def bead_field(seed: int, shifts, *, shape=(256, 256), beads: int = 40, peak: float = 2000.0, psf_sigma: float = 1.2,
               dtype=np.uint16) -> np.ndarray:
    """Multicolour sub-resolution beads seen in every channel (C, *shape), channel c displaced by
    `shifts[c]` (one value per spatial axis; Fourier shift), with the camera model above."""
    rng = np.random.default_rng(seed)
    image = np.zeros(shape)
    index = tuple(rng.integers(8, n - 8, beads) for n in shape)
    image[index] = rng.uniform(0.5, 1.0, beads)
    sigma = (2 * psf_sigma,) * (len(shape) - 2) + (psf_sigma,) * 2
    image = ndimage.gaussian_filter(image, sigma)
    image = image / image.max() * peak / GAIN
    channels = []
    for shift in shifts:
        moved = np.real(np.fft.ifftn(ndimage.fourier_shift(np.fft.fftn(image), shift)))
        electrons = np.maximum(moved, 0) + BACKGROUND_E
        adu = GAIN * (rng.poisson(electrons) + rng.normal(0, READ_NOISE, electrons.shape)) + OFFSET
        channels.append(np.clip(np.round(adu), 0, np.iinfo(dtype).max))
    return np.stack(channels).astype(dtype)


def cells(rng, shape, count: int = 10, radius=(14, 26), psf_sigma: float = 1.5):
    """Round cells covering about a quarter of the field: their mask and a cellular autofluorescence map
    (textured, 0.5-1 inside, blurred by the optics, peak about 1)."""
    yy, xx = np.indices(shape)
    mask = np.zeros(shape, bool)
    for _ in range(count):
        cy, cx = (rng.uniform(r, n - r) for n, r in zip(shape, (radius[1],) * 2))
        mask |= (yy - cy) ** 2 + (xx - cx) ** 2 <= rng.uniform(*radius) ** 2
    texture = ndimage.gaussian_filter(rng.random(shape), 3.0)
    texture = 0.5 + 0.5 * (texture - texture.min()) / np.ptp(texture)
    signal = ndimage.gaussian_filter(mask * texture, psf_sigma)
    return mask, signal / signal.max()


def mixed_field(rng, columns, maps, *, between_e: float = 20.0) -> np.ndarray:
    """A field (C, Y, X) in ADU of labels with the bleed-through `columns` (C x K, each 1 at its primary)
    and abundance `maps` (K, Y, X, ADU in the primary), over a uniform level `between_e` electrons (the
    medium between cells), with the camera model above."""
    columns = np.asarray(columns, dtype=float)
    electrons = np.tensordot(columns, np.asarray(maps, dtype=float) / GAIN, axes=(1, 0)) + between_e
    adu = GAIN * (rng.poisson(np.maximum(electrons, 0)) + rng.normal(0, READ_NOISE, electrons.shape)) + OFFSET
    return np.clip(np.round(adu), 0, 65535).astype(np.uint16)
