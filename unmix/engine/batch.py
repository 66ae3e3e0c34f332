"""Batch unmixing of acquired stacks: blockwise, streamed, resumable.

Each input (every series of it) is cut into blocks of one (T, Z) position
holding all channels and the full Y-X plane; each block is read, unmixed and
written in turn, so memory stays bounded by a few planes whatever the size of
the stack. Blocks are computed by dask in batches (local threads, or a
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

Outputs per input ``<name>`` in OUTDIR (see the command-line contract):

- ``<name>.unmixed.ome.tif``: float32 abundances, one channel per label,
  axes of the input (written Z-major: ``TZCYX``), provenance in the OME
  description;
- ``<name>.saturation.ome.tif``: uint8 mask, 1 where any input channel is
  saturated;
- ``<name>.residual.ome.tif`` (optional): root-mean-square misfit per pixel;
- ``<name>.standard-error.ome.tif`` (optional): float32 standard error of each
  abundance, one channel per label (:mod:`unmix.engine.uncertainty`).

A finished output records the matrix checksum and a fingerprint of the
input in its own metadata and in ``unmix-manifest.json``; a rerun keeps
outputs whose record matches, and refuses (unless ``overwrite``) one made
from another matrix or input.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np

from ..io.atomic import atomic_output, remove_stale_temporaries, temporary_sibling, write_text_atomic
from ..errors import InputError
from ..io.images import Image, check_axes, is_zarr_path, open_images, output_stem, read_images, read_provenance
from ..matrix import BleedThroughMatrix
from .solver import Unmixer
from .uncertainty import error_sources

MANIFEST = "unmix-manifest.json"
# Faults of the output folder that the user can fix: full, read-only, no permission, over quota.
_WRITE_FAULTS = {errno.ENOSPC, errno.EROFS, errno.EACCES, errno.EDQUOT}
_FINGERPRINT_BYTES = 1 << 20


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
    method: str = "nnls"
    background: str = "matrix"  # "matrix", "estimate" or a path
    overwrite: bool = False
    residual: bool = False
    weights: str = "none"  # "none" or "noise" (the matrix's noise model; see uncertainty.error_sources)
    uncertainty: bool = False
    saturation: object = None  # one level, or one per channel; None: detected
    axes: str | None = None
    channel_names: Sequence[str] | None = None
    batch_blocks: int = field(default_factory=lambda: max(2, 2 * (os.cpu_count() or 1)))


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


def _sample_blocks(image: Image, settings: "ApplySettings", most: int = 8) -> np.ndarray:
    """Up to `most` evenly spaced blocks, all channels, channels first: (C, n, Y, X), a cheap
    sample of a large stack."""
    from ..io.images import read_block

    keys = list(_block_keys(image))
    chosen = [keys[i] for i in np.unique(np.linspace(0, len(keys) - 1, min(most, len(keys))).astype(int))]
    return np.stack([read_block(image.source, image.series, key, channels=image.channel_names, axes=settings.axes,
                                channel_names=settings.channel_names) for key in chosen], axis=1)


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
            f"{image.name}: lacks channels {missing} that the matrix needs (it has {list(image.channel_names)}); "
            "check the channel names or give --channel-names"
        )
    extra = [c for c in image.channel_names if c not in matrix.channels]
    if extra:
        import warnings

        from ..errors import InputWarning

        warnings.warn(f"{image.name}: channels {extra} are not in the matrix and are ignored", InputWarning,
                      stacklevel=3)
    return image.select_channels(matrix.channels)


def _block_keys(image: Image):
    """One key per (T, Z) position, selecting all channels and the full plane."""
    leading = [a for a in image.axes if a not in "CYX"]
    shape = [image.data.shape[image.axes.index(a)] for a in leading]
    for position in np.ndindex(*shape):
        key, it = [], iter(position)
        for axis in image.axes:
            key.append(next(it) if axis not in "CYX" else slice(None))
        yield tuple(key)


def _mask_and_peaks(block: np.ndarray, levels) -> tuple[np.ndarray, list]:
    """Saturation mask (Y, X) of a block (C, Y, X) at `levels`, and the peak of each channel."""
    from ..measure.levels import ChannelPeak
    from .saturation import mask_and_peaks

    n = block.shape[0]
    mask = np.empty(block.shape[1:], np.uint8)
    maxima, at_maxima, counts = np.empty(n), np.empty(n, np.int64), np.empty(n, np.int64)
    mask_and_peaks(block.reshape(n, -1), np.asarray(levels, dtype=np.float64), mask.reshape(-1), maxima,
                   at_maxima, counts)
    return mask, [ChannelPeak(float(m), int(a), int(c)) for m, a, c in zip(maxima, at_maxima, counts)]


def _unmix_block(path: str, series: int, axes, channel_names, channels, key, unmixer: Unmixer,
                 background, levels, residual: bool, uncertainty: bool):
    """Read one block from the file and unmix it.

    Returns the abundances (K, Y, X), the saturation mask at `levels`, the
    misfit (or None), the number of NaN pixels, the peak of each channel and
    the standard errors (K, Y, X) (or None).
    """
    from ..io.images import read_block

    block = read_block(path, series, key, channels=channels, axes=axes, channel_names=channel_names)  # (C, Y, X)
    abundances, errors = unmixer.solve(block, background, errors=uncertainty)
    nan = int(np.count_nonzero(np.isnan(abundances[0])))
    misfit = unmixer.residual(block, abundances, background) if residual else None
    mask, peaks = _mask_and_peaks(block, levels)
    return abundances, mask, misfit, nan, peaks, errors


def _unmix_block_into_zarr(path: str, series: int, axes, channel_names, channels, key, unmixer: Unmixer,
                           background, levels, residual: bool, uncertainty: bool, destinations: dict):
    """:func:`_unmix_block`, then store the block in its chunk of each output array (distinct
    chunks: tasks write in parallel); returns the figures only, with the saturated count."""
    import zarr

    abundances, saturated, misfit, nan, peaks, errors = _unmix_block(
        path, series, axes, channel_names, channels, key, unmixer, background, levels, residual, uncertainty)
    zarr.open_array(destinations["unmixed"], mode="r+")[key] = abundances
    zarr.open_array(destinations["saturation"], mode="r+")[key] = saturated[None]
    if misfit is not None:
        zarr.open_array(destinations["residual"], mode="r+")[key] = misfit[None]
    if errors is not None:
        zarr.open_array(destinations["standard-error"], mode="r+")[key] = errors
    return None, int(np.count_nonzero(saturated)), None, nan, peaks, None


def _mask_block(path: str, series: int, axes, channel_names, channels, key, levels):
    from ..io.images import read_block

    return _mask_and_peaks(read_block(path, series, key, channels=channels, axes=axes,
                                      channel_names=channel_names), levels)[0]


def _output_names(outdir: Path, stem: str, zarr_output: bool = False) -> dict:
    suffix = ".ome.zarr" if zarr_output else ".ome.tif"
    return {kind: outdir / f"{stem}.{kind}{suffix}" for kind in ("unmixed", "saturation", "residual",
                                                                  "standard-error")}


def _provenance(matrix: BleedThroughMatrix, matrix_sha: str, path: Path, fingerprint: str, settings: ApplySettings,
                background: np.ndarray, series: int) -> dict:
    from ..io import provenance as prov

    return {
        "command": "apply", "created": prov.utc_now(), "software": prov.software(),
        "input": {"name": path.name, "path": str(path.resolve()), "fingerprint": fingerprint, "series": series},
        "matrix": {"sha256": matrix_sha, "contents": matrix.to_dict()},
        "method": settings.method,
        "background": {"source": settings.background if settings.background in ("matrix", "estimate")
                       else str(Path(settings.background).resolve()), "levels": [float(b) for b in background]},
        "noise_penalty": dict(zip(matrix.labels, map(float, matrix.noise_penalty()))),
        "condition_number": matrix.condition_number(),
        **error_sources(matrix, settings.weights, settings.uncertainty)[2],
    }


def _same_run(existing: dict | None, matrix_sha: str, fingerprint: str, settings: ApplySettings) -> bool:
    if not existing:
        return False
    return (existing.get("matrix", {}).get("sha256") == matrix_sha
            and existing.get("input", {}).get("fingerprint") == fingerprint
            and existing.get("method") == settings.method
            and existing.get("weights", {}).get("requested", "none") == settings.weights)


def _planes_writer(blocks, n_labels: int):
    """Yield output planes (Z-major: for each block, its K label planes) from computed blocks."""
    for block in blocks:
        for k in range(n_labels):
            yield block[k]


def _early_writeback(planes, handle, every: int = 64 << 20):
    """Pass `planes` through, asking the kernel every `every` bytes to start writing the file
    to disk, so that the final fsync (see :mod:`unmix.io.atomic`) finds little left to do and the
    disk works while the next blocks are computed."""
    written = 0
    for plane in planes:
        yield plane
        written += plane.nbytes
        if written >= every and hasattr(os, "posix_fadvise"):
            handle.flush()
            # DONTNEED starts asynchronous write-back of the dirty pages (Linux) and drops
            # pages already written; it never discards data.
            os.posix_fadvise(handle.fileno(), 0, 0, os.POSIX_FADV_DONTNEED)
            written = 0


@dataclass(frozen=True)
class _SeriesJob:
    """One series of an input, ready to unmix."""

    image: Image
    index: int
    background: np.ndarray
    levels: np.ndarray
    provenance: dict


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
    computed while the caller handles this one (reading, computing and writing overlap)."""
    from concurrent.futures import ThreadPoolExecutor

    batches = [keys[start:start + size] for start in range(0, len(keys), size)]
    if not batches:
        return
    with ThreadPoolExecutor(max_workers=1) as ahead:
        pending = ahead.submit(compute, task, [task_arguments(key) for key in batches[0]])
        for index, batch in enumerate(batches):
            results = pending.result()
            if index + 1 < len(batches):
                pending = ahead.submit(compute, task, [task_arguments(key) for key in batches[index + 1]])
            yield from zip(batch, results)


