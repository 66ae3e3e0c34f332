"""Reading and writing multichannel images: TIFF, OME-TIFF and OME-Zarr.

Every image is handed around as an :class:`Image`: the pixel array (numpy; for
lazy reading, a dask array, or for TIFF a deferred array that builds its dask
array only when something beyond its shape or a page-by-page read needs it),
its axes in the canonical order ``TCZYX`` (only the axes present, ``C``, ``Y``
and ``X`` always), the channel names, the physical pixel sizes and where it
came from. Readers put the axes into that order, so no other module needs to
know how a file stored them.

Axis rules (the command line's contract): axes come from OME or hyperstack
metadata when the file has them; a file without axis metadata is read as
``CYX`` when it is 3-D and ``YX`` when it is 2-D; anything else needs an
explicit `axes` argument (``--axes`` on the command line). Channel names come
from the metadata, else ``ch0``, ``ch1``, ...; `channel_names` overrides them.

Lazy reading goes through ``tifffile``'s zarr view of a TIFF series (read
plane by plane on demand, so a file larger than memory can be streamed) and
through ``zarr`` for OME-Zarr (NGFF 0.4 and 0.5 metadata).
"""

from __future__ import annotations

import contextlib
import json
import logging
import threading
import xml.etree.ElementTree as ElementTree
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from .atomic import atomic_output
from ..errors import InputError, check_regular_file

CANONICAL_AXES = "TCZYX"
TIFF_SUFFIXES = (".ome.tif", ".ome.tiff", ".tif", ".tiff")
ZARR_SUFFIXES = (".ome.zarr", ".zarr")
# Multi-dimensional shapes declared in a file are checked against this many
# pixels before anything is allocated, so that a tiny damaged file cannot
# ask for terabytes (common practice for defensive readers).
MAX_PIXELS = 2**40


@dataclass(frozen=True)
class Image:
    """A multichannel image with its axes and channel names.

    Attributes
    ----------
    data : array-like
        numpy or dask array with axes `axes`.
    axes : str
        Axis letters in canonical order, a subsequence of ``"TCZYX"`` that
        always holds ``C``, ``Y`` and ``X``.
    channel_names : tuple of str
        One name per channel, unique.
    pixel_size : dict
        Physical size per axis letter (``"X"``, ``"Y"``, ``"Z"``) in
        micrometres, where the file gives it.
    source : str or None
        The file the image was read from.
    series : int
        Index of the series (position) within that file.
    """

    data: Any
    axes: str
    channel_names: tuple[str, ...]
    pixel_size: dict = field(default_factory=dict)
    source: str | None = None
    series: int = 0

    def __post_init__(self):
        check_axes(self.axes, "axes")
        if len(self.axes) != self.data.ndim:
            raise ValueError(f"axes {self.axes!r} do not match data with {self.data.ndim} dimensions")
        if len(self.channel_names) != self.n_channels:
            raise ValueError(
                f"channel_names has {len(self.channel_names)} names for {self.n_channels} channels"
            )
        if len(set(self.channel_names)) != len(self.channel_names):
            raise ValueError(f"channel_names are not unique: {list(self.channel_names)}")

    @property
    def n_channels(self) -> int:
        return int(self.data.shape[self.axes.index("C")])

    @property
    def channel_axis(self) -> int:
        return self.axes.index("C")

    @property
    def name(self) -> str:
        """A short description for messages: the file, and the series if not the first."""
        where = self.source or "<array>"
        return where if self.series == 0 else f"{where} (series {self.series})"

    def channel(self, name: str):
        """The pixels of channel `name`, C axis removed."""
        index = self.channel_names.index(name)
        return self.data[(slice(None),) * self.channel_axis + (index,)]

    def select_channels(self, names: Sequence[str]) -> "Image":
        """A view with the channels `names`, in that order."""
        indices = [self.channel_names.index(n) for n in names]
        key = (slice(None),) * self.channel_axis + (indices,)
        return replace(self, data=self.data[key], channel_names=tuple(names))

    def compute(self) -> "Image":
        """The same image with its pixels in memory as a numpy array."""
        if isinstance(self.data, np.ndarray):
            return self
        return replace(self, data=np.asarray(self.data))


