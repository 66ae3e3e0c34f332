"""Simulated two-label fields with known truth, for the colocalization tests and the calibration benchmark.

Each label is a non-negative structure image (spots and a fine texture, blurred by the PSF); labels
with a chosen true correlation share structure: A = S1 and B = w S1 + (1 - w) S2 (or w (max S1 - S1) +
(1 - w) S2 for a negative r), with S1 and S2 independent and identically distributed, so that the
population Pearson r is +-w / sqrt(w^2 + (1 - w)^2) by construction. The labels are mixed through a
bleed-through matrix and imaged by a camera model: Poisson shot noise, Gaussian read noise, gain,
offset (common practice for scientific cameras). The field's own true r is the Pearson r of the
noise-free abundances.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

GAIN = 2.0          # ADU per electron
OFFSET = 100.0      # ADU
READ_NOISE = 3.0    # electrons
BACKGROUND_E = 4.0  # electrons of diffuse background per pixel and channel
ANISOTROPIC = (2.5, 1.2, 1.2)  # PSF sigma in z, y, x (voxels): the axial blur is wider


def structure(rng, shape, psf_sigma=1.5) -> np.ndarray:
    """A non-negative structure image of peak about 1: spots and texture at least as large as the blur.

    `shape` may be (Y, X) or (Z, Y, X); `psf_sigma` one number or one per axis (an anisotropic PSF).
    """
    sigma = np.broadcast_to(np.asarray(psf_sigma, dtype=float), (len(shape),))
    spots = np.zeros(shape)
    count = int(np.prod(shape)) // 150
    spots[tuple(rng.integers(0, n, count) for n in shape)] = rng.uniform(0.3, 1.0, count)
    spots = ndimage.gaussian_filter(spots, np.maximum(sigma, 2.0), mode="wrap")
    texture = ndimage.gaussian_filter(rng.random(shape), 4.0, mode="wrap")
    image = spots / spots.std() + 0.5 * (texture - texture.min()) / texture.std()
    image = ndimage.gaussian_filter(image, sigma, mode="wrap")
    return image / np.percentile(image, 99.9)


def weight_for(r: float) -> float:
    """w with |r| = w / sqrt(w^2 + (1 - w)^2)."""
    r = abs(r)
    if r == 0:
        return 0.0
    # w / sqrt(w^2 + (1-w)^2) = r  ->  w^2 (1 - r^2) = r^2 (1 - w)^2
    t = r / np.sqrt(1 - r**2)
    return t / (1 + t)


@dataclass(frozen=True)
class PairScene:
    raw: np.ndarray         # (C, Y, X) camera image, ADU
    abundances: np.ndarray  # (2, Y, X) true label signals in primary-channel ADU above background
    matrix: np.ndarray      # (C, 2) true bleed-through matrix
    background: np.ndarray  # (C,) ADU
    true_r: float           # Pearson r of the true abundances over the field

    @property
    def read_variance(self):
        return np.full(self.raw.shape[0], (GAIN * READ_NOISE) ** 2)

    @property
    def gain(self):
        return np.full(self.raw.shape[0], GAIN)


def pair_scene(seed: int, *, r: float = 0.0, peak_a: float = 1000.0, ratio: float = 1.0, leak: float = 0.3,
               reverse_leak: float = 0.02, shape=(256, 256), psf_sigma=1.5) -> PairScene:
    """Two labels A and B in two channels; `leak` of A into B's channel, `reverse_leak` of B into A's.

    `peak_a` is A's peak in electrons, `ratio` B's peak relative to A's. A 3-D `shape` (Z, Y, X)
    gives a z-stack, channels first (C, Z, Y, X).
    """
    rng = np.random.default_rng(seed)
    s1, s2 = structure(rng, shape, psf_sigma), structure(rng, shape, psf_sigma)
    w = weight_for(r)
    b = w * (s1 if r >= 0 else s1.max() - s1) + (1 - w) * s2
    b = b / np.percentile(b, 99.9)
    electrons = np.stack([peak_a * s1, ratio * peak_a * b])
    matrix = np.array([[1.0, reverse_leak], [leak, 1.0]])
    mixed = np.tensordot(matrix, electrons, axes=(1, 0)) + BACKGROUND_E
    raw = GAIN * rng.poisson(mixed) + rng.normal(0, GAIN * READ_NOISE, mixed.shape) + OFFSET
    true_r = float(np.corrcoef(electrons[0].ravel(), electrons[1].ravel())[0, 1])
    background = np.full(2, OFFSET + GAIN * BACKGROUND_E)
    return PairScene(raw=raw, abundances=GAIN * electrons, matrix=matrix, background=background, true_r=true_r)


def measured_matrix(scene: PairScene, seed: int, *, relative_error: float = 0.03, floor: float = 0.002,
                    noise_error: float = 0.03):
    """The scene's matrix as a measurement would give it: each off-primary coefficient off by a normal
    error of standard deviation `floor` + `relative_error` x coefficient, stated as its covariance, and
    the camera's noise line off by a relative `noise_error` (source "controls")."""
    from unmix.matrix import BleedThroughMatrix

    rng = np.random.default_rng([seed, 99])
    truth = scene.matrix
    off = truth != 1.0
    sd = (floor + relative_error * np.abs(truth)) * off
    measured = truth + sd * rng.standard_normal(truth.shape)
    covariance = np.stack([np.diag(sd[:, k] ** 2) for k in range(truth.shape[1])])
    channels = tuple(f"ch{c}" for c in range(truth.shape[0]))
    scale = 1 + noise_error * rng.standard_normal()
    return BleedThroughMatrix(
        kind="measured", channels=channels, labels=("A", "B"), primary={"A": "ch0", "B": "ch1"},
        matrix=measured, ci95_low=measured - 1.96 * sd, ci95_high=measured + 1.96 * sd,
        background=scene.background, background_source="dark", saturation=np.full(truth.shape[0], 1e9),
        noise_model={"read_variance": scene.read_variance + GAIN**2 * BACKGROUND_E, "gain": scene.gain * scale,
                     "source": "controls"},
        column_covariance=covariance)


