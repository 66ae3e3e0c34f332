"""Batch unmixing of acquired stacks: blockwise, streamed, resumable.

Each input (every series of it) is cut into blocks of one (T, Z) position
holding all channels and the full Y-X plane; each block is read, unmixed and
written in turn, so memory stays bounded by a few planes whatever the size of
the stack. Blocks are computed in batches (a local thread pool, or a
running dask.distributed scheduler), so reading, computing and writing of
different blocks overlap: the next batch is computed while this one is
written. The tasks carry only file names and the solver, never open file
handles, so they run on remote workers too. TIFF blocks are read page by page
(:func:`unmix.io.images.read_block`); OME-Zarr outputs are stored chunk by chunk
by the tasks themselves on local threads (in parallel), and by the submitting
process on a cluster (whose workers need not see the output folder). The
saturation level of an input is found exactly from the peaks of every block;
only when it is below the level the blocks were masked at are the masks made
again in a second, reading-only pass.

Outputs per input ``<name>`` in OUTDIR (see the command-line contract) form
one *output set*, whose members are listed in :data:`OUTPUT_SET`:

- ``<name>.unmixed.ome.tif``: float32 abundances, one channel per label,
  axes of the input (written Z-major: ``TZCYX``), provenance in the OME
  description;
- ``<name>.saturation.ome.tif``: uint8 mask, 1 where any input channel is
  saturated;
- ``<name>.residual.ome.tif`` (optional): root-mean-square misfit per pixel;
- ``<name>.standard-error.ome.tif`` (optional): float32 standard error of each
  abundance, one channel per label (:mod:`unmix.engine.uncertainty`).

A set is judged and replaced as a unit. Every member records, in its own
metadata, the identity of the run that made it (matrix checksum, input
fingerprint, method, background, saturation and reading options); a rerun
keeps the set only when every member it asks for is there with its own
identity, and refuses (unless ``overwrite``) a set any member of which was
made otherwise. All members are written under temporary names first; then,
under an exclusive lock on the output folder, the set is judged again (another
run may have finished meanwhile), renamed into place member by member, and
recorded in ``unmix-manifest.json``. A run killed between those steps leaves
a set whose members say what they are; the rerun repairs the set and the
manifest from them.

Memory: pixels in flight (blocks read, computed and waiting to be written)
stay within ``ApplySettings.memory`` bytes, whatever the number of cores:
the number of blocks computed together follows from the budget, and a plane
too large for it is cut into strips of rows.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, NamedTuple, Sequence

import numpy as np

from ..errors import InputError
from ..io.atomic import (atomic_outputs, check_name_length, check_outside_inputs, discard_output, folder_lock,
                         leased,
                         remove_stale_temporaries, temporary_sibling, write_fault, write_text_atomic)
from ..io.images import (Image, check_axes, is_zarr_path, names_text, open_images, output_stem, read_images,
                         read_provenance)
from ..matrix import BleedThroughMatrix
from .solver import Unmixer
from .uncertainty import error_sources

MANIFEST = "unmix-manifest.json"
MANIFEST_FORMAT = "unmix-manifest"
_FINGERPRINT_BYTES = 1 << 20
DEFAULT_MEMORY = 1 << 30


@dataclass(frozen=True)
class FileResult:
    """What happened to one input."""

    input: str
    output: str | None
    status: str  # "written", "kept", "failed"
    message: str = ""
    nan_pixels: int = 0
    saturated_pixels: int = 0
    pixels: int = 0


@dataclass(frozen=True)
class ApplySettings:
    """Options of a batch.

    `memory` bounds the bytes of pixels in flight (default 1 GiB); `batch_blocks`, when given,
    fixes the number of blocks computed together instead (tests).
    """

    method: str = "nnls"
    background: str = "matrix"  # "matrix", "estimate" or a path
    overwrite: bool = False
    residual: bool = False
    weights: str = "none"  # "none" or "noise" (the matrix's noise model; see uncertainty.error_sources)
    uncertainty: bool = False  # also write the standard-error member
    saturation: object = None  # one level, or one per channel; None: detected
    axes: str | None = None
    channel_names: Sequence[str] | None = None
    memory: int = DEFAULT_MEMORY
    batch_blocks: int | None = None
    registration: object = None  # unmix.measure.registration.Registration, applied to every block

    def __post_init__(self):
        if not isinstance(self.memory, (int, np.integer)) or self.memory < MIN_MEMORY:
            raise InputError(f"--memory {self.memory}: give at least {MIN_MEMORY >> 20} MiB")


MIN_MEMORY = 16 << 20


# --- the output set ---------------------------------------------------------------

class _BlockPixels(NamedTuple):
    """What the members of an output set are computed from, for one block."""

    block: np.ndarray  # (C, Y, X) input
    abundances: np.ndarray  # (K, Y, X)
    errors: np.ndarray | None  # (K, Y, X) standard errors, when the set has that member
    mask: np.ndarray  # (Y, X) saturation mask
    unmixer: Unmixer
    background: np.ndarray


@dataclass(frozen=True)
class OutputMember:
    """One file of an input's output set, ``<name>.<member>.ome.tif`` (or ``.ome.zarr``).

    `channels` gives its channel names from the matrix, `wanted` says whether a run with
    these settings writes it, `planes` computes its planes (n, Y, X) of a block.
    """

    name: str
    dtype: str
    channels: Callable[[BleedThroughMatrix], list]
    wanted: Callable[[ApplySettings], bool]
    planes: Callable[[_BlockPixels], np.ndarray]


# A new companion output is one more entry here. The first member
# is streamed into its file as blocks are computed; the others are spooled and written after it.
OUTPUT_SET = (
    OutputMember("unmixed", "float32", lambda m: list(m.labels), lambda s: True, lambda p: p.abundances),
    OutputMember("saturation", "uint8", lambda m: ["saturated"], lambda s: True, lambda p: p.mask[None]),
    OutputMember("residual", "float32", lambda m: ["residual_rms"], lambda s: s.residual,
                 lambda p: p.unmixer.residual(p.block, p.abundances, p.background)[None]),
    OutputMember("standard-error", "float32", lambda m: list(m.labels), lambda s: s.uncertainty,
                 lambda p: p.errors),
)
_ERRORS = "standard-error"  # the member computed with the abundances by the solver
_MEMBERS = {member.name: member for member in OUTPUT_SET}
_MASK = "saturation"  # the member recomputed when the input saturates below the provisional level


def _wanted(settings: ApplySettings) -> list[str]:
    return [member.name for member in OUTPUT_SET if member.wanted(settings)]


def _output_names(outdir: Path, stem: str, zarr_output: bool = False) -> dict:
    suffix = ".ome.zarr" if zarr_output else ".ome.tif"
    return {member.name: outdir / f"{stem}.{member.name}{suffix}" for member in OUTPUT_SET}


def is_set_member(path, outdir) -> bool:
    """Whether `path` is named like a member of an output set in `outdir` (an output of apply)."""
    path = Path(path)
    try:
        if path.resolve().parent != Path(outdir).resolve():
            return False
    except (OSError, RuntimeError):  # a symbolic link loop: judged later, with a clear message
        return False
    name = path.name.lower()
    return any(name.endswith(f".{member.name}{suffix}") for member in OUTPUT_SET for suffix in (".ome.tif", ".ome.zarr"))


def input_fingerprint(path) -> str:
    """Cheap identity of an input: size, modification time and hashes of its first and last MiB.

    Reading the whole file again only to hash it would double the I/O of a
    batch; this detects replaced or edited files in practice.
    """
    path = Path(path)
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    digest = hashlib.sha256()
    for file in files:
        stat = file.stat()
        digest.update(f"{file.relative_to(path) if file != path else file.name}:{stat.st_size}:"
                      f"{stat.st_mtime_ns}".encode())
        with open(file, "rb") as handle:
            digest.update(handle.read(_FINGERPRINT_BYTES))
            if stat.st_size > 2 * _FINGERPRINT_BYTES:
                handle.seek(-_FINGERPRINT_BYTES, os.SEEK_END)
                digest.update(handle.read())
    return digest.hexdigest()


def _identity(matrix_sha: str, fingerprint: str, settings: ApplySettings) -> dict:
    """What makes two runs' outputs for one input the same: recorded in every member of its set."""
    background = settings.background
    if background not in ("matrix", "estimate"):
        background = {"path": str(Path(background).resolve()), "fingerprint": input_fingerprint(background)}
    saturation = settings.saturation
    identity = {"matrix_sha256": matrix_sha, "input_fingerprint": fingerprint, "method": settings.method,
                "weights": settings.weights,
                "background": background,
                "saturation": None if saturation is None else np.atleast_1d(saturation).astype(float).tolist(),
                "axes": settings.axes,
                "channel_names": None if settings.channel_names is None else list(settings.channel_names),
                "registration": _registration_record(settings)}
    return json.loads(json.dumps(identity))  # as it reads back from a file