def check_axes(axes: str, what: str) -> str:
    """Validate an axis string: letters of TCZYX, each once, with C, Y, X."""
    if not isinstance(axes, str) or not axes:
        raise ValueError(f"{what} must be a non-empty string of axis letters")
    axes = axes.upper()
    bad = set(axes) - set(CANONICAL_AXES)
    if bad or len(set(axes)) != len(axes) or not {"Y", "X"} <= set(axes):
        raise ValueError(
            f"{what} {axes!r} is not valid: use each of T, C, Z, Y, X at most once, Y and X required"
        )
    return axes


def to_canonical(data, axes: str):
    """Transpose `data` with `axes` to canonical order, adding a C axis if missing."""
    axes = check_axes(axes, "axes")
    if "C" not in axes:
        data = data[None]
        axes = "C" + axes
    order = [axes.index(a) for a in CANONICAL_AXES if a in axes]
    canonical = "".join(axes[i] for i in order)
    if order != list(range(len(order))):
        data = data.transpose(order)
    return data, canonical


def _default_channel_names(n: int) -> tuple[str, ...]:
    return tuple(f"ch{i}" for i in range(n))


def names_text(names: Sequence[str], most: int = 8) -> str:
    """Channel or label names for a message: the first `most`, and how many more."""
    names = [str(n) for n in names]
    shown = ", ".join(repr(n) for n in names[:most])
    return f"[{shown}]" if len(names) <= most else f"[{shown} and {len(names) - most} more]"


def _usable_names(names: list, n_channels: int, path) -> tuple[str, ...]:
    """The metadata's channel names, or ch0, ch1 ... when there are none or they cannot name the
    channels (a warning says which, when the metadata gave some)."""
    if len(names) == n_channels and len(set(names)) == len(names) and all(names):
        return tuple(names)
    if any(names):
        import warnings

        from ..errors import InputWarning

        problem = ("are duplicated or empty" if len(names) == n_channels
                   else f"are {len(names)} for {n_channels} channels")
        warnings.warn(f"{path}: the channel names in its metadata {names_text(names)} {problem}; reading them as "
                      "ch0, ch1, ...; give --channel-names", InputWarning, stacklevel=4)
    return _default_channel_names(n_channels)


def _apply_overrides(image: Image, channel_names: Sequence[str] | None) -> Image:
    if channel_names is None:
        return image
    names = tuple(str(n).strip() for n in channel_names)
    if len(names) != image.n_channels:
        raise InputError(
            f"{image.name}: --channel-names gives {len(names)} names but the image has "
            f"{image.n_channels} channels; give exactly one name per channel"
        )
    if len(set(names)) != len(names) or any(not n for n in names):
        raise InputError(f"{image.name}: --channel-names must be unique and non-empty; got {names_text(names)}")
    return replace(image, channel_names=names)


def is_zarr_path(path: Path) -> bool:
    return path.name.lower().endswith(ZARR_SUFFIXES) or (path.is_dir() and (
        (path / ".zattrs").exists() or (path / "zarr.json").exists()))


def read_images(path, *, axes: str | None = None, channel_names: Sequence[str] | None = None,
                lazy: bool = False, mask: bool = False, _open_files: list | None = None) -> list[Image]:
    """Read every series (position) of a TIFF, OME-TIFF or OME-Zarr file.

    Parameters
    ----------
    path : str or os.PathLike
        The file (TIFF) or folder (OME-Zarr).
    axes : str, optional
        Axis letters of the stored array (e.g. ``"ZCYX"``), overriding the
        metadata; needed for files without axis metadata that are not 2-D or 3-D.
    channel_names : sequence of str, optional
        Overrides the channel names of the metadata.
    lazy : bool
        Return dask arrays read on demand instead of numpy arrays.
    mask : bool
        The image is a mask or a label image: boolean pixels are accepted too.

    Returns
    -------
    list of Image

    Raises
    ------
    InputError
        For a missing, unreadable or unsupported file, naming it.
    """
    path = Path(path)
    if not path.is_dir():
        check_regular_file(path, "image file")  # a pipe or a device would block or never end
    if axes is not None:
        try:
            axes = check_axes(axes, "--axes")
        except ValueError as exc:
            raise InputError(f"{path}: {exc}") from None
    if is_zarr_path(path):
        images = _read_zarr(path, axes, lazy)
    elif path.is_dir():
        raise InputError(f"{path}: is a folder but not an OME-Zarr image; give a TIFF file or an OME-Zarr folder")
    else:
        images = _read_tiff(path, axes, lazy, _open_files)
    for image in images:
        _check_pixel_type(image.data.dtype, path, mask)
    return [_apply_overrides(im, channel_names) for im in images]


