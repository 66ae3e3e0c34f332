"""Chromatic registration: per-channel shifts, measured on beads or controls, and applied.

Channels of one field are seen through different filters (and often different
detectors), so the same structure can sit a fraction of a pixel apart in
them, laterally and axially. Bleed-through coefficients and unmixing compare
channels pixel by pixel: a shift of 1 pixel measured a leak 20 % low in
simulations. The shift of each channel against a reference channel is the
position of the peak of their phase correlation (scikit-image's
``phase_cross_correlation``, sub-pixel by upsampled DFT, Guizar-Sicairos et
al. 2008) on high-pass-filtered images (smooth components such as uneven
illumination differ between channels and would displace the peak).

Shifts are applied by a Fourier phase ramp (``scipy.ndimage.fourier_shift``):
a pure phase change leaves the power spectrum of pixel noise flat, so white
noise stays white (interpolation would smooth it and bias the neighbour-mean
instrument of the measurement). The wrapped border is cropped (measurement)
or set to NaN (unmixing), and saturated pixels stay marked saturated.

References
----------
.. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient
   subpixel image registration algorithms", Opt. Lett. 33:156-158 (2008)
   (from memory).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from ..errors import InputError, read_user_text

FORMAT = "unmix-registration"
VERSION = 1
SOURCES = ("beads", "controls")
MIN_BEADS = 5            # beads per channel needed to fit a shift (a rule of this tool)
BEAD_SNR = 10.0          # a bead peaks this many noise SDs above the background (a rule of this tool)
MAX_WINDOW_ERROR = 0.25  # a window's shift is used when its standard error is at most this (pixels)
_UPSAMPLE = 10           # sub-pixel precision of the peak when checking controls: 1/10 pixel
_FIT_UPSAMPLE = 10       # and when fitting a registration (then averaged over the windows)
_MIN_QUADRANT = 32       # smallest side of a window quadrant used for the shift's uncertainty
_WINDOW = 64             # side of the windows measured around beads or bright structures
_TILES = 3               # windows on a 3 x 3 grid of tiles over the field
_BLOCK = 8               # beads are counted as local maxima of 8 x 8 block maxima
_MIN_PLANES_FOR_AXIAL = 4


def high_pass(plane: np.ndarray, size: int = 17) -> np.ndarray:
    """The plane minus its local mean (a `size` box): structures kept, smooth components removed."""
    from scipy.ndimage import uniform_filter

    plane = np.asarray(plane, dtype=np.float32)
    return plane - uniform_filter(plane, size)


def _peak(reference: np.ndarray, moving: np.ndarray, upsample: int = _UPSAMPLE) -> np.ndarray:
    from skimage.registration import phase_cross_correlation

    if not (np.any(reference) and np.any(moving)):
        return np.full(reference.ndim, np.nan)
    shift, _, _ = phase_cross_correlation(reference, moving, upsample_factor=upsample, normalization=None)
    return np.asarray(shift, dtype=float)


def channel_shift(reference: np.ndarray, moving: np.ndarray, error_above: float = 0.0, upsample: int = _UPSAMPLE
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Shift of `moving` against `reference` (high-pass filtered windows, 2-D or 3-D), and its standard error.

    The shift is the one that registers `moving` onto `reference`
    (scikit-image's convention), one value per axis, to 1 / `upsample` pixel. Its standard error comes
    from the four lateral quadrants of the window measured on their own: the
    spread of four independent estimates / 2 (NaN when the window is too
    small to split). It is computed only when the shift is larger than
    `error_above` on some axis (0 otherwise: a shift that small needs no
    error to be judged harmless).
    """
    shift = _peak(reference, moving, upsample)
    ny, nx = reference.shape[-2:]
    if not np.any(np.abs(shift) > error_above):
        return shift, np.zeros_like(shift)
    if min(ny, nx) < 2 * _MIN_QUADRANT:
        return shift, np.full_like(shift, np.nan)
    quadrants = []
    for rows in (slice(0, ny // 2), slice(ny // 2, ny)):
        for cols in (slice(0, nx // 2), slice(nx // 2, nx)):
            quadrants.append(_peak(reference[..., rows, cols], moving[..., rows, cols], upsample))
    quadrants = np.array(quadrants)
    with np.errstate(invalid="ignore"):
        spread = np.std(quadrants, axis=0, ddof=1) / 2 if np.isfinite(quadrants).all() else np.full_like(shift,
                                                                                                         np.nan)
    return shift, spread


# --- the registration and its file -------------------------------------------------------------------------

@dataclass(frozen=True)
class Registration:
    """Per-channel shifts that register every channel onto a reference channel.

    Attributes
    ----------
    channels : tuple of str
    reference : str
        The channel the others are registered onto (its shift is 0).
    shifts : ndarray, shape (C, 3)
        (dz, dy, dx) per channel, in planes and pixels: the shift that moves
        the channel's content onto the reference's (at the field's centre
        when `affine` is given).
    shape : tuple of int
        (Y, X) of the images it was measured on; images of another size are refused.
    affine : ndarray, shape (C, 2, 3), or None
        Lateral shift varying over the field: (dy, dx) at pixel (y, x) =
        ``affine[c, :, :2] @ (y - cy, x - cx) + affine[c, :, 2]``, (cy, cx)
        the field's centre.
    residual_px : ndarray, shape (C,), or None
        Root-mean-square lateral shift left after correction, over the
        windows it was fitted on (what the model does not explain).
    source : {"beads", "controls"}
    provenance : dict
    """

    channels: tuple
    reference: str
    shifts: np.ndarray
    shape: tuple
    affine: np.ndarray | None = None
    residual_px: np.ndarray | None = None
    source: str = "beads"
    provenance: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        def listed(a):
            return None if a is None else np.asarray(a, dtype=float).tolist()

        return {"format": FORMAT, "version": VERSION, "source": self.source, "channels": list(self.channels),
                "reference": self.reference, "shape": [int(n) for n in self.shape],
                "shift": {c: listed(self.shifts[i]) for i, c in enumerate(self.channels)},
                "affine": None if self.affine is None else {c: listed(self.affine[i])
                                                            for i, c in enumerate(self.channels)},
                "residual_px": None if self.residual_px is None else {
                    c: _finite_or_none(self.residual_px[i]) for i, c in enumerate(self.channels)},
                "provenance": self.provenance}

    def save(self, path) -> Path:
        """Write the registration file (JSON) atomically."""
        from ..io.atomic import write_text_atomic

        write_text_atomic(path, json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n")
        return Path(path)

    def shift_of(self, channel: str) -> np.ndarray:
        return self.shifts[self.channels.index(channel)]

    def check(self, channels: Sequence[str], shape, where: str, what: str = "the image") -> None:
        """InputError unless the registration covers `channels` and was measured on images of `shape` (Y, X)."""
        missing = [c for c in channels if c not in self.channels]
        if missing:
            raise InputError(f"{where}: the registration has channels {list(self.channels)} but {what} has "
                             f"{list(channels)} ({missing} missing); measure the registration in the same channels")
        if tuple(int(n) for n in shape[-2:]) != tuple(self.shape):
            raise InputError(f"{where}: the registration was measured on {self.shape[0]} x {self.shape[1]} images, "
                             f"{what} is {shape[-2]} x {shape[-1]}; measure a registration on images of this size")


def _finite_or_none(value):
    value = float(value)
    return value if math.isfinite(value) else None


def _bad(where: str, what: str) -> InputError:
    return InputError(f"{where}: {what}; fix or re-create the registration file with 'unmix align'")


def registration_from_dict(data, where: str = "registration") -> Registration:
    """Validate a parsed registration file; InputError naming the first thing that is wrong."""
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise _bad(where, f"not a registration file ('format' must be \"{FORMAT}\")")
    if data.get("version") != VERSION or isinstance(data.get("version"), bool):
        raise _bad(where, f"unsupported version {data.get('version')!r} (this tool reads {VERSION})")
    channels = data.get("channels")
    if not isinstance(channels, list) or not channels or not all(isinstance(c, str) and c for c in channels) \
            or len(set(channels)) != len(channels):
        raise _bad(where, "'channels' must be a list of distinct names")
    if data.get("reference") not in channels:
        raise _bad(where, "'reference' must be one of 'channels'")
    if data.get("source") not in SOURCES:
        raise _bad(where, f"'source' must be one of {list(SOURCES)}")
    shape = data.get("shape")
    if not (isinstance(shape, list) and len(shape) == 2 and all(isinstance(n, int) and n > 0 for n in shape)):
        raise _bad(where, "'shape' must be [Y, X], two positive integers")

    def per_channel(key, size, required):
        value = data.get(key)
        if value is None and not required:
            return None
        if not isinstance(value, dict) or set(value) != set(channels):
            raise _bad(where, f"'{key}' must give every channel")
        try:
            array = np.array([value[c] for c in channels], dtype=float)
        except (TypeError, ValueError):
            raise _bad(where, f"'{key}' holds something that is not a number") from None
        if array.shape[1:] != size or not np.all(np.isfinite(array)):
            raise _bad(where, f"'{key}' must hold finite numbers of shape {list(size)} per channel")
        return array

    shifts = per_channel("shift", (3,), True)
    affine = per_channel("affine", (2, 3), False)
    residual = data.get("residual_px")
    if residual is not None:
        if not isinstance(residual, dict) or set(residual) != set(channels):
            raise _bad(where, "'residual_px' must give every channel")
        residual = np.array([np.nan if residual[c] is None else residual[c] for c in channels], dtype=float)
    provenance = data.get("provenance") or {}
    if not isinstance(provenance, dict):
        raise _bad(where, "'provenance' must be a JSON object")
    return Registration(tuple(channels), data["reference"], shifts, tuple(shape), affine, residual, data["source"],
                        provenance)


def load_registration(path) -> Registration:
    """Read and validate a registration file written by ``unmix align``."""
    text = read_user_text(path, "registration file", "check the file")
    try:
        data = json.loads(text)
    except (json.JSONDecodeError, RecursionError):
        raise InputError(f"{path}: not valid JSON; fix or re-create the registration file") from None
    return registration_from_dict(data, str(path))


# --- applying it ----------------------------------------------------------------------------------------------

_PAD = 16  # mirror padding before a Fourier shift, so that the field's edges do not ring into it


def _fourier_shift(planes: np.ndarray, shift) -> np.ndarray:
    """`planes` (..., last axes) moved by `shift` (one value per last axis) with a Fourier phase ramp.

    The last axes are mirror-padded first (a mirrored field is continuous
    across its wrapped edges, so the phase ramp does not ring there), then
    cropped back to their size.
    """
    from scipy import ndimage

    shift = [float(v) for v in shift]
    axes = tuple(range(planes.ndim - len(shift), planes.ndim))
    pads = [min(_PAD + int(math.ceil(abs(v))), planes.shape[a] - 1) if planes.shape[a] > 1 else 0
            for a, v in zip(axes, shift)]
    width = [(0, 0)] * (planes.ndim - len(shift)) + [(p, p) for p in pads]
    padded = np.pad(np.asarray(planes, dtype=np.float32), width, mode="reflect")
    spectrum = np.fft.rfftn(padded, axes=axes)
    # fourier_shift on a real-FFT spectrum: n is the length of the last axis before the transform.
    moved = ndimage.fourier_shift(spectrum, shift, n=padded.shape[-1], axis=padded.ndim - 1)
    moved = np.fft.irfftn(moved, s=[padded.shape[a] for a in axes], axes=axes)
    crop = (slice(None),) * (planes.ndim - len(shift)) + tuple(slice(p, p + planes.shape[a])
                                                                 for a, p in zip(axes, pads))
    return moved[crop].astype(np.float32)


def _lateral_map(affine: np.ndarray, shape):
    """(matrix, offset) for scipy.ndimage.affine_transform: output pixel o reads input o - d(o)."""
    centre = (np.asarray(shape[-2:], dtype=float) - 1) / 2
    linear, translation = affine[:, :2], affine[:, 2]
    return np.eye(2) - linear, linear @ centre - translation


def _move(plane: np.ndarray, shift, affine) -> np.ndarray:
    from scipy import ndimage

    if affine is None:
        return _fourier_shift(plane, shift)
    matrix, offset = _lateral_map(affine, plane.shape)
    # An affine needs interpolation (cubic spline): it smooths the noise a little, unlike a pure shift.
    return ndimage.affine_transform(plane.astype(np.float32), matrix, offset, order=3, mode="nearest")


def _displacement_bound(registration: Registration, index: int, shape) -> np.ndarray:
    """The largest |dy|, |dx| of a channel's correction over a field of `shape` (Y, X)."""
    if registration.affine is None:
        return np.abs(registration.shifts[index, 1:])
    ny, nx = shape[-2:]
    corners = np.array([[y, x] for y in (0, ny - 1) for x in (0, nx - 1)], dtype=float) - (np.array(
        [ny - 1, nx - 1]) / 2)
    affine = registration.affine[index]
    return np.abs(corners @ affine[:, :2].T + affine[:, 2]).max(axis=0)


def _saturated_after(values: np.ndarray, level: float, shift, affine) -> np.ndarray:
    """Where pixels at or above `level` land after the move (nearest pixel, one pixel of margin)."""
    from scipy import ndimage

    saturated = values >= level
    if not saturated.any():
        return saturated
    if affine is None:
        whole = np.round(np.asarray(shift)).astype(int)
        moved = np.roll(saturated, tuple(whole), axis=tuple(range(saturated.ndim - len(whole), saturated.ndim)))
    else:
        matrix, offset = _lateral_map(affine, saturated.shape)
        moved = ndimage.affine_transform(saturated.astype(np.uint8), matrix, offset, order=0).astype(bool)
    return ndimage.binary_dilation(moved, iterations=1)


def register_stack(stack: np.ndarray, channel_names: Sequence[str], registration: Registration, n_z: int = 1,
                   levels=None) -> np.ndarray:
    """A (C, P, Y, X) stack registered onto the reference channel, cropped to what every channel covers.

    P holds T x Z planes (Z fastest, `n_z` planes per time point). Lateral
    shifts move each plane; axial shifts move each z-stack; the borders the
    moves wrap around are cropped from every channel. Pixels saturated
    (at or above `levels`) before the move stay at their level after it, so
    that they are still excluded.
    """
    stack = np.asarray(stack)
    n_channels, n_planes = stack.shape[:2]
    bounds = np.array([_displacement_bound(registration, registration.channels.index(c), stack.shape)
                       for c in channel_names])
    margin_y, margin_x = (int(math.ceil(b)) + 1 for b in bounds.max(axis=0))
    axial = [float(registration.shift_of(c)[0]) for c in channel_names]
    margin_z = int(math.ceil(max(abs(a) for a in axial))) + (1 if any(axial) else 0) if n_z > 1 else 0
    ny, nx = stack.shape[-2:]
    if ny <= 2 * margin_y + 2 or nx <= 2 * margin_x + 2 or (n_z > 1 and n_z <= 2 * margin_z):
        raise InputError(f"the image ({n_z} x {ny} x {nx}) is too small for the registration's shifts; "
                         "give larger images")
    out = np.empty(stack.shape[:2] + (ny - 2 * margin_y, nx - 2 * margin_x), np.float32)
    for c, name in enumerate(channel_names):
        index = registration.channels.index(name)
        shift = registration.shifts[index]
        affine = None if registration.affine is None else registration.affine[index]
        moved = np.empty(stack.shape[1:], np.float32)
        for p in range(n_planes):
            source = stack[c, p].astype(np.float32)
            bad = ~np.isfinite(source)
            moved[p] = _move(np.where(bad, 0.0, source) if bad.any() else source, shift[1:], affine)
            if bad.any():  # non-finite pixels stay non-finite where they land
                moved[p][_saturated_after(bad.astype(np.uint8), 1, shift[1:], affine)] = np.nan
        if n_z > 1 and shift[0]:
            volumes = moved.reshape(-1, n_z, ny, nx)
            for t in range(volumes.shape[0]):
                volumes[t] = np.moveaxis(_fourier_shift(np.moveaxis(volumes[t], 0, -1), [shift[0]]), -1, 0)
        if levels is not None:
            for p in range(n_planes):
                moved[p][_saturated_after(stack[c, p], levels[c], shift[1:], affine)] = levels[c]
        out[c] = moved[:, margin_y:ny - margin_y, margin_x:nx - margin_x]
    if margin_z:
        out = out.reshape(n_channels, -1, n_z, *out.shape[-2:])[:, :, margin_z:n_z - margin_z]
        out = out.reshape(n_channels, -1, *out.shape[-2:])
    return out


def register_plane(plane: np.ndarray, channel_names: Sequence[str], registration: Registration, levels=None,
                   neighbour=None) -> np.ndarray:
    """One (C, Y, X) plane registered, float32 of the same size: NaN where a channel has no data.

    `neighbour(c, dz)`, if given, returns channel c's plane `dz` planes away
    (None beyond the stack); axial shifts are then applied by linear
    interpolation between the two nearest planes. Without it, axial shifts
    are not applied.
    """
    plane = np.asarray(plane)
    ny, nx = plane.shape[-2:]
    out = np.empty(plane.shape, np.float32)
    for c, name in enumerate(channel_names):
        index = registration.channels.index(name)
        shift = registration.shifts[index]
        affine = None if registration.affine is None else registration.affine[index]
        source = plane[c].astype(np.float32)
        if neighbour is not None and shift[0]:
            # The channel's content at z sits at z - dz: interpolate between the two planes around it.
            low = math.floor(-shift[0])
            weight = -shift[0] - low
            below = source if low == 0 else neighbour(c, low)
            above = below if weight == 0 else (source if low + 1 == 0 else neighbour(c, low + 1))
            if below is None or above is None:
                out[c] = np.nan
                continue
            source = ((1 - weight) * np.asarray(below, np.float32) + weight * np.asarray(above, np.float32))
        moved = _move(source, shift[1:], affine)
        if levels is not None:
            moved[_saturated_after(plane[c], levels[c], shift[1:], affine)] = levels[c]
        # A border pixel has no data when more than half of it would come from beyond the field.
        bound = _displacement_bound(registration, index, plane.shape)
        my, mx = (int(math.floor(b + 0.5)) for b in bound)
        if my:
            moved[:my], moved[ny - my:] = np.nan, np.nan
        if mx:
            moved[:, :mx], moved[:, nx - mx:] = np.nan, np.nan
        out[c] = moved
    return out


# --- measuring it -----------------------------------------------------------------------------------------

def _planes(image) -> tuple[np.ndarray, int]:
    """An Image's pixels as (C, P, Y, X) with P = T x Z planes, and the number of z-planes."""
    data = np.moveaxis(np.asarray(image.data), image.channel_axis, 0)
    n_z = image.data.shape[image.axes.index("Z")] if "Z" in image.axes else 1
    return data.reshape(data.shape[0], -1, data.shape[-2], data.shape[-1]), n_z


def _projection(planes: np.ndarray) -> np.ndarray:
    """The maximum over the planes (P, Y, X) of one channel (the plane itself when there is one)."""
    return planes[0] if planes.shape[0] == 1 else planes.max(axis=0)


def _level_and_noise(plane: np.ndarray) -> tuple[float, float]:
    from .levels import summarise_channel

    step = max(1, int(math.sqrt(plane.size / (1 << 18))))  # about 256k pixels are plenty for two levels
    summary = summarise_channel(plane[::step, ::step])
    return summary.background, max(summary.noise, 1e-12)


def _block_maxima(plane: np.ndarray) -> np.ndarray:
    from .kernels import block_maxima

    return block_maxima(np.ascontiguousarray(plane), _BLOCK)


def _bright_spots(projection: np.ndarray) -> np.ndarray:
    """Blocks holding a spot BEAD_SNR noise SDs above the background that no neighbouring block outshines."""
    from scipy import ndimage

    level, noise = _level_and_noise(projection)
    blocks = _block_maxima(np.asarray(projection)).astype(np.float32)
    peaks = (blocks == ndimage.maximum_filter(blocks, 3)) & (blocks > level + BEAD_SNR * noise)
    return blocks * peaks


def _beads_seen(projection: np.ndarray, spots: np.ndarray) -> int:
    """How many of the reference channel's beads (`spots`, on the block grid) stand BEAD_SNR noise SDs
    above the background of another channel too, within a block of where they are in the reference."""
    level, noise = _level_and_noise(projection)
    seen = 0
    for by, bx in zip(*np.nonzero(spots)):
        rows = slice(max(by - 1, 0) * _BLOCK, (by + 2) * _BLOCK)
        cols = slice(max(bx - 1, 0) * _BLOCK, (bx + 2) * _BLOCK)
        seen += bool(projection[rows, cols].max() > level + BEAD_SNR * noise)
    return seen


def _windows(weights: np.ndarray, shape) -> list[tuple[slice, slice]]:
    """One window per tile of a 3 x 3 grid, centred on the tile's heaviest block (where there is one)."""
    ny, nx = shape
    side_y, side_x = min(_WINDOW, ny), min(_WINDOW, nx)
    windows = []
    for rows in np.array_split(np.arange(weights.shape[0]), _TILES):
        for cols in np.array_split(np.arange(weights.shape[1]), _TILES):
            if not rows.size or not cols.size:
                continue
            tile = weights[np.ix_(rows, cols)]
            if not tile.any():
                continue
            by, bx = np.unravel_index(int(np.argmax(tile)), tile.shape)
            cy, cx = (rows[by] * _BLOCK + _BLOCK // 2, cols[bx] * _BLOCK + _BLOCK // 2)
            y0 = min(max(cy - side_y // 2, 0), ny - side_y)
            x0 = min(max(cx - side_x // 2, 0), nx - side_x)
            windows.append((slice(y0, y0 + side_y), slice(x0, x0 + side_x)))
    return windows


def _window_stack(planes: np.ndarray, c: int, n_z: int, window) -> np.ndarray:
    """High-pass-filtered window of channel c: the middle z-stack (3-D) when there are enough planes,
    else the middle plane."""
    rows, cols = window
    n_planes = planes.shape[1]
    if n_z >= _MIN_PLANES_FOR_AXIAL:
        start = (n_planes // n_z) // 2 * n_z
        chosen = range(start, start + n_z)
    else:
        chosen = [n_planes // 2]
    return np.stack([high_pass(planes[c, p, rows, cols]) for p in chosen]).squeeze(axis=0 if len(chosen) == 1
                                                                                    else ())


def _local_shifts(planes: np.ndarray, n_z: int, reference: int, moving: int, windows,
                  with_error: bool = True) -> list[tuple]:
    """(centre y, centre x, shift (dz, dy, dx), error (dz, dy, dx)) per window with a reliable shift.

    With `with_error`, each window's shift has its own standard error (from
    its quarters) and only windows whose error is at most MAX_WINDOW_ERROR
    are kept; without, the error is left NaN (bead windows: their agreement
    with each other is judged in :func:`_combine`).
    """
    found = []
    for window in windows:
        a, b = _window_stack(planes, reference, n_z, window), _window_stack(planes, moving, n_z, window)
        # A taper to 0 at the window's edges: structures cut by the edge would pull the peak.
        taper = np.outer(np.hanning(a.shape[-2]), np.hanning(a.shape[-1])).astype(np.float32)
        a, b = a * taper, b * taper
        if with_error:
            shift, error = channel_shift(a, b, upsample=_FIT_UPSAMPLE)
        else:
            shift = _peak(a, b, _FIT_UPSAMPLE)
            error = np.full_like(shift, np.nan)
        if shift.size == 2:
            shift, error = np.concatenate([[0.0], shift]), np.concatenate([[0.0], error])
        if not np.all(np.isfinite(shift)) or (with_error and not np.all(error <= MAX_WINDOW_ERROR)):
            continue
        # Where the window's shift applies: the centroid of its structures (their positive high-pass).
        weight = np.clip(a if a.ndim == 2 else a.sum(axis=0), 0, None)
        rows, cols = window
        if weight.sum() > 0:
            y, x = (float(np.sum(weight * axis)) / float(weight.sum()) for axis in np.indices(weight.shape))
        else:
            y, x = (rows.stop - rows.start - 1) / 2, (cols.stop - cols.start - 1) / 2
        found.append((rows.start + y, cols.start + x, shift, error))
    return found


def _agreeing(local: list[tuple], shape, affine: bool) -> list[tuple]:
    """The windows whose shift lies within 0.5 px (or plane) of the others' on every axis: of their
    median, or with `affine` of the model fitted to all of them. A window whose correlation peak is off
    by more is a mismatch (a bead seen in one channel only, dirt)."""
    if len(local) < (4 if affine else 3):
        return local
    if affine:
        shift, model, _ = _combine(local, shape, True)
        centre = (np.asarray(shape, dtype=float) - 1) / 2
        expected = [np.concatenate([[shift[0]], model[:, :2] @ (np.array([y, x]) - centre) + model[:, 2]])
                    for y, x, _, _ in local]
    else:
        expected = [np.median(np.array([s for _, _, s, _ in local]), axis=0)] * len(local)
    return [item for item, centre_shift in zip(local, expected) if np.all(np.abs(item[2] - centre_shift) <= 0.5)]


def _combine(local: list[tuple], shape, affine: bool):
    """Per channel: shift (3,), affine (2, 3) or None, residual RMS, from its windows' shifts (weighted by
    their errors where they have them)."""
    centre = (np.asarray(shape, dtype=float) - 1) / 2
    positions = np.array([[y, x] for y, x, _, _ in local]) - centre
    shifts = np.array([s for _, _, s, _ in local])
    errors = np.array([e for _, _, _, e in local])
    weights = np.where(np.isfinite(errors), 1 / np.maximum(errors**2, 1e-4), 1.0)
    mean = (weights * shifts).sum(axis=0) / weights.sum(axis=0)
    if not affine:
        residual = shifts[:, 1:] - mean[1:]
        spread = float(np.sqrt(np.mean(np.sum(residual**2, axis=1)))) if len(local) > 1 else float("nan")
        return mean, None, spread
    design = np.column_stack([positions, np.ones(len(local))])
    model = np.zeros((2, 3))
    for axis in (0, 1):
        w = np.sqrt(weights[:, axis + 1])
        model[axis], *_ = np.linalg.lstsq(design * w[:, None], shifts[:, axis + 1] * w, rcond=None)
    residual = shifts[:, 1:] - design @ model.T
    return np.array([mean[0], model[0, 2], model[1, 2]]), model, float(np.sqrt(np.mean(np.sum(residual**2, axis=1))))


def fit_from_beads(images: Sequence, *, reference: str | None = None, affine: bool = False,
                   min_beads: int = MIN_BEADS) -> Registration:
    """Registration from images of multicolour sub-resolution beads (each seen in every channel).

    Parameters
    ----------
    images : sequence of Image
        Bead fields, all with the same channels and size.
    reference : str, optional
        The channel the others are registered onto (default: the first).
    affine : bool
        Fit a lateral shift that varies linearly over the field (needs beads
        in at least three windows not on one line), else one shift per channel.
    min_beads : int
        Beads (spots BEAD_SNR noise SDs above the background) needed in every channel.

    Raises
    ------
    InputError
        Too few or too dim beads (naming the file, the channel and the
        minimum), channels or sizes that differ between the images.
    """
    images = list(images)
    channels = tuple(images[0].channel_names)
    reference = channels[0] if reference is None else reference
    if reference not in channels:
        raise InputError(f"--reference {reference}: no such channel; channels are {list(channels)}")
    r = channels.index(reference)
    shape = tuple(images[0].data.shape[-2:])
    local: dict[int, list] = {c: [] for c in range(len(channels))}
    for image in images:
        if tuple(image.channel_names) != channels or tuple(image.data.shape[-2:]) != shape:
            raise InputError(f"{image.name}: has channels {list(image.channel_names)} and size "
                             f"{tuple(image.data.shape[-2:])}, the first bead image {list(channels)} and {shape}; "
                             "give bead images of one set-up")
        planes, n_z = _planes(image)
        spots = _bright_spots(_projection(planes[r]))
        for c in range(len(channels)):
            count = int(np.count_nonzero(spots)) if c == r else _beads_seen(_projection(planes[c]), spots)
            if count < min_beads:
                raise InputError(f"{image.name}: {count} beads stand {BEAD_SNR:g} noise SDs above the background "
                                 f"in channel {channels[c]} (need at least {min_beads}); image more or brighter "
                                 "multicolour beads")
        windows = _windows(spots, shape)
        for c in range(len(channels)):
            if c != r:
                local[c] += _local_shifts(planes, n_z, r, c, windows, with_error=False)
    local = {c: _agreeing(found, shape, affine) for c, found in local.items()}
    return _registration(local, channels, r, shape, affine, "beads", [im.name for im in images])


def _registration(local: dict, channels, r: int, shape, affine: bool, source: str, inputs) -> Registration:
    shifts = np.zeros((len(channels), 3))
    models = np.zeros((len(channels), 2, 3)) if affine else None
    residual = np.zeros(len(channels))
    for c, found in local.items():
        if c == r:
            continue
        if not found or (affine and len(found) < 3):
            raise InputError(f"{inputs[0]}: no reliable shift of channel {channels[c]} against {channels[r]} "
                             f"({len(found)} windows agree{'; --affine needs 3' if affine else ''}); image more or "
                             "brighter beads spread over the field")
        if affine and np.linalg.matrix_rank(np.array([[y, x, 1.0] for y, x, _, _ in found])) < 3:
            raise InputError(f"{inputs[0]}: the beads measured lie on one line; --affine needs beads spread over "
                             "the field")
        shifts[c], model, residual[c] = _combine(found, shape, affine)
        if affine:
            models[c] = model
    return Registration(tuple(channels), channels[r], shifts, tuple(int(n) for n in shape), models, residual, source,
                        {"inputs": list(inputs)})


def fit_from_controls(controls: Mapping[str, Sequence], *, reference: str | None = None) -> Registration:
    """Registration from single-label controls, where no beads were imaged.

    Each control ties its primary (brightest) channel to every channel its
    label leaks into clearly enough to locate (a window's shift with a
    standard error of at most MAX_WINDOW_ERROR). The shifts of all channels
    against the reference follow from all such ties by weighted least
    squares: ``u_c - u_p = v_pc`` for a tie measured between primary p and
    channel c, and ``u_reference = 0``. A channel tied to no other is refused.
    """
    fields = [(label, image) for label, images in controls.items() for image in images]
    if not fields:
        raise InputError("--control: give at least one control")
    channels = tuple(fields[0][1].channel_names)
    shape = tuple(fields[0][1].data.shape[-2:])
    reference = channels[0] if reference is None else reference
    if reference not in channels:
        raise InputError(f"--reference {reference}: no such channel; channels are {list(channels)}")
    rows, values, weights = [], [], []
    for label, image in fields:
        if tuple(image.channel_names) != channels or tuple(image.data.shape[-2:]) != shape:
            raise InputError(f"{image.name}: has channels {list(image.channel_names)} and size "
                             f"{tuple(image.data.shape[-2:])}, the first control {list(channels)} and {shape}; "
                             "give controls of one set-up")
        planes, n_z = _planes(image)
        signal = [planes[c].astype(np.float64).mean() - _level_and_noise(planes[c, planes.shape[1] // 2])[0]
                  for c in range(len(channels))]
        p = int(np.argmax(signal))
        windows = _windows(_bright_spots(_projection(planes[p])), shape)
        for c in range(len(channels)):
            if c == p:
                continue
            for _, _, shift, error in _local_shifts(planes, n_z, p, c, windows):
                row = np.zeros(len(channels))
                row[c], row[p] = 1.0, -1.0
                rows.append(row)
                values.append(shift)
                weights.append(1 / np.maximum(error**2, 1e-4))
    r = channels.index(reference)
    tied = {r}  # channels connected to the reference through ties
    changed = True
    while changed:
        changed = False
        for row in rows:
            pair = set(np.flatnonzero(row))
            if pair & tied and not pair <= tied:
                tied |= pair
                changed = True
    untied = [channels[c] for c in range(len(channels)) if c not in tied]
    if untied:
        raise InputError(f"{fields[0][1].name}: no control shows a leak between channel {untied[0]} and the other "
                         "channels clearly enough to measure its shift; image multicolour beads and use --beads")
    shifts = np.zeros((len(channels), 3))
    residual = np.zeros(len(channels))
    anchor = np.zeros(len(channels))
    anchor[r] = 1.0
    design = np.array(rows + [anchor])
    for axis in range(3):
        w = np.sqrt(np.array([wt[axis] for wt in weights] + [1e6]))
        target = np.array([v[axis] for v in values] + [0.0])
        shifts[:, axis], *_ = np.linalg.lstsq(design * w[:, None], target * w, rcond=None)
    misfit = np.array(values)[:, 1:] - (design[:-1] @ shifts)[:, 1:]
    for c in range(len(channels)):
        involved = np.flatnonzero(design[:-1, c])
        residual[c] = float(np.sqrt(np.mean(np.sum(misfit[involved] ** 2, axis=1)))) if involved.size else 0.0
    return Registration(channels, reference, shifts, tuple(int(n) for n in shape), None, residual, "controls",
                        {"inputs": [image.name for _, image in fields]})