def _record_of(path: Path) -> dict | None:
    """The record a member carries in its own metadata, or None (unreadable, not ours)."""
    try:
        record = read_provenance(path)
    except Exception:  # noqa: BLE001 - an unreadable output is not ours to trust
        return None
    return record if isinstance(record, dict) else None


@dataclass(frozen=True)
class _SetState:
    complete: bool  # every wanted member is there with this run's identity
    foreign: list  # members there (wanted or not) made otherwise, or unreadable
    records: dict  # member name -> record, for the members there with this run's identity


def _judge(names: dict, wanted: list[str], identity: dict) -> _SetState:
    complete, foreign, records = True, [], {}
    for name, path in names.items():
        if not os.path.lexists(path):
            complete = complete and name not in wanted
            continue
        record = _record_of(path)
        if record is None or record.get("identity") != identity:
            foreign.append(path)
            complete = complete and name not in wanted
        else:
            records[name] = record
    return _SetState(complete and not foreign, foreign, records)


def _check_manifest(path: Path) -> dict:
    """The manifest's contents (a new one if there is none); InputError if it is not ours."""
    if not os.path.lexists(path):
        return {"format": MANIFEST_FORMAT, "version": 1, "outputs": {}}
    if not path.is_file():
        raise InputError(f"{path}: is not a file; move it away or choose another -o")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
        if not (isinstance(manifest, dict) and manifest.get("format") == MANIFEST_FORMAT
                and isinstance(manifest.get("outputs"), dict)):
            raise ValueError
    except (OSError, ValueError, RecursionError):
        raise InputError(f"{path}: is not a manifest written by unmix apply (unreadable or another format); "
                         "move it away (its entries would be lost) or choose another -o") from None
    return manifest


def _manifest_entry(path: Path, names: dict, state: _SetState, identity: dict, counts: dict) -> dict:
    from ..io.provenance import utc_now

    return {"input": str(path), "members": sorted(names[name].name for name in state.records),
            "matrix_sha256": identity["matrix_sha256"], "method": identity["method"], "finished": utc_now(),
            "nan_pixels": int(counts.get("nan_pixels", 0)), "saturated_pixels": int(counts.get("saturated_pixels", 0))}


def _write_manifest(manifest_path: Path, manifest: dict) -> None:
    write_text_atomic(manifest_path, json.dumps(manifest, indent=2) + "\n")


def _lock_of(outdir: Path):
    return folder_lock(outdir / f".{MANIFEST}.lock")


def _counts_of(records: dict) -> dict:
    return next((r["counts"] for r in records.values() if isinstance(r.get("counts"), dict)), {})


# --- levels, background, channels ---------------------------------------------------

def _sample_blocks(image: Image, settings: "ApplySettings", most: int = 8) -> np.ndarray:
    """Up to `most` evenly spaced blocks, all channels, channels first: (C, n, Y, X), a cheap
    sample of a large stack."""
    from ..io.images import read_block

    keys = list(_block_keys(image, _rows_per_block(image, settings)))
    chosen = [keys[i] for i in np.unique(np.linspace(0, len(keys) - 1, min(most, len(keys))).astype(int))]
    blocks = [read_block(image.source, image.series, key, channels=image.channel_names, axes=settings.axes,
                         channel_names=settings.channel_names) for key in chosen]
    return np.concatenate([b.reshape(b.shape[0], 1, -1) for b in blocks], axis=2)


def _provisional_levels(matrix: BleedThroughMatrix, image: Image, saturation) -> np.ndarray:
    """Saturation level per channel used while unmixing: given, else the matrix's, else the
    maximum of the pixel type. Without given levels the input's own level (the contract's rule,
    from the peaks of every block) may turn out lower; see `_final_levels`."""
    from ..measure.levels import per_channel_levels

    n = len(matrix.channels)
    if saturation is not None:
        return per_channel_levels(saturation, n, "--saturation")
    if matrix.saturation is not None:
        return np.asarray(matrix.saturation, dtype=float)
    return np.full(n, _max_of_type(image.data.dtype))


def _max_of_type(dtype) -> float:
    dtype = np.dtype(dtype)
    return float(np.iinfo(dtype).max if dtype.kind in "ui" else np.finfo(dtype).max)