def read_image(path, *, axes: str | None = None, channel_names: Sequence[str] | None = None,
               lazy: bool = False, mask: bool = False, series: int = 0) -> Image:
    """Read one series of an image file; see :func:`read_images`."""
    images = read_images(path, axes=axes, channel_names=channel_names, lazy=lazy, mask=mask)
    if not 0 <= series < len(images):
        raise InputError(f"{path}: has {len(images)} series; series {series} does not exist")
    return images[series]


@contextlib.contextmanager
def open_images(path, *, axes: str | None = None, channel_names: Sequence[str] | None = None):
    """Lazy images of every series of a file (see :func:`read_images`); the file is closed on exit."""
    open_files: list = []
    try:
        yield read_images(path, axes=axes, channel_names=channel_names, lazy=True, _open_files=open_files)
    finally:
        for handle in open_files:
            handle.close()


# --- TIFF -------------------------------------------------------------------

class _LogCapture(logging.Handler):
    """Collect what tifffile logs about a damaged file, to re-emit as warnings."""

    def __init__(self):
        super().__init__(logging.WARNING)
        self.messages: list[str] = []
        self.errors: list[str] = []

    def emit(self, record):
        (self.errors if record.levelno >= logging.ERROR else self.messages).append(record.getMessage())


def _ome_channel_names_and_sizes(ome_xml: str | None) -> list[tuple[list[str], dict]]:
    """Per OME Image element: its channel names and physical pixel sizes."""
    if not ome_xml:
        return []
    try:
        root = ElementTree.fromstring(ome_xml)
    except ElementTree.ParseError:
        return []
    result = []
    for image in root.iter():
        if not image.tag.endswith("}Image") and image.tag != "Image":
            continue
        pixels = next((p for p in image if p.tag.endswith("Pixels")), None)
        if pixels is None:
            continue
        names = [ch.get("Name") or "" for ch in pixels if ch.tag.endswith("Channel")]
        sizes = {}
        for axis in "XYZ":
            value = pixels.get(f"PhysicalSize{axis}")
            if value is not None:
                try:
                    sizes[axis] = float(value)
                except ValueError:
                    pass
        result.append((names, sizes))
    return result


def _tiff_axes(tif, series, axes_override: str | None, path: Path) -> str:
    shape = series.shape
    if axes_override is not None:
        if len(axes_override) != len(shape):
            raise InputError(
                f"{path}: --axes {axes_override} has {len(axes_override)} letters but the image "
                f"has {len(shape)} dimensions {tuple(shape)}; give one letter per dimension"
            )
        return axes_override
    if tif.is_ome or tif.is_imagej or series.axes.endswith("S"):
        # Samples per pixel (RGB) are channels: an RGB file is 3 channels, not 384 rows of them.
        axes = series.axes.replace("S", "C") if "C" not in series.axes else series.axes
        if set(axes) <= set(CANONICAL_AXES) and len(set(axes)) == len(axes):
            return axes
    if len(shape) == 3:
        return "CYX"
    if len(shape) == 2:
        return "YX"
    raise InputError(
        f"{path}: has {len(shape)} dimensions {tuple(shape)} and no axis metadata; "
        f"give them with --axes, e.g. --axes {'TCZYX'[-len(shape):]}"
    )


def _read_tiff(path: Path, axes_override: str | None, lazy: bool, open_files: list | None = None) -> list[Image]:
    import tifffile

    logger = logging.getLogger("tifffile")
    capture = _LogCapture()
    logger.addHandler(capture)
    propagate, logger.propagate = logger.propagate, False
    try:
        try:
            tif = tifffile.TiffFile(path)
        except Exception as exc:  # tifffile raises many types on damaged files
            raise InputError(f"{path}: not a readable TIFF file ({_short(exc)}); check the file") from None
        def refuse_if_damaged():
            # tifffile reports damage (bad offsets, unreadable tags) as errors
            # and carries on with what it could parse: refuse instead of
            # returning a partial image.
            if capture.errors:
                raise InputError(f"{path}: damaged TIFF ({_short(Exception(capture.errors[0]))}); "
                                 "check or re-export the file")

        try:
            refuse_if_damaged()  # damage found while opening
            images = _tiff_series(tif, path, axes_override, lazy)
            refuse_if_damaged()  # damage found while reading the series
        except InputError:
            tif.close()
            raise
        except Exception as exc:
            tif.close()
            raise tiff_failure(exc, path) from None
        if not lazy:
            tif.close()
        elif open_files is not None:
            open_files.append(tif)
    finally:
        logger.removeHandler(capture)
        logger.propagate = propagate
    if capture.messages:
        import warnings

        from ..errors import InputWarning

        for message in dict.fromkeys(capture.messages):
            warnings.warn(f"{path}: tifffile: {message}", InputWarning, stacklevel=3)
    return images