def _task_source(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, settings: ApplySettings) -> tuple:
    """The leading task arguments that say which file, series and channels to read."""
    return str(path), job.index, settings.axes, settings.channel_names, list(matrix.channels)


def _computed_blocks(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, unmixer: Unmixer,
                     settings: ApplySettings, compute, tally: _SeriesTally, destinations: dict | None = None):
    """Yield (key, abundances, saturation mask, misfit or None, errors or None) per block of a series.

    NaN and saturated pixel counts and the channel peaks are added to `tally`.
    With `destinations` (kind -> path of an OME-Zarr array), each task stores
    its block there itself, in parallel, and the arrays yielded are None.
    """
    source = _task_source(job, path, matrix, settings)
    task, extra = (_unmix_block, ()) if destinations is None else (_unmix_block_into_zarr, (destinations,))
    for key, (abundances, saturated, misfit, nan, peaks, errors) in _in_batches(
            list(_block_keys(job.image)), settings.batch_blocks, task,
            lambda key: (*source, key, unmixer, job.background, job.levels, settings.residual, settings.uncertainty,
                         *extra), compute):
        tally.add(nan, saturated if isinstance(saturated, int) else int(np.count_nonzero(saturated)), peaks)
        yield key, abundances, saturated, misfit, errors


def _recomputed_masks(job: _SeriesJob, path: Path, matrix: BleedThroughMatrix, settings: ApplySettings,
                      levels: np.ndarray, compute, tally: _SeriesTally):
    """Yield (key, saturation mask at `levels`) per block, recounting `tally.saturated`.

    Needed only when the input saturates below the level the blocks were
    masked at (a second, reading-only pass).
    """
    source = _task_source(job, path, matrix, settings)
    tally.saturated = 0
    for key, mask in _in_batches(list(_block_keys(job.image)), settings.batch_blocks, _mask_block,
                                 lambda key: (*source, key, levels), compute):
        tally.saturated += int(np.count_nonzero(mask))
        yield key, mask