def _final_levels(job: "_SeriesJob", peaks, settings: "ApplySettings") -> np.ndarray:
    """The lower of the provisional level and the input's own level, per channel."""
    from ..measure.levels import level_from_peak

    if settings.saturation is not None:
        return job.levels
    detected = np.array([level_from_peak(peak, _max_of_type(job.image.data.dtype)) for peak in peaks])
    return np.minimum(job.levels, detected)


def _background_for(matrix: BleedThroughMatrix, image: Image, settings: "ApplySettings") -> np.ndarray:
    from ..measure.levels import reference_levels, summarise_channel

    choice = settings.background
    if choice == "matrix":
        if matrix.background is None:
            raise InputError(f"{image.name}: the matrix has no background (a predicted matrix); "
                             "give --background estimate or --background PATH")
        return matrix.background
    if choice == "estimate":
        # A sample of blocks: the robust level needs no full pass.
        sample = _sample_blocks(image, settings)
        return np.array([summarise_channel(sample[c]).background for c in range(len(matrix.channels))])
    reference = read_images(choice)[0]
    missing = [c for c in matrix.channels if c not in reference.channel_names]
    if missing:
        raise InputError(f"{choice}: background image lacks channels {missing}; give one imaged in every channel")
    reference = reference.select_channels(matrix.channels)
    return reference_levels(np.moveaxis(np.asarray(reference.data), reference.channel_axis, 0), choice)


def _matched(matrix: BleedThroughMatrix, image: Image) -> Image:
    missing = [c for c in matrix.channels if c not in image.channel_names]
    if missing:
        raise InputError(
            f"{image.name}: lacks channels {names_text(missing)} that the matrix needs (it has "
            f"{names_text(image.channel_names)}); "
            "check the channel names or give --channel-names"
        )
    extra = [c for c in image.channel_names if c not in matrix.channels]
    if extra:
        import warnings

        from ..errors import InputWarning

        warnings.warn(f"{image.name}: channels {names_text(extra)} are not in the matrix and are ignored", InputWarning,
                      stacklevel=3)
    return image.select_channels(matrix.channels)


# --- blocks and the memory budget ---------------------------------------------------

def _bytes_per_pixel(n_channels: int, n_labels: int, itemsize: int, settings: ApplySettings) -> int:
    """Bytes one pixel of a block holds while it is read, computed and waiting to be written: the
    input, a converted copy, the abundances, the mask and (residual) the float64 misfit terms."""
    held = n_channels * itemsize * 2 + n_labels * 4 * 2 + 1
    if settings.residual:
        held += 3 * n_channels * 8 + 4
    return held


# Copies of a batch alive at once: the one computing, the one being written, and the writer's
# own copies (converted, padded tiles); measured with tests/benchmarks/bench_memory.py.
_IN_FLIGHT = 3
_LOCAL_BATCH_BYTES = 16 << 20  # bytes of a block per core, at least, in a batch on local threads