def _check_pixel_type(dtype, path: Path, mask: bool = False) -> None:
    """Integer and floating-point pixels are accepted (the contract), and booleans in a `mask`;
    anything else is refused."""
    dtype = np.dtype(dtype)
    if dtype.kind not in ("uifb" if mask else "uif"):
        raise InputError(f"{path}: pixel type {dtype} is not supported; convert the image to integer or "
                         "floating-point pixels")


def _short(exc: Exception) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text[:200]


def _check_extent(series, path: Path, index: int) -> None:
    """Refuse a series whose pixel data would lie beyond the end of the file."""
    size = path.stat().st_size
    for page in series.pages:
        if page is None:
            raise InputError(f"{path}: series {index} misses image planes (truncated file?); check the file")
        offsets = getattr(page, "dataoffsets", ())
        counts = getattr(page, "databytecounts", ())
        if offsets and counts and max(o + c for o, c in zip(offsets, counts)) > size:
            raise InputError(f"{path}: truncated: image data end beyond the end of the file; copy the file again")


def tiff_failure(exc: Exception, path) -> InputError:
    """The one-line InputError for a TIFF whose pixels cannot be decoded: the codec is not
    installed (say what to install), or the data are damaged (say so)."""
    text = _short(exc)
    if isinstance(exc, MemoryError):
        return InputError(f"{path}: too large to read into this machine's memory; crop it, or read it in parts")
    if text.startswith("failed to read "):
        return InputError(f"{path}: image data end early (a file still being written, or truncated; {text}); "
                          "wait until it is complete, or copy it again")
    if isinstance(exc, ImportError) or "imagecodecs" in text:
        return InputError(f"{path}: its pixels are compressed with a method this installation cannot decode "
                          f"({text}); install the imagecodecs package (pip install imagecodecs)")
    return InputError(f"{path}: damaged image data, cannot be decoded ({type(exc).__name__}: {text}); "
                      "copy or export the file again")


def _check_codec(tif, series, path: Path) -> None:
    """Refuse, before any pixel is read, a series compressed with a codec that is not installed."""
    import tifffile

    page = series.pages[0]
    if page is None:
        return
    compression = int(page.keyframe.compression)
    if compression == 1:
        return
    try:
        codec = tifffile.TIFF.DECOMPRESSORS[compression]
        fh = tif.filehandle
        with fh.lock:
            fh.seek(page.dataoffsets[0])
            segment = fh.read(min(page.databytecounts[0], 1 << 20))
        codec(segment)
    except (ImportError, KeyError) as exc:
        raise tiff_failure(exc, path) from None
    except Exception:  # noqa: BLE001 - a partial segment or a codec needing tables: the real read decides
        pass