class _PlaneSpool:
    """Planes appended to a scratch file and read back in order, one at a time.

    Plain file writes and reads keep memory bounded (a memory map would count
    every touched page as resident).
    """

    def __init__(self, path: Path, dtype):
        self.path, self.dtype = Path(path), np.dtype(dtype)
        self.file = open(self.path, "w+b")

    def __enter__(self):
        return self

    def __exit__(self, *exc_info):
        self.file.close()
        self.path.unlink(missing_ok=True)

    def append(self, plane: np.ndarray) -> None:
        self.file.write(np.ascontiguousarray(plane, dtype=self.dtype).tobytes())

    def planes(self, plane_shape):
        self.file.flush()
        self.file.seek(0)
        count = int(np.prod(plane_shape))
        while True:
            plane = np.fromfile(self.file, dtype=self.dtype, count=count)
            if plane.size < count:
                return
            yield plane.reshape(plane_shape)


def _write_outputs(jobs: list[_SeriesJob], matrix: BleedThroughMatrix, unmixer: Unmixer, path: Path,
                   settings: ApplySettings, names: dict, compute) -> dict:
    """Compute the blocks of every series in batches and stream them into the output files.

    Each output file holds one series per input series, in the same order.
    The abundances are streamed into their file as they are computed; the
    per-pixel maps (saturation mask, residual) of each block are spooled to
    scratch files beside the outputs and written out at the end, so memory
    stays bounded by a few blocks whatever the size of the stack.
    """
    import tifffile

    tallies = [_SeriesTally() for _ in jobs]

    def layout(image: Image, n_channels: int):
        leading = "".join(a for a in image.axes if a not in "CYX")
        shape = tuple(image.data.shape[image.axes.index(a)] for a in leading)
        return leading + "CYX", shape + (n_channels,) + tuple(image.data.shape[-2:])

    def physical(image: Image) -> dict:
        return {f"PhysicalSize{axis}": float(size) for axis, size in image.pixel_size.items()}

    def blocks(job: _SeriesJob, maps: dict, tally: _SeriesTally):
        for _, abundances, saturated, misfit, errors in _computed_blocks(job, path, matrix, unmixer, settings,
                                                                         compute, tally):
            maps["saturation"].append(saturated)
            if misfit is not None:
                maps["residual"].append(misfit)
            for plane in () if errors is None else errors:
                maps["standard-error"].append(plane)
            yield abundances

    def map_planes(kind: str, job: _SeriesJob, maps: dict, tally: _SeriesTally, levels: np.ndarray):
        if kind == "saturation" and np.any(levels < job.levels):
            return (mask for _, mask in _recomputed_masks(job, path, matrix, settings, levels, compute, tally))
        return maps[kind].planes(job.image.data.shape[-2:])

    kinds = {"saturation": (np.uint8, ["saturated"]), "residual": (np.float32, ["residual_rms"]),
             "standard-error": (np.float32, list(matrix.labels))}
    if not settings.residual:
        del kinds["residual"]
    if not settings.uncertainty:
        del kinds["standard-error"]
    with contextlib.ExitStack() as scratch:
        maps_per_series = []
        for _ in jobs:
            maps = {}
            for kind, (dtype, _) in kinds.items():
                # A hidden ".partial" name: removed on exit, and by the stale
                # clean-up if this process is killed.
                maps[kind] = scratch.enter_context(_PlaneSpool(temporary_sibling(names[kind]), dtype))
            maps_per_series.append(maps)
        total_bytes = sum(np.prod(layout(job.image, len(matrix.labels))[1], dtype=np.float64) * 4 for job in jobs)
        with atomic_output(names["unmixed"]) as tmp, open(tmp, "wb") as handle:
            with tifffile.TiffWriter(handle, ome=True, bigtiff=total_bytes > 2**31) as writer:
                for job, maps, tally in zip(jobs, maps_per_series, tallies):
                    axes, shape = layout(job.image, len(matrix.labels))
                    writer.write(_early_writeback(_planes_writer(blocks(job, maps, tally), len(matrix.labels)),
                                                  handle),
                                 shape=shape, dtype=np.float32, photometric="minisblack",
                                 metadata={"axes": axes, "Channel": {"Name": list(matrix.labels)},
                                           "Description": json.dumps(job.provenance, sort_keys=True),
                                           **physical(job.image)})
        levels = [_final_levels(job, tally.peaks, settings) for job, tally in zip(jobs, tallies)]
        for kind, (_, channel_names) in kinds.items():
            with atomic_output(names[kind]) as tmp:
                with tifffile.TiffWriter(tmp, ome=True, bigtiff=total_bytes > 2**31) as writer:
                    for job, maps, tally, series_levels in zip(jobs, maps_per_series, tallies, levels):
                        axes, shape = layout(job.image, len(channel_names))
                        description = {"of": names["unmixed"].name}
                        if kind == "saturation":
                            description["levels"] = [float(v) for v in series_levels]
                        writer.write(map_planes(kind, job, maps, tally, series_levels), shape=shape,
                                     dtype=kinds[kind][0], photometric="minisblack",
                                     # Masks are mostly zeros: the fastest zlib level packs them well.
                                     compression="zlib" if kind == "saturation" else None,
                                     compressionargs={"level": 1} if kind == "saturation" else None,
                                     metadata={"axes": axes, "Channel": {"Name": channel_names},
                                               "Description": json.dumps(description), **physical(job.image)})
    return _totals(tallies)