def mixed_truth_r(scene: PairScene) -> float:
    """Pearson r of the two primary channels without noise: what bleed-through alone makes of the raw r."""
    mixed = np.tensordot(scene.matrix, scene.abundances, axes=(1, 0))
    return float(np.corrcoef(mixed[0].ravel(), mixed[1].ravel())[0, 1])


def structure_snr(scene: PairScene) -> float:
    """The weaker label's structure over its unmixed noise: SD of its true abundance over the RMS of its
    least-squares noise (from the camera model), the smaller of the two labels."""
    rows = np.linalg.pinv(scene.matrix)
    signal = np.tensordot(scene.matrix, scene.abundances, axes=(1, 0))
    variance = (scene.read_variance + GAIN**2 * BACKGROUND_E)[:, None, None] + GAIN * signal
    ratios = []
    for k in range(2):
        noise = np.sqrt(np.mean(np.tensordot(rows[k] ** 2, variance, axes=(0, 0))))
        ratios.append(scene.abundances[k].std() / noise)
    return float(min(ratios))


def control_fields(seed: int, n_fields: int, *, leak: float = 0.3, between_sd: float = 0.1, peak: float = 1500.0,
                   shape=(128, 128)):
    """Single-label control fields (2 channels: the primary and one leak channel, as Images) whose leak
    coefficient differs between fields: leak x (1 + between_sd x a standard normal) per field."""
    from unmix.io.images import Image

    rng = np.random.default_rng([seed, 5])
    fields = []
    for _ in range(n_fields):
        coefficient = leak * (1 + between_sd * rng.standard_normal())
        label = peak * structure(rng, shape)
        electrons = np.stack([label, coefficient * label]) + BACKGROUND_E
        raw = GAIN * rng.poisson(electrons) + rng.normal(0, GAIN * READ_NOISE, electrons.shape) + OFFSET
        fields.append(Image(np.round(raw).astype(np.uint16), "CYX", ("ch0", "ch1")))
    return fields


def time_series(seed, frames=4, bleach=0.0, photoconvert=0.0):
    """(T, C, Z, Y, X) of 3 channels and 2 labels; A fades by `bleach` per frame; from frame 2 on, a part
    `photoconvert` of A emits with another spectrum (the matrix no longer fits)."""
    rng = np.random.default_rng(seed)
    shape = (3, 64, 64)
    matrix = np.array([[1.0, 0.05], [0.3, 1.0], [0.1, 0.4]])
    s1, s2 = structure(rng, shape, ANISOTROPIC), structure(rng, shape, ANISOTROPIC)
    data = []
    for t in range(frames):
        a = 2000 * (1 - bleach) ** t * s1
        electrons = np.tensordot(matrix, np.stack([a, 800 * (0.5 * s1 + 0.5 * s2)]), axes=(1, 0))
        if t >= 2 and photoconvert:
            electrons += np.tensordot([0.0, 0.1, 1.0], photoconvert * a[None], axes=0)[:, 0]
        data.append(GAIN * rng.poisson(electrons + BACKGROUND_E)
                    + rng.normal(0, GAIN * READ_NOISE, electrons.shape) + OFFSET)
    return np.stack(data), matrix


def series_matrix(matrix, path):
    """The matrix file of :func:`time_series` (measured, with intervals, covariance and the camera's noise line)."""
    from unmix.matrix import BleedThroughMatrix

    covariance = np.stack([np.diag((0.003 * (matrix[:, k] != 1)) ** 2) for k in range(2)])
    BleedThroughMatrix(kind="measured", channels=("c0", "c1", "c2"), labels=("A", "B"),
                       primary={"A": "c0", "B": "c1"}, matrix=matrix, ci95_low=matrix - 0.006 * (matrix != 1),
                       ci95_high=matrix + 0.006 * (matrix != 1), background=np.full(3, OFFSET + GAIN * BACKGROUND_E),
                       background_source="dark", saturation=np.full(3, 65535.0),
                       noise_model={"read_variance": [(GAIN * READ_NOISE) ** 2 + GAIN**2 * BACKGROUND_E] * 3,
                                    "gain": [GAIN] * 3, "source": "controls"},
                       column_covariance=covariance).save(path)
    return path


def write_stack(path, raw, axes="CZYX", names=("ch0", "ch1"), z_um=None):
    """`raw` as an OME-TIFF (tifffile, the reference writer) with axes, channel names and Z spacing."""
    import tifffile

    metadata = {"axes": axes, "Channel": {"Name": list(names)}}
    if z_um:
        metadata["PhysicalSizeZ"] = z_um
    tifffile.imwrite(path, np.round(raw).astype(np.uint16), ome=True, metadata=metadata)
    return path