def available_memory() -> int | None:
    """Bytes of memory available to a new allocation (Linux MemAvailable), or None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return None


def _check_fits_in_memory(nbytes: int, path) -> None:
    """Refuse, before reading, a whole image larger than the memory available: a valid file that
    is too large for this machine is not a damaged one."""
    available = available_memory()
    if available is not None and nbytes > available:
        raise InputError(f"{path}: {nbytes / 2**30:.1f} GiB of pixels, more than the {available / 2**30:.1f} GiB "
                         "of memory available here; crop the image (a smaller field or fewer planes) or use a larger "
                         "machine")


def _tiff_series(tif, path: Path, axes_override: str | None, lazy: bool) -> list[Image]:
    ome = _ome_channel_names_and_sizes(tif.ome_metadata) if tif.is_ome else []
    images = []
    incomplete = ("holds no complete image (a file still being written, or truncated); wait until it is "
                  "complete, or copy it again")
    if not tif.series:
        raise InputError(f"{path}: {incomplete}")
    for index, series in enumerate(tif.series):
        if len(series.shape) < 2:
            raise InputError(f"{path}: series {index} {incomplete}")
        n_pixels = int(np.prod(series.shape, dtype=np.float64))
        if n_pixels == 0 or n_pixels > MAX_PIXELS:
            raise InputError(f"{path}: series {index} declares an impossible shape {tuple(series.shape)}; check the file")
        _check_extent(series, path, index)
        _check_codec(tif, series, path)
        axes = _tiff_axes(tif, series, axes_override, path)
        if lazy:
            data = DeferredArray(lambda series=series: _series_dask_array(series), tuple(series.shape), series.dtype)
        else:
            _check_fits_in_memory(n_pixels * np.dtype(series.dtype).itemsize, path)
            data = series.asarray()
            if data.size != n_pixels:
                raise InputError(f"{path}: truncated image data in series {index}; check the file")
        data, canonical = to_canonical(data, axes)
        n_channels = data.shape[canonical.index("C")]
        names, sizes = ome[index] if index < len(ome) else ([], {})
        names = _usable_names(names, n_channels, path)
        images.append(Image(data=data, axes=canonical, channel_names=tuple(names), pixel_size=sizes,
                            source=str(path), series=index))
    return images


def _series_dask_array(series):
    import dask.array as da
    import zarr

    # Level 0 of a pyramid: the full resolution, as the eager reader gives.
    return da.from_zarr(zarr.open(series.aszarr(level=0), mode="r"))


class DeferredArray:
    """The lazy (dask) array of a TIFF series, built only when its pixels are first wanted.

    Shape and dtype come from the file's metadata, and the axis moves and
    channel choices made while opening (:func:`to_canonical`,
    :meth:`Image.select_channels`) are recorded and replayed on the dask array.
    Readers that take pixels page by page (:func:`read_block`, as ``apply``
    does) then never import dask and zarr, about 0.6 s of every run. Any other
    use (indexing beyond whole axes and channel lists, ``np.asarray``, dask
    methods) builds the dask array and answers from it.
    """

    def __init__(self, build, shape: tuple, dtype, steps: tuple = ()):
        self._build, self.shape, self.dtype, self._steps = build, tuple(shape), np.dtype(dtype), steps
        self._array = None
        self._lock = threading.Lock()

    @property
    def ndim(self) -> int:
        return len(self.shape)

    def __len__(self) -> int:
        return self.shape[0]

    def transpose(self, order) -> "DeferredArray":
        order = tuple(int(i) for i in order)
        return DeferredArray(self._build, tuple(self.shape[i] for i in order), self.dtype,
                             self._steps + (("transpose", order),))

    def __getitem__(self, key):
        shape = _whole_axes_shape(self.shape, key)
        if shape is None:
            return self.materialised()[key]
        return DeferredArray(self._build, shape, self.dtype, self._steps + (("index", key),))

    def materialised(self):
        """The dask array, with the recorded steps applied."""
        with self._lock:
            if self._array is None:
                array = self._build()
                for step, argument in self._steps:
                    array = array.transpose(argument) if step == "transpose" else array[argument]
                self._array = array
            return self._array

    def __array__(self, dtype=None, copy=None):
        return np.asarray(self.materialised(), dtype=dtype)

    def __getattr__(self, name):
        if name.startswith("_"):
            raise AttributeError(name)
        return getattr(self.materialised(), name)

    def __repr__(self) -> str:
        return f"DeferredArray(shape={self.shape}, dtype={self.dtype})"


def _whole_axes_shape(shape: tuple, key) -> tuple | None:
    """The shape of ``array[key]`` for keys of new axes (None), whole axes (``:``) and, on at most
    one axis, a list of indices; None for any other key (left to the real array)."""
    key = key if isinstance(key, tuple) else (key,)
    result, axis, lists = [], 0, 0
    for item in key:
        if item is None:
            result.append(1)
        elif isinstance(item, slice) and item == slice(None):
            if axis >= len(shape):
                return None
            result.append(shape[axis])
            axis += 1
        elif isinstance(item, list) and lists == 0 and axis < len(shape) and all(
                isinstance(i, (int, np.integer)) and 0 <= i < shape[axis] for i in item):
            result.append(len(item))
            axis, lists = axis + 1, 1
        else:
            return None
    return tuple(result) + tuple(shape[axis:])


# --- OME-Zarr ---------------------------------------------------------------

def _ngff_attrs(group) -> dict:
    attrs = dict(group.attrs)
    return dict(attrs["ome"]) if "ome" in attrs else attrs  # NGFF 0.5 nests under "ome"


def _read_zarr(path: Path, axes_override: str | None, lazy: bool) -> list[Image]:
    import zarr

    try:
        root = zarr.open_group(str(path), mode="r")
        attrs = _ngff_attrs(root)
    except Exception as exc:
        raise InputError(f"{path}: not a readable OME-Zarr folder ({_short(exc)}); check the path") from None
    if "multiscales" in attrs:
        groups = [root]
    elif "bioformats2raw.layout" in attrs:
        groups = [root[key] for key in sorted((k for k in root.group_keys() if k.isdigit()), key=int)]
    else:
        raise InputError(f"{path}: zarr folder without OME-Zarr (NGFF) 'multiscales' metadata; write it as OME-Zarr")
    images = []
    for index, group in enumerate(groups):
        try:
            images.append(_read_ngff_image(group, _ngff_attrs(group), path, index, axes_override, lazy))
        except InputError:
            raise
        except Exception as exc:
            raise InputError(f"{path}: damaged OME-Zarr metadata or data ({_short(exc)}); check the folder") from None
    if not images:
        raise InputError(f"{path}: OME-Zarr folder holds no image; check the path")
    return images


def _read_ngff_image(group, attrs, path: Path, index: int, axes_override, lazy: bool) -> Image:
    import dask.array as da

    multiscale = attrs["multiscales"][0]
    dataset = multiscale["datasets"][0]
    array = group[dataset["path"]]
    if axes_override is not None:
        axes = axes_override
    else:
        axes = "".join(
            (a["name"] if isinstance(a, dict) else a).upper() for a in multiscale.get("axes", [])
        )
        if not axes:
            axes = {2: "YX", 3: "CYX"}.get(array.ndim, "")
    if len(axes) != array.ndim:
        raise InputError(
            f"{path}: axes {axes!r} do not match the array's {array.ndim} dimensions; give --axes"
        )
    try:
        check_axes(axes, "axes")
    except ValueError as exc:
        raise InputError(f"{path}: {exc}; give --axes") from None
    sizes = {}
    for transform in dataset.get("coordinateTransformations", []):
        if transform.get("type") == "scale":
            for letter, value in zip(axes, transform["scale"]):
                if letter in "XYZ":
                    sizes[letter] = float(value)
    _check_pixel_type(array.dtype, path, mask=True)  # before reading: the type must be known to numpy
    if array.nchunks > 0 and array.nchunks_initialized == 0:
        raise InputError(f"{path}: the OME-Zarr array holds no data at all (every chunk is missing); the copy is "
                         "incomplete, copy the folder again")
    if not lazy:
        _check_fits_in_memory(int(np.prod(array.shape, dtype=np.float64)) * array.dtype.itemsize, path)
    data = da.from_zarr(array) if lazy else np.asarray(array[...])
    data, canonical = to_canonical(data, axes)
    n_channels = data.shape[canonical.index("C")]
    channels = attrs.get("omero", {}).get("channels", [])
    names = _usable_names([str(ch.get("label", "")) for ch in channels], n_channels, path)
    return Image(data=data, axes=canonical, channel_names=tuple(names), pixel_size=sizes,
                 source=str(path), series=index)


# --- Reading blocks -----------------------------------------------------------

def read_block(path, series: int, key: tuple, *, channels: Sequence[str], axes: str | None = None,
               channel_names: Sequence[str] | None = None) -> np.ndarray:
    """One block of one series of an image file as a numpy array.

    `key` indexes the canonical axes (see :class:`Image`) of the image
    restricted to `channels` (names, in that order). Meant for reading a
    file block after block from many tasks: the file's metadata are parsed
    once per process, and TIFF blocks are read page by page with tifffile
    (several times faster than through the lazy dask array); other layouts
    go through the lazy array.
    """
    path = Path(path)
    stat = path.stat()
    source = _block_source(str(path), (stat.st_mtime_ns, stat.st_size), series, axes,
                           None if channel_names is None else tuple(channel_names), tuple(channels))
    return source.read(key)


def close_block_sources() -> None:
    """Close the files :func:`read_block` keeps open (call when no read is in progress)."""
    with _BLOCK_SOURCES_LOCK:
        sources = list(_BLOCK_SOURCES.values())
        _BLOCK_SOURCES.clear()
    for source in sources:
        source.close()


class _BlockSource:
    def __init__(self, image: Image, tif=None, pages: np.ndarray | None = None):
        self.image, self.tif, self.pages = image, tif, pages

    def close(self) -> None:
        if self.tif is not None:
            self.tif.close()

    def read(self, key: tuple) -> np.ndarray:
        try:
            return self._read(key)
        except (InputError, OSError):
            raise
        except Exception as exc:  # a codec missing or a damaged strip, found only now
            raise tiff_failure(exc, self.image.source) from None

    def _read(self, key: tuple) -> np.ndarray:
        rows = key[-2]
        whole_planes = rows == slice(None)
        if self.pages is not None and whole_planes:
            pages = self.pages[key]
            planes = self.tif.asarray(key=[int(i) for i in pages.ravel()], series=self.image.series, maxworkers=1)
            return planes.reshape(pages.shape[:-2] + planes.shape[-2:])
        if self.pages is not None and self._contiguous():
            # A strip of rows of uncompressed planes: only those rows are read.
            pages = self.pages[key[:-2] + (slice(None), slice(None))]
            out = [self._rows(int(i), rows) for i in pages.ravel()]
            return np.stack(out).reshape(pages.shape[:-2] + out[0].shape)
        import dask

        with dask.config.set(scheduler="synchronous"):
            return np.asarray(self.image.data[key])

    def _contiguous(self) -> bool:
        page = self.tif.series[self.image.series].pages[0].keyframe
        return bool(page.is_contiguous) and page.compression == 1 and page.dtype.kind in "uif"

    def _rows(self, index: int, rows: slice) -> np.ndarray:
        page = self.tif.series[self.image.series].pages[index]
        key = page.keyframe
        dtype = key.dtype.newbyteorder(self.tif.byteorder)
        row_bytes = int(key.shape[-1]) * dtype.itemsize
        handle = self.tif.filehandle
        with handle.lock:
            handle.seek(page.dataoffsets[0] + rows.start * row_bytes)
            data = handle.read((rows.stop - rows.start) * row_bytes)
        return np.frombuffer(data, dtype).reshape(rows.stop - rows.start, key.shape[-1]).astype(key.dtype)


# Files recently read by blocks, most recent last; `stamp` (modification time, size) is part
# of the key, so an edited file is parsed again.
_BLOCK_SOURCES: dict = {}
_BLOCK_SOURCES_LOCK = threading.Lock()
_BLOCK_SOURCES_KEPT = 8


def _block_source(*key) -> _BlockSource:
    with _BLOCK_SOURCES_LOCK:
        source = _BLOCK_SOURCES.pop(key, None)
        if source is not None:
            _BLOCK_SOURCES[key] = source
            return source
    source = _open_block_source(*key)
    with _BLOCK_SOURCES_LOCK:
        kept = _BLOCK_SOURCES.setdefault(key, source)
        # Evict the least recently used; batches read files one after another, so it is idle.
        evicted = [_BLOCK_SOURCES.pop(k) for k in list(_BLOCK_SOURCES)[:-_BLOCK_SOURCES_KEPT]]
    for old in evicted + ([source] if kept is not source else []):
        old.close()
    return kept


def _open_block_source(path: str, stamp, series: int, axes, channel_names, channels) -> _BlockSource:
    open_files: list = []
    image = read_images(path, axes=axes, channel_names=channel_names, lazy=True, _open_files=open_files)[series]
    indices = [image.channel_names.index(name) for name in channels]
    image = image.select_channels(channels)
    if not open_files:  # OME-Zarr
        return _BlockSource(image)
    tif = open_files[0]
    tif.filehandle.set_lock(True)  # tasks on several threads read through this handle
    stored = tif.series[series]
    stored_axes = _tiff_axes(tif, stored, axes, Path(path))
    page_shape = stored.pages[0].shape if len(stored.pages) else ()
    # Page by page only when every page is one Y-X plane of the series, in C order of the
    # leading dimensions (pages holding samples per pixel go through the lazy array).
    if tuple(stored.shape[-2:]) != tuple(page_shape) or len(stored.pages) != int(np.prod(stored.shape[:-2])):
        return _BlockSource(image, tif)
    pages = np.arange(len(stored.pages)).reshape(tuple(stored.shape[:-2]) + (1, 1))
    pages, canonical = to_canonical(pages, stored_axes)
    pages = np.take(pages, indices, axis=canonical.index("C"))
    return _BlockSource(image, tif, pages)


# --- Writing ----------------------------------------------------------------

def _planes(data, axes: str):
    """Yield the YX planes of `data` in C order, computing dask blocks plane by plane."""
    leading = data.shape[:-2]
    for index in np.ndindex(*leading):
        yield np.asarray(data[index])


def write_ome_tiff(path, image: Image, *, provenance: dict | None = None, compression: str | None = None) -> Path:
    """Write `image` as OME-TIFF atomically, with channel names and provenance.

    The provenance dictionary is stored as JSON in the OME ``Image/Description``
    element; physical pixel sizes are kept. Dask arrays are written plane by
    plane, so memory stays bounded by one plane.
    """
    import tifffile

    path = Path(path)
    metadata = {
        "axes": image.axes,
        "Channel": {"Name": list(image.channel_names)},
        "Name": path.name.split(".")[0],
    }
    for axis, size in image.pixel_size.items():
        metadata[f"PhysicalSize{axis}"] = float(size)
        metadata[f"PhysicalSize{axis}Unit"] = "µm"
    if provenance is not None:
        metadata["Description"] = json.dumps(provenance, sort_keys=True)
    data = image.data
    nbytes = int(np.prod(data.shape, dtype=np.float64)) * np.dtype(data.dtype).itemsize
    with atomic_output(path) as tmp:
        source = data if isinstance(data, np.ndarray) else _planes(data, image.axes)
        tifffile.imwrite(
            tmp, source, shape=data.shape, dtype=data.dtype, ome=True, metadata=metadata,
            bigtiff=nbytes > 2**31, compression=compression, photometric="minisblack",
        )
    return path


def read_provenance(path) -> dict | None:
    """The provenance stored by :func:`write_ome_tiff` or :func:`write_ome_zarr`, or None."""
    import tifffile

    if Path(path).is_dir():
        import zarr

        value = zarr.open_group(str(path), mode="r").attrs.get("unmix_provenance")
        return dict(value) if isinstance(value, dict) else None
    with tifffile.TiffFile(path) as tif:
        xml = tif.ome_metadata
    if not xml:
        return None
    root = ElementTree.fromstring(xml)
    for element in root.iter():
        if element.tag.endswith("Description") and element.text:
            try:
                return json.loads(element.text)
            except json.JSONDecodeError:
                return None
    return None


def ome_zarr_writer():
    """The ome_zarr.writer module, imported without the deprecation warning its import emits
    (a default argument built from a deprecated class), which users cannot act on."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        from ome_zarr import writer
    return writer