def _totals(tallies) -> dict:
    return {"nan": sum(t.nan for t in tallies), "saturated": sum(t.saturated for t in tallies)}


def _write_zarr_outputs(jobs: list[_SeriesJob], matrix: BleedThroughMatrix, unmixer: Unmixer, path: Path,
                        settings: ApplySettings, names: dict, compute, writes_in_tasks: bool = False) -> dict:
    """OME-Zarr input gives OME-Zarr outputs: blocks computed in parallel batches, each stored in its chunk.

    With `writes_in_tasks` (local threads) every task stores its own block, so the chunks are
    written in parallel; on a cluster the submitting process stores them (the workers need not
    see the output folder), overlapped with the computing of the next batch.
    """
    import zarr
    from ome_zarr.writer import write_multiscales_metadata

    tallies = []
    kinds = (["unmixed", "saturation"] + (["residual"] if settings.residual else [])
             + (["standard-error"] if settings.uncertainty else []))
    channels = {"unmixed": list(matrix.labels), "saturation": ["saturated"], "residual": ["residual_rms"],
                "standard-error": list(matrix.labels)}
    dtypes = {"unmixed": np.float32, "saturation": np.uint8, "residual": np.float32, "standard-error": np.float32}
    with contextlib.ExitStack() as stack:
        folders = {kind: stack.enter_context(atomic_output(names[kind])) for kind in kinds}
        roots = {kind: zarr.open_group(str(folder), mode="w") for kind, folder in folders.items()}
        if len(jobs) > 1:
            for root in roots.values():
                root.attrs["bioformats2raw.layout"] = 3
        for i, job in enumerate(jobs):
            image = job.image
            c_axis = image.channel_axis
            arrays = {}
            for kind, root in roots.items():
                group = root if len(jobs) == 1 else root.create_group(str(i))
                shape = list(image.data.shape)
                shape[c_axis] = len(channels[kind])
                chunks = [1] * len(shape)
                chunks[c_axis], chunks[-2], chunks[-1] = shape[c_axis], shape[-2], shape[-1]
                arrays[kind] = group.create_array("0", shape=tuple(shape), chunks=tuple(chunks), dtype=dtypes[kind])
                axes = [{"name": a.lower(), "type": {"T": "time", "C": "channel"}.get(a, "space")} for a in image.axes]
                scale = [float(image.pixel_size.get(a, 1.0)) for a in image.axes]
                write_multiscales_metadata(group, datasets=[{"path": "0", "coordinateTransformations": [
                    {"type": "scale", "scale": scale}]}], axes=axes)
                _add_zarr_attrs(group, {"omero": {"channels": [{"label": n, "active": True} for n in channels[kind]]}})
                group.attrs["unmix_provenance"] = job.provenance if kind == "unmixed" else {"of": names["unmixed"].name}
            tallies.append(tally := _SeriesTally())
            destinations = None
            if writes_in_tasks:
                destinations = {kind: str(folders[kind] / ("" if len(jobs) == 1 else str(i)) / "0") for kind in kinds}
            for key, abundances, saturated, misfit, errors in _computed_blocks(job, path, matrix, unmixer, settings,
                                                                               compute, tally, destinations):
                if destinations is not None:
                    continue  # the task stored the block
                arrays["unmixed"][key] = abundances
                arrays["saturation"][key] = saturated[None]
                if misfit is not None:
                    arrays["residual"][key] = misfit[None]
                if errors is not None:
                    arrays["standard-error"][key] = errors
            levels = _final_levels(job, tally.peaks, settings)
            if np.any(levels < job.levels):
                for key, mask in _recomputed_masks(job, path, matrix, settings, levels, compute, tally):
                    arrays["saturation"][key] = mask[None]
            arrays["saturation"].attrs["unmix_saturation_levels"] = [float(v) for v in levels]
    return _totals(tallies)