def _rows_per_block(image: Image, settings: ApplySettings, n_labels: int | None = None) -> int:
    """Rows of a block: the whole plane when a block fits the memory budget with room for the
    batches in flight, else strips (a multiple of 16 rows, for tiled output)."""
    n_y, n_x = image.data.shape[-2:]
    per_row = _bytes_per_pixel(image.n_channels, n_labels or image.n_channels, np.dtype(image.data.dtype).itemsize,
                               settings) * n_x
    rows = settings.memory // (_IN_FLIGHT * per_row)
    if rows >= n_y or settings.registration is not None:  # a registered block needs its whole plane
        return int(n_y)
    return int(max(16, rows // 16 * 16))


def _blocks_per_batch(image: Image, rows: int, n_labels: int, settings: ApplySettings, local: bool = True) -> int:
    """Blocks computed together, within the memory budget.

    On a cluster, as many as the budget allows, to keep its workers busy. On
    local threads, one block per core (more when blocks are small, so that a
    batch's overhead stays small): the writing of a batch then starts soon and
    overlaps with the computing of the next (measured with
    tests/benchmarks/bench_apply.py).
    """
    if settings.batch_blocks is not None:
        return settings.batch_blocks
    per_block = _bytes_per_pixel(image.n_channels, n_labels, np.dtype(image.data.dtype).itemsize,
                                 settings) * rows * image.data.shape[-1]
    most = int(max(1, min(64, settings.memory // (_IN_FLIGHT * per_block))))
    if not local:
        return most
    cores = os.cpu_count() or 1
    return min(most, max(cores, cores * _LOCAL_BATCH_BYTES // per_block))


def _block_keys(image: Image, rows: int):
    """One key per (T, Z) position and strip of `rows` rows, selecting all channels."""
    leading = [a for a in image.axes if a not in "CYX"]
    shape = [image.data.shape[image.axes.index(a)] for a in leading]
    n_y = image.data.shape[-2]
    for position in np.ndindex(*shape):
        for y0 in range(0, n_y, rows):
            key, it = [], iter(position)
            for axis in image.axes:
                if axis == "Y":
                    key.append(slice(None) if rows >= n_y else slice(y0, min(n_y, y0 + rows)))
                else:
                    key.append(next(it) if axis not in "CX" else slice(None))
            yield tuple(key)


def _mask_and_peaks(block: np.ndarray, levels) -> tuple[np.ndarray, list]:
    """Saturation mask (Y, X) of a block (C, Y, X) at `levels`, and the peak of each channel."""
    from ..measure.levels import ChannelPeak
    from .saturation import mask_and_peaks

    n = block.shape[0]
    block = np.ascontiguousarray(block)
    mask = np.empty(block.shape[1:], np.uint8)
    maxima, at_maxima, counts = np.empty(n), np.empty(n, np.int64), np.empty(n, np.int64)
    mask_and_peaks(block.reshape(n, -1), np.asarray(levels, dtype=np.float64), mask.reshape(-1), maxima,
                   at_maxima, counts)
    return mask, [ChannelPeak(float(m), int(a), int(c)) for m, a, c in zip(maxima, at_maxima, counts)]


def _read_registered(path: str, series: int, axes, channel_names, channels, key, levels, registration,
                     z_position) -> np.ndarray:
    """One block (C, Y, X), registered when a registration is given (NaN where a channel has no data).

    `z_position` is (index of Z in `key`, number of planes) for stacks: axial
    shifts then read the neighbouring planes of the shifted channel.
    """
    from ..io.images import read_block

    block = read_block(path, series, key, channels=channels, axes=axes, channel_names=channel_names)
    if registration is None:
        return block
    from ..measure.registration import register_plane

    neighbour = None
    if z_position is not None:
        axis, n_z = z_position

        def neighbour(c, dz):
            z = key[axis] + dz
            if not 0 <= z < n_z:
                return None
            return read_block(path, series, key[:axis] + (z,) + key[axis + 1:], channels=[channels[c]], axes=axes,
                              channel_names=channel_names)[0]

    return register_plane(block, channels, registration, levels, neighbour)


def _unmix_block(path: str, series: int, axes, channel_names, channels, key, unmixer: Unmixer,
                 background, levels, members: tuple, registration=None, z_position=None):
    """Read one block from the file (registered, when a registration is given) and unmix it.

    Returns the planes of each member of the output set named in `members` ({name: (n, Y, X)}),
    the numbers of NaN and of saturated pixels, and the peak of each channel.
    """
    block = _read_registered(path, series, axes, channel_names, channels, key, levels, registration, z_position)
    abundances, errors = unmixer.solve(block, background, errors=_ERRORS in members)
    nan = int(np.count_nonzero(np.isnan(abundances[0])))
    mask, peaks = _mask_and_peaks(block, levels)
    pixels = _BlockPixels(block, abundances, errors, mask, unmixer, background)
    return {name: _MEMBERS[name].planes(pixels) for name in members}, nan, int(np.count_nonzero(mask)), peaks


def _unmix_block_into_zarr(path: str, series: int, axes, channel_names, channels, key, unmixer: Unmixer,
                           background, levels, members: tuple, registration, z_position, destinations: dict):
    """:func:`_unmix_block`, then store the block in its chunk of each output array (distinct
    chunks: tasks write in parallel); returns None in place of the planes."""
    import zarr

    planes, nan, saturated, peaks = _unmix_block(path, series, axes, channel_names, channels, key, unmixer,
                                                 background, levels, members, registration, z_position)
    for name, values in planes.items():
        array_path = Path(destinations[name])
        if not (array_path / "zarr.json").exists():
            raise FileNotFoundError(f"{array_path}: output removed while the run was writing it")
        zarr.open_array(str(array_path), mode="r+")[key] = values
    return None, nan, saturated, peaks


def _mask_block(path: str, series: int, axes, channel_names, channels, key, levels, registration=None,
                z_position=None):
    return _mask_and_peaks(_read_registered(path, series, axes, channel_names, channels, key, levels, registration,
                                            z_position), levels)[0]


def _provenance(matrix: BleedThroughMatrix, matrix_sha: str, path: Path, fingerprint: str, settings: ApplySettings,
                background: np.ndarray, series: int, identity: dict) -> dict:
    from ..io import provenance as prov

    return {
        "command": "apply", "created": prov.utc_now(), "software": prov.software(),
        "member": OUTPUT_SET[0].name, "identity": identity,
        "input": {"name": path.name, "path": str(path.resolve()), "fingerprint": fingerprint, "series": series},
        "matrix": {"sha256": matrix_sha, "contents": matrix.to_dict()},
        "method": settings.method,
        "background": {"source": settings.background if settings.background in ("matrix", "estimate")
                       else str(Path(settings.background).resolve()), "levels": [float(b) for b in background]},
        "noise_penalty": dict(zip(matrix.labels, map(float, matrix.noise_penalty()))),
        "condition_number": matrix.condition_number(),
        "registration": _registration_record(settings),
        **error_sources(matrix, settings.weights, settings.uncertainty)[2],
    }


def _registration_record(settings: ApplySettings) -> dict | None:
    return None if settings.registration is None else settings.registration.to_dict()


def _companion_record(name: str, names: dict, identity: dict, counts: dict, levels=None) -> dict:
    record = {"of": names[OUTPUT_SET[0].name].name, "member": name, "identity": identity, "counts": counts}
    if name == _MASK and levels is not None:
        record["levels"] = [float(v) for v in levels]
    return record


def _early_writeback(planes, handle, every: int = 64 << 20):
    """Pass `planes` through, asking the kernel every `every` bytes to start writing the file
    to disk, so that the final fsync (see :mod:`unmix.io.atomic`) finds little left to do and the
    disk works while the next blocks are computed.

    The request runs on a thread of its own (the kernel queues the pages for writing there,
    which takes CPU time), so that the planes keep flowing meanwhile; a request still running
    when the next is due makes that one unnecessary.
    """
    if not hasattr(os, "posix_fadvise"):
        yield from planes
        return
    from concurrent.futures import ThreadPoolExecutor

    written, pending = 0, None
    with ThreadPoolExecutor(max_workers=1) as flusher:
        for plane in planes:
            yield plane
            written += plane.nbytes
            if written >= every and (pending is None or pending.done()):
                handle.flush()
                pending = flusher.submit(_start_writeback, handle.fileno())
                written = 0


def _start_writeback(fd: int) -> None:
    # DONTNEED starts asynchronous write-back of the dirty pages (Linux) and drops pages already
    # written; it never discards data. A hint: a file system that refuses it changes nothing.
    with contextlib.suppress(OSError):
        os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)


_MASK_STRIP_BYTES = 1 << 18  # uncompressed bytes per strip of a whole-plane mask


def _deflate(chunk: np.ndarray) -> bytes:
    """One TIFF chunk compressed as zlib (the TIFF "Adobe deflate" scheme) at level 1; through
    zlib-ng when imagecodecs has it: several times faster, and its output is a standard zlib
    stream that any TIFF reader decodes."""
    import imagecodecs

    encode = imagecodecs.zlibng_encode if imagecodecs.ZLIBNG.available else imagecodecs.zlib_encode
    return encode(np.ascontiguousarray(chunk), level=1)


def _deflated_chunks(planes, rows: int, tile_width: int | None):
    """The compressed TIFF chunks of uint8 `planes`, in file order: with `tile_width`, each item
    holds the rows of one tile, padded with zeros to the tile's shape (`rows`, `tile_width`);
    else each item is a whole plane, cut into strips of `rows` rows (the last one shorter, as
    TIFF allows)."""
    for plane in planes:
        if tile_width is None:
            for y0 in range(0, plane.shape[0], rows):
                yield _deflate(plane[y0:y0 + rows])
        else:
            tile = np.zeros((rows, tile_width), np.uint8)
            tile[:plane.shape[0], :plane.shape[1]] = plane
            yield _deflate(tile)


@dataclass(frozen=True)
class _SeriesJob:
    """One series of an input, ready to unmix."""

    image: Image
    index: int
    background: np.ndarray
    levels: np.ndarray
    provenance: dict
    rows: int  # rows per block
    batch: int  # blocks per batch
    z_position: tuple | None = None  # (index of Z in a block key, planes) for a registered stack


@dataclass
class _SeriesTally:
    """What the blocks of one series add up to."""

    nan: int = 0
    saturated: int = 0
    peaks: list | None = None  # one ChannelPeak per channel

    def add(self, nan: int, saturated: int, peaks) -> None:
        self.nan += nan
        self.saturated += saturated
        self.peaks = list(peaks) if self.peaks is None else [a + b for a, b in zip(self.peaks, peaks)]


def _in_batches(keys: list, size: int, task, task_arguments, compute):
    """Yield (key, task result) in order, computing `size` keys at a time; the next batch is
    computed while the caller handles this one (reading, computing and writing overlap).

    When the caller stops early (an error while writing), the batch still computing is waited
    for before this generator closes: no task may write after its outputs were cleaned up.
    """
    from concurrent.futures import ThreadPoolExecutor

    batches = [keys[start:start + size] for start in range(0, len(keys), size)]
    if not batches:
        return
    with ThreadPoolExecutor(max_workers=1) as ahead:
        pending = ahead.submit(compute, task, [task_arguments(key) for key in batches[0]])
        try:
            for index, batch in enumerate(batches):
                results = pending.result()
                if index + 1 < len(batches):
                    pending = ahead.submit(compute, task, [task_arguments(key) for key in batches[index + 1]])
                yield from zip(batch, results)
        finally:
            with contextlib.suppress(BaseException):
                pending.result()


def _task_source(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, settings: ApplySettings) -> tuple:
    """The leading task arguments that say which file, series and channels to read."""
    return str(path), job.index, settings.axes, settings.channel_names, list(matrix.channels)


def _computed_blocks(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, unmixer: Unmixer,
                     settings: ApplySettings, compute, tally: _SeriesTally, destinations: dict | None = None):
    """Yield (key, {member: planes}) per block of a series, in order.

    NaN and saturated pixel counts and the channel peaks are added to `tally`.
    With `destinations` (member -> path of an OME-Zarr array), each task stores
    its block there itself, in parallel, and the planes yielded are None.
    """
    source = _task_source(job, path, matrix, settings)
    members = tuple(_wanted(settings))
    task, extra = (_unmix_block, ()) if destinations is None else (_unmix_block_into_zarr, (destinations,))
    for key, (planes, nan, saturated, peaks) in _in_batches(
            list(_block_keys(job.image, job.rows)), job.batch, task,
            lambda key: (*source, key, unmixer, job.background, job.levels, members, settings.registration,
                         job.z_position, *extra), compute):
        tally.add(nan, saturated, peaks)
        yield key, planes


def _recomputed_masks(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, settings: ApplySettings,
                      levels: np.ndarray, compute, tally: _SeriesTally):
    """Yield (key, saturation mask at `levels`) per block, recounting `tally.saturated`.

    Needed only when the input saturates below the level the blocks were
    masked at (a second, reading-only pass).
    """
    source = _task_source(job, path, matrix, settings)
    tally.saturated = 0
    for key, mask in _in_batches(list(_block_keys(job.image, job.rows)), job.batch, _mask_block,
                                 lambda key: (*source, key, levels, settings.registration, job.z_position), compute):
        tally.saturated += int(np.count_nonzero(mask))
        yield key, mask


class _Scratch:
    """A scratch file beside an output (leased, so that a concurrent run's clean-up spares it),
    removed on exit."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.lease = leased(self.path)
        self.lease.__enter__()
        self.file = open(self.path, "w+b")

    def __enter__(self):
        return self

    def __exit__(self, *exc_info):
        self.file.close()
        self.path.unlink(missing_ok=True)
        self.lease.__exit__(None, None, None)


class _PlaneSpool(_Scratch):
    """Planes appended to a scratch file and read back in order, one at a time.

    Plain file writes and reads keep memory bounded (a memory map would count
    every touched page as resident).
    """

    def __init__(self, path: Path, dtype):
        super().__init__(path)
        self.dtype = np.dtype(dtype)

    def append(self, plane: np.ndarray) -> None:
        self.file.seek(0, os.SEEK_END)
        self.file.write(np.ascontiguousarray(plane, dtype=self.dtype).tobytes())

    def plane_at(self, index: int, plane_shape) -> np.ndarray:
        """The `index`-th plane appended (all of shape `plane_shape`)."""
        self.file.flush()
        count = int(np.prod(plane_shape))
        self.file.seek(index * count * self.dtype.itemsize)
        return np.fromfile(self.file, dtype=self.dtype, count=count).reshape(plane_shape)

    def clear(self) -> None:
        self.file.seek(0)
        self.file.truncate()

    def planes(self, plane_shape):
        self.file.flush()
        self.file.seek(0)
        count = int(np.prod(plane_shape))
        while True:
            plane = np.fromfile(self.file, dtype=self.dtype, count=count)
            if plane.size < count:
                return
            yield plane.reshape(plane_shape)


class _ChunkSpool(_Scratch):
    """Compressed TIFF chunks (bytes of any length) appended to a scratch file and read back in order."""

    def __init__(self, path: Path):
        super().__init__(path)
        self.lengths: list[int] = []

    def extend(self, chunks) -> None:
        self.file.seek(0, os.SEEK_END)
        for chunk in chunks:
            self.file.write(chunk)
            self.lengths.append(len(chunk))

    def chunks(self):
        self.file.flush()
        self.file.seek(0)
        for length in self.lengths:
            yield self.file.read(length)


def _tiff_layout(image: Image, n_channels: int):
    leading = "".join(a for a in image.axes if a not in "CYX")
    shape = tuple(image.data.shape[image.axes.index(a)] for a in leading)
    return leading + "CYX", shape + (n_channels,) + tuple(image.data.shape[-2:])


def _physical(image: Image) -> dict:
    return {f"PhysicalSize{axis}": float(size) for axis, size in image.pixel_size.items()}


def _padded(block: np.ndarray, rows: int) -> np.ndarray:
    """A strip (n, y, X) padded with zeros to `rows` rows (the last strip of a plane is shorter)."""
    if block.shape[1] == rows:
        return block
    padded = np.zeros((block.shape[0], rows) + block.shape[2:], block.dtype)
    padded[:, :block.shape[1]] = block
    return padded


def _strip_tiles(strips, rows: int, n_y: int, scratch: Path, dtype):
    """Strips (n, rows, X) of a series' planes as TIFF tiles, in file order: for each (T, Z)
    position, every strip of plane 0, then of plane 1 ... Plane 0 goes straight through; the
    strips of the later planes wait in a scratch file for their plane's turn."""
    per_position = -(-n_y // rows)
    with _PlaneSpool(scratch, dtype) as later:
        done = 0
        for block in strips:
            block = _padded(block, rows)
            n = block.shape[0]
            yield block[0]
            for k in range(1, n):
                later.append(block[k])
            done += 1
            if done == per_position:
                for k in range(1, n):
                    for strip in range(per_position):
                        yield later.plane_at(strip * (n - 1) + k - 1, block.shape[1:])
                later.clear()
                done = 0


def _write_outputs(jobs: list[_SeriesJob], matrix: BleedThroughMatrix, unmixer: Unmixer, path: Path,
                   settings: ApplySettings, names: dict, compute, tmp: dict) -> list:
    """Compute the blocks of every series in batches and write the members of the output set
    into their temporaries `tmp` (member -> path); the tallies per series.

    Each output file holds one series per input series, in the same order.
    The first member is streamed into its file as blocks are computed; the
    planes of the others are spooled to scratch files beside the outputs and
    written out at the end, so memory stays bounded by a few blocks whatever
    the size of the stack. The saturation mask is spooled already compressed
    (it is mostly zeros).
    """
    import tifffile

    first, *others = _wanted(settings)
    tallies = [_SeriesTally() for _ in jobs]
    identity = jobs[0].provenance["identity"]

    def blocks(job: _SeriesJob, spools: dict, tally: _SeriesTally):
        with contextlib.closing(_computed_blocks(job, path, matrix, unmixer, settings, compute, tally)) as computed:
            for _, planes in computed:
                for name in others:
                    if name == _MASK:
                        spools[name].extend(_deflated_chunks(planes[name], *mask_chunking(job)))
                    else:
                        spools[name].append(_padded(planes[name], job.rows) if strips(job) else planes[name])
                yield planes[first]

    def strips(job: _SeriesJob) -> bool:
        return job.rows < job.image.data.shape[-2]

    def planes_of(blocks_of_series, job: _SeriesJob, name: str):
        if not strips(job):
            return (plane for block in blocks_of_series for plane in block)
        return _strip_tiles(blocks_of_series, job.rows, job.image.data.shape[-2], temporary_sibling(names[name]),
                            _MEMBERS[name].dtype)

    def tiling(job: _SeriesJob) -> dict:
        if not strips(job):
            return {}
        return {"tile": (job.rows, -(-job.image.data.shape[-1] // 16) * 16)}

    def mask_chunking(job: _SeriesJob) -> tuple[int, int | None]:
        """(rows, tile width) of the mask's chunks: its tiles when the planes are cut into
        strips, else strips of about `_MASK_STRIP_BYTES` (tile width None)."""
        if strips(job):
            return tiling(job)["tile"]
        return max(1, _MASK_STRIP_BYTES // job.image.data.shape[-1]), None

    def write(writer, name: str, job: _SeriesJob, data, record: dict) -> None:
        """Write one series: `data` is planes or tiles, or for the mask its compressed chunks."""
        member = _MEMBERS[name]
        axes, shape = _tiff_layout(job.image, len(member.channels(matrix)))
        layout = tiling(job)
        if name == _MASK:
            rows, tile_width = mask_chunking(job)
            layout = {"compression": "zlib", **({"tile": (rows, tile_width)} if tile_width else {"rowsperstrip": rows})}
        writer.write(data, shape=shape, dtype=member.dtype, photometric="minisblack",
                     metadata={"axes": axes, "Channel": {"Name": member.channels(matrix)},
                               "Description": json.dumps(record, sort_keys=True), **_physical(job.image)},
                     **layout)

    def spool_for(name: str):
        scratch_path = temporary_sibling(names[name])
        return _ChunkSpool(scratch_path) if name == _MASK else _PlaneSpool(scratch_path, _MEMBERS[name].dtype)

    with contextlib.ExitStack() as scratch:
        spools = [{name: scratch.enter_context(spool_for(name)) for name in others} for _ in jobs]
        total_bytes = sum(np.prod(_tiff_layout(job.image, len(matrix.labels))[1], dtype=np.float64) * 4
                          for job in jobs)
        with open(tmp[first], "wb") as handle, \
                tifffile.TiffWriter(handle, ome=True, bigtiff=total_bytes > 2**31) as writer:
            for job, spool, tally in zip(jobs, spools, tallies):
                planes = _early_writeback(planes_of(blocks(job, spool, tally), job, first), handle)
                write(writer, first, job, planes, job.provenance)
        levels = [_final_levels(job, tally.peaks, settings) for job, tally in zip(jobs, tallies)]
        for job, spool, tally, series_levels in zip(jobs, spools, tallies, levels):
            if _MASK in spool and np.any(series_levels < job.levels):
                # The input saturates below the level it was masked at: masks again, before any is written.
                remasked = scratch.enter_context(spool_for(_MASK))
                for _, mask in _recomputed_masks(job, path, matrix, settings, series_levels, compute, tally):
                    remasked.extend(_deflated_chunks(mask[None], *mask_chunking(job)))
                spool[_MASK] = remasked
        counts = _totals(tallies)
        for name in others:
            with tifffile.TiffWriter(tmp[name], ome=True, bigtiff=total_bytes > 2**31) as writer:
                for job, spool, series_levels in zip(jobs, spools, levels):
                    if name == _MASK:
                        data = spool[name].chunks()
                    else:
                        n = len(_MEMBERS[name].channels(matrix))
                        data = planes_of(spool[name].planes((n, job.rows, job.image.data.shape[-1])), job, name)
                    write(writer, name, job, data, _companion_record(name, names, identity, counts, series_levels))
    return tallies


def _totals(tallies) -> dict:
    return {"nan_pixels": sum(t.nan for t in tallies), "saturated_pixels": sum(t.saturated for t in tallies)}


def _write_zarr_outputs(jobs: list[_SeriesJob], matrix: BleedThroughMatrix, unmixer: Unmixer, path: Path,
                        settings: ApplySettings, names: dict, compute, tmp: dict,
                        writes_in_tasks: bool = False) -> list:
    """OME-Zarr input gives OME-Zarr outputs: blocks computed in parallel batches, each stored in its chunk.

    With `writes_in_tasks` (local threads) every task stores its own block, so the chunks are
    written in parallel; on a cluster the submitting process stores them (the workers need not
    see the output folder), overlapped with the computing of the next batch.
    """
    import zarr

    from ..io.images import ome_zarr_writer

    write_multiscales_metadata = ome_zarr_writer().write_multiscales_metadata

    tallies = []
    wanted = _wanted(settings)
    identity = jobs[0].provenance["identity"]
    roots = {name: zarr.open_group(str(tmp[name]), mode="w") for name in wanted}
    if len(jobs) > 1:
        for root in roots.values():
            root.attrs["bioformats2raw.layout"] = 3
    groups_per_job, levels_per_job = [], []
    for i, job in enumerate(jobs):
        image = job.image
        c_axis = image.channel_axis
        arrays, groups = {}, {}
        for name, root in roots.items():
            channels = _MEMBERS[name].channels(matrix)
            group = root if len(jobs) == 1 else root.create_group(str(i))
            shape = list(image.data.shape)
            shape[c_axis] = len(channels)
            chunks = [1] * len(shape)
            chunks[c_axis], chunks[-2], chunks[-1] = shape[c_axis], min(job.rows, shape[-2]), shape[-1]
            arrays[name] = group.create_array("0", shape=tuple(shape), chunks=tuple(chunks),
                                              dtype=_MEMBERS[name].dtype)
            axes = [{"name": a.lower(), "type": {"T": "time", "C": "channel"}.get(a, "space")} for a in image.axes]
            scale = [float(image.pixel_size.get(a, 1.0)) for a in image.axes]
            write_multiscales_metadata(group, datasets=[{"path": "0", "coordinateTransformations": [
                {"type": "scale", "scale": scale}]}], axes=axes)
            _add_zarr_attrs(group, {"omero": {"channels": [{"label": n, "active": True} for n in channels]}})
            groups[name] = group
        tallies.append(tally := _SeriesTally())
        destinations = None
        if writes_in_tasks:
            destinations = {name: str(tmp[name] / ("" if len(jobs) == 1 else str(i)) / "0") for name in wanted}
        with contextlib.closing(_computed_blocks(job, path, matrix, unmixer, settings, compute, tally,
                                                 destinations)) as computed:
            for key, planes in computed:
                if planes is None:
                    continue  # the task stored the block
                for name, values in planes.items():
                    arrays[name][key] = values
        levels = _final_levels(job, tally.peaks, settings)
        if _MASK in arrays and np.any(levels < job.levels):
            for key, mask in _recomputed_masks(job, path, matrix, settings, levels, compute, tally):
                arrays[_MASK][key] = mask[None]
        groups_per_job.append(groups)
        levels_per_job.append(levels)
    counts = _totals(tallies)
    for job, groups, levels in zip(jobs, groups_per_job, levels_per_job):
        for name, group in groups.items():
            group.attrs["unmix_provenance"] = (job.provenance if name == wanted[0]
                                               else _companion_record(name, names, identity, counts, levels))
    return tallies


def _add_zarr_attrs(group, extra: dict) -> None:
    """Add keys beside the NGFF metadata (under "ome" for NGFF 0.5, top level for 0.4)."""
    if "ome" in group.attrs:
        group.attrs["ome"] = {**dict(group.attrs["ome"]), **extra}
    else:
        group.attrs.update(extra)


def _local_compute(task, argument_lists):
    """Compute the tasks on local threads (as many as tasks, at most one per core); when one
    fails, the others still running are waited for and those not started are cancelled."""
    from concurrent.futures import ThreadPoolExecutor

    # A plain pool: dask's local scheduler would import dask.distributed first (0.2 s a run).
    pool = ThreadPoolExecutor(max_workers=max(1, min(len(argument_lists), os.cpu_count() or 1)))
    try:
        futures = [pool.submit(task, *arguments) for arguments in argument_lists]
        return [future.result() for future in futures]
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _distributed_compute(client):
    def compute(task, argument_lists):
        futures = [client.submit(task, *arguments, pure=False) for arguments in argument_lists]
        try:
            return client.gather(futures)
        except BaseException:
            client.cancel(futures)
            raise

    return compute


def plan_outputs(inputs: Sequence, outdir: Path) -> list[tuple[Path, str]]:
    """(input, output stem) per input; refuses two inputs that would give the same name."""
    seen: dict[str, Path] = {}
    plan = []
    for raw in inputs:
        path = Path(raw)
        stem = output_stem(path)
        if not stem or stem in (".", ".."):
            raise InputError(f"{path}: cannot name an output after this file; rename it")
        if stem in seen:
            raise InputError(f"{path}: gives the same output name {stem!r} as {seen[stem]}; "
                             "apply them in separate runs or output folders")
        seen[stem] = path
        plan.append((path, stem))
    return plan


def _connect(scheduler: str):
    """A client of the Dask scheduler at `scheduler`; InputError when it cannot be reached."""
    if "://" not in scheduler and ":" not in scheduler:
        raise InputError(f"--scheduler {scheduler}: not an address; give HOST:PORT or tcp://HOST:PORT of a "
                         "running Dask scheduler")
    try:
        from distributed import Client

        return Client(scheduler, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise InputError(f"--scheduler {scheduler}: cannot reach the Dask scheduler ({type(exc).__name__}); "
                         "check the address and that the scheduler is running") from None


def apply_matrix(matrix: BleedThroughMatrix, inputs: Sequence, outdir, *, settings: ApplySettings | None = None,
                 scheduler: str | None = None, matrix_sha: str | None = None, progress=None) -> list[FileResult]:
    """Unmix every input with `matrix`, writing into `outdir`; one FileResult per input.

    `progress`, if given, is called with the number of blocks finished after each batch of blocks.

    A bad input file is reported in its FileResult and the batch goes on;
    problems that concern the whole batch (the matrix, the output folder,
    name collisions) raise InputError before anything is written.
    """
    settings = settings or ApplySettings()
    outdir = Path(outdir)
    if settings.axes is not None:
        try:
            check_axes(settings.axes, "--axes")
        except ValueError as exc:
            raise InputError(str(exc)) from None
    unmixer = Unmixer.for_matrix(matrix, settings.method, settings.weights, settings.uncertainty, warn=True)
    matrix_sha = matrix_sha or matrix.sha256()
    plan = plan_outputs(inputs, outdir)
    background_file = [] if settings.background in ("matrix", "estimate") else [settings.background]
    check_outside_inputs(outdir, [p for p, _ in plan] + background_file, "-o")
    resolved_inputs = {Path(p).resolve() for p, _ in plan}
    for source, stem in plan:
        for name in _output_names(outdir, stem, is_zarr_path(source)).values():
            check_name_length(name, f"{source}: output")
            if name.resolve() in resolved_inputs:
                raise InputError(f"{name}: the output would replace an input; choose another output folder")
    if settings.background not in ("matrix", "estimate") and not Path(settings.background).exists():
        raise InputError(f"--background {settings.background}: no such file; give matrix, estimate or a path")
    # The folder itself is made only when the first output is written.
    existing = outdir if outdir.exists() else next((p for p in outdir.parents if p.exists()), Path("."))
    if not existing.is_dir() or not os.access(existing, os.W_OK):
        raise InputError(f"{outdir}: output folder is not writable; choose another -o")
    manifest_path = outdir / MANIFEST
    _check_manifest(manifest_path)

    if scheduler:
        client = _connect(scheduler)
        compute = _distributed_compute(client)
    else:
        client, compute = None, _local_compute

    if progress is not None:
        compute_blocks = compute

        def compute(task, argument_lists):
            results = compute_blocks(task, argument_lists)
            if task in (_unmix_block, _unmix_block_into_zarr):
                progress(len(argument_lists))
            return results

    if outdir.is_dir():
        # Temporaries left by killed runs (outputs or manifest): never under a final name, removed here.
        for source, stem in plan:
            for name in _output_names(outdir, stem, is_zarr_path(source)).values():
                remove_stale_temporaries(name)
        remove_stale_temporaries(manifest_path)
    results = []
    made = not outdir.exists()
    try:
        for path, stem in plan:
            results.append(_apply_one(matrix, unmixer, matrix_sha, path, stem, outdir, settings, compute,
                                      compute_is_local=client is None))
    finally:
        if made and outdir.is_dir() and not any(r.status == "written" for r in results):
            # Nothing was written: the folder this run made goes too (a lock file is all it may hold).
            with contextlib.suppress(OSError):
                (outdir / f".{MANIFEST}.lock").unlink(missing_ok=True)
                outdir.rmdir()
        if client is not None:
            client.close()
        from ..io.images import close_block_sources

        close_block_sources()
    return results


def _apply_one(matrix, unmixer, matrix_sha, path: Path, stem: str, outdir: Path, settings: ApplySettings,
               compute, compute_is_local: bool = True) -> FileResult:
    names = _output_names(outdir, stem, is_zarr_path(path))
    try:
        with open_images(path, axes=settings.axes, channel_names=settings.channel_names) as images:
            return _unmix_file(images, matrix, unmixer, matrix_sha, path, names, outdir, settings, compute,
                               compute_is_local)
    except InputError as exc:
        return FileResult(str(path), None, "failed", str(exc))
    except OSError as exc:
        fault = write_fault(exc, names[OUTPUT_SET[0].name])
        if fault is None:
            raise
        return FileResult(str(path), None, "failed", str(fault))


def _unmix_file(images: list[Image], matrix, unmixer, matrix_sha, path: Path, names: dict, outdir: Path,
                settings: ApplySettings, compute, compute_is_local: bool) -> FileResult:
    fingerprint = input_fingerprint(path)
    identity = _identity(matrix_sha, fingerprint, settings)
    wanted = _wanted(settings)
    first = names[wanted[0]]
    manifest_path = outdir / MANIFEST
    state = _judge(names, wanted, identity)
    if state.foreign and not settings.overwrite:
        raise InputError(f"{state.foreign[0]}: exists and was made from another matrix, input or settings; "
                         "pass --overwrite to replace the outputs of this input or choose another -o")
    if state.complete:
        counts = _counts_of(state.records)
        with _lock_of(outdir):
            # A run killed after its renames but before the manifest: the entry is made again here.
            manifest = _check_manifest(manifest_path)
            entry = manifest["outputs"].get(first.name)
            if not isinstance(entry, dict) or entry.get("matrix_sha256") != identity["matrix_sha256"] \
                    or sorted(entry.get("members", [])) != sorted(names[n].name for n in state.records):
                manifest["outputs"][first.name] = _manifest_entry(path, names, state, identity, counts)
                _write_manifest(manifest_path, manifest)
        return FileResult(str(path), str(first), "kept", "already done with this matrix",
                          nan_pixels=int(counts.get("nan_pixels", 0)),
                          saturated_pixels=int(counts.get("saturated_pixels", 0)))
    # Members missing or made otherwise (with --overwrite): the whole set is written again.
    jobs = []
    for image in images:
        image = _matched(matrix, image)
        if settings.registration is not None:
            settings.registration.check(image.channel_names, image.data.shape, image.name)
        rows = _rows_per_block(image, settings, len(matrix.labels))
        background = _background_for(matrix, image, settings)
        z_position = (image.axes.index("Z"), image.data.shape[image.axes.index("Z")]) if "Z" in image.axes else None
        jobs.append(_SeriesJob(image, image.series, background,
                               _provisional_levels(matrix, image, settings.saturation),
                               _provenance(matrix, matrix_sha, path, fingerprint, settings, background, image.series,
                                           identity),
                               rows, _blocks_per_batch(image, rows, len(matrix.labels), settings, compute_is_local),
                               z_position))
    outdir.mkdir(parents=True, exist_ok=True)
    tallies: list = []

    def commit(rename):
        with _lock_of(outdir):
            manifest = _check_manifest(manifest_path)
            now = _judge(names, wanted, identity)
            if now.foreign and not settings.overwrite:
                raise InputError(f"{now.foreign[0]}: was written meanwhile by another run from another matrix, "
                                 "input or settings; pass --overwrite to replace it or choose another -o")
            rename()
            for foreign in now.foreign:
                if foreign not in [names[n] for n in wanted]:
                    discard_output(foreign)  # a member of the replaced set that this run does not write
            written = _SetState(True, [], {name: {} for name in wanted})
            manifest["outputs"][first.name] = _manifest_entry(path, names, written, identity, _totals(tallies))
            _write_manifest(manifest_path, manifest)

    writer = _write_zarr_outputs if is_zarr_path(path) else _write_outputs
    extra = {"writes_in_tasks": compute_is_local} if is_zarr_path(path) else {}
    with atomic_outputs([names[n] for n in wanted], commit=commit) as temporaries:
        tallies += writer(jobs, matrix, unmixer, path, settings, names, compute, dict(zip(wanted, temporaries)),
                          **extra)
    totals = _totals(tallies)
    pixels = sum(int(np.prod([job.image.data.shape[job.image.axes.index(a)] for a in job.image.axes if a != "C"]))
                 for job in jobs)
    return FileResult(str(path), str(first), "written", nan_pixels=totals["nan_pixels"],
                      saturated_pixels=totals["saturated_pixels"], pixels=pixels)