def write_ome_zarr(path, image: Image, *, provenance: dict | None = None, chunks=None) -> Path:
    """Write `image` as an OME-Zarr (NGFF) folder atomically, one resolution level.

    Dask arrays are written block by block (in parallel, by dask).
    """
    import zarr

    write_image = ome_zarr_writer().write_image
    path = Path(path)
    axes = [{"name": a.lower(), "type": {"T": "time", "C": "channel"}.get(a, "space")} for a in image.axes]
    scale = {a.lower(): float(image.pixel_size.get(a, 1.0)) for a in image.axes}
    units = {a.lower(): "micrometer" for a in image.axes if a in image.pixel_size}
    with atomic_output(path) as tmp:
        group = zarr.open_group(str(tmp), mode="w")
        write_image(image.data, group=group, axes=axes, scale_factors=[], scale=scale,
                    axes_units=units or None,
                    storage_options={"chunks": chunks} if chunks else None)
        ome = dict(group.attrs.get("ome", {}))
        omero = {"channels": [{"label": n, "active": True} for n in image.channel_names]}
        if "ome" in group.attrs:
            ome["omero"] = omero
            group.attrs["ome"] = ome
        else:
            group.attrs["omero"] = omero
        if provenance is not None:
            group.attrs["unmix_provenance"] = provenance
    return path


def output_stem(path) -> str:
    """The file name of `path` without its image suffix (``.ome.tif``, ``.tif``, ``.ome.zarr`` ...)."""
    name = Path(path).name
    lower = name.lower()
    for suffix in sorted(TIFF_SUFFIXES + ZARR_SUFFIXES, key=len, reverse=True):
        if lower.endswith(suffix):
            return name[: -len(suffix)]
    return name