def _add_zarr_attrs(group, extra: dict) -> None:
    """Add keys beside the NGFF metadata (under "ome" for NGFF 0.5, top level for 0.4)."""
    if "ome" in group.attrs:
        group.attrs["ome"] = {**dict(group.attrs["ome"]), **extra}
    else:
        group.attrs.update(extra)


def _local_compute(task, argument_lists):
    # A plain thread pool: dask's local scheduler would import dask.distributed (0.2 s) first.
    from ..threads import map_in_threads

    return map_in_threads(task, argument_lists)


def _distributed_compute(client):
    def compute(task, argument_lists):
        futures = [client.submit(task, *arguments, pure=False) for arguments in argument_lists]
        return client.gather(futures)

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
    matrix.check_unmixable(warn=False)
    noise, covariance, _ = error_sources(matrix, settings.weights, settings.uncertainty, warn=True)
    unmixer = Unmixer(matrix.matrix, method=settings.method, labels=matrix.labels, noise=noise,
                      column_covariance=covariance, weighted=settings.weights == "noise" and noise is not None)
    matrix_sha = matrix_sha or matrix.sha256()
    plan = plan_outputs(inputs, outdir)
    resolved_inputs = {Path(p).resolve() for p, _ in plan}
    for source, stem in plan:
        for name in _output_names(outdir, stem, is_zarr_path(source)).values():
            if name.resolve() in resolved_inputs:
                raise InputError(f"{name}: the output would replace an input; choose another output folder")
    if settings.background not in ("matrix", "estimate") and not Path(settings.background).exists():
        raise InputError(f"--background {settings.background}: no such file; give matrix, estimate or a path")
    # The folder itself is made only when the first output is written.
    existing = outdir if outdir.exists() else next((p for p in outdir.parents if p.exists()), Path("."))
    if not existing.is_dir() or not os.access(existing, os.W_OK):
        raise InputError(f"{outdir}: output folder is not writable; choose another -o")

    if scheduler:
        try:
            from distributed import Client

            client = Client(scheduler, timeout="10s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise InputError(f"--scheduler {scheduler}: cannot reach the Dask scheduler ({exc}); "
                             "check the address and that the scheduler is running") from None
        compute = _distributed_compute(client)
    else:
        client, compute = None, _local_compute

    if progress is not None:
        compute_blocks = compute

        def compute(task, argument_lists):
            results = compute_blocks(task, argument_lists)
            if task is _unmix_block:
                progress(len(argument_lists))
            return results

    manifest_path = outdir / MANIFEST
    if outdir.is_dir():
        # Temporaries left by a killed run (outputs or manifest): never under a final name, removed here.
        for source, stem in plan:
            for name in _output_names(outdir, stem, is_zarr_path(source)).values():
                remove_stale_temporaries(name)
        remove_stale_temporaries(manifest_path)
    results = []
    try:
        for path, stem in plan:
            results.append(_apply_one(matrix, unmixer, matrix_sha, path, stem, outdir, settings, compute,
                                      compute_is_local=client is None))
            if results[-1].status == "written":
                _record(manifest_path, results[-1], matrix_sha, settings)
    finally:
        if client is not None:
            client.close()
        from ..io.images import close_block_sources

        close_block_sources()
    return results


def _record(manifest_path: Path, result: FileResult, matrix_sha: str, settings: ApplySettings) -> None:
    """Add one finished output to the manifest: read, update and replace it under a lock, so that
    runs sharing an output folder do not lose each other's entries."""
    from ..io.provenance import utc_now

    with _manifest_lock(manifest_path):
        try:
            manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
            if not isinstance(manifest, dict) or not isinstance(manifest.get("outputs"), dict):
                raise ValueError
        except (OSError, ValueError):
            manifest = {"format": "unmix-manifest", "version": 1, "outputs": {}}
        manifest["outputs"][Path(result.output).name] = {
            "input": result.input, "matrix_sha256": matrix_sha, "method": settings.method, "finished": utc_now(),
            "nan_pixels": result.nan_pixels, "saturated_pixels": result.saturated_pixels,
        }
        write_text_atomic(manifest_path, json.dumps(manifest, indent=2) + "\n")


@contextlib.contextmanager
def _manifest_lock(manifest_path: Path):
    """An exclusive advisory lock (POSIX flock) on a hidden file beside the manifest; released when
    the process ends, even when it is killed."""
    try:
        import fcntl
    except ImportError:  # no flock on this platform: atomic replacement alone
        yield
        return
    with open(manifest_path.with_name(f".{manifest_path.name}.lock"), "a+b") as handle:
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


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
        if exc.errno not in _WRITE_FAULTS:
            raise
        return FileResult(str(path), None, "failed",
                          f"{names['unmixed']}: cannot write ({exc.strerror}); free space or choose another -o")


def _unmix_file(images: list[Image], matrix, unmixer, matrix_sha, path: Path, names: dict, outdir: Path,
                settings: ApplySettings, compute, compute_is_local: bool) -> FileResult:
    fingerprint = input_fingerprint(path)
    if names["unmixed"].exists():
        try:
            existing = read_provenance(names["unmixed"])
        except Exception:  # noqa: BLE001 - an unreadable output is not ours to trust
            existing = None
        same = _same_run(existing, matrix_sha, fingerprint, settings)
        complete = (names["saturation"].exists() and (names["residual"].exists() or not settings.residual)
                    and (names["standard-error"].exists() or not settings.uncertainty))
        if same and complete:
            return FileResult(str(path), str(names["unmixed"]), "kept", "already done with this matrix")
        if not same and not settings.overwrite:
            raise InputError(f"{names['unmixed']}: exists and was made from another matrix, input or method; "
                             "pass --overwrite to replace it or choose another -o")
        # Same run, interrupted before its mask was written: done again below.
    jobs = []
    for image in images:
        image = _matched(matrix, image)
        background = _background_for(matrix, image, settings)
        jobs.append(_SeriesJob(image, image.series, background,
                               _provisional_levels(matrix, image, settings.saturation),
                               _provenance(matrix, matrix_sha, path, fingerprint, settings, background, image.series)))
    outdir.mkdir(parents=True, exist_ok=True)
    if is_zarr_path(path):
        totals = _write_zarr_outputs(jobs, matrix, unmixer, path, settings, names, compute,
                                     writes_in_tasks=compute_is_local)
    else:
        totals = _write_outputs(jobs, matrix, unmixer, path, settings, names, compute)
    pixels = sum(int(np.prod([job.image.data.shape[job.image.axes.index(a)] for a in job.image.axes if a != "C"]))
                 for job in jobs)
    return FileResult(str(path), str(names["unmixed"]), "written", nan_pixels=totals["nan"],
                      saturated_pixels=totals["saturated"], pixels=pixels)
