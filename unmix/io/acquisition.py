"""Acquisition settings from OME metadata: read, combine over controls, compare with samples.

A bleed-through matrix holds only for images acquired with the settings of
its controls: exposure, detector gain or voltage, offset, light-source power
and attenuation, pinhole, binning, detector type, bit depth. Microscopes
write these into the OME metadata (OME-XML in an OME-TIFF, or the
``OME/METADATA.ome.xml`` beside the arrays of a converted OME-Zarr).
This module reads them per channel, in fixed units, as plain JSON values so
that the matrix file can store them, and compares a sample's with the
matrix's. Nothing here knows about bleed-through: the callers decide what a
difference means.

Settings per channel (a key is present only where the file gives it):

=====================  ==========================================================
``exposure_s``         Plane ExposureTime of the channel's first plane, seconds
``detector_gain``      DetectorSettings Gain
``detector_voltage_V`` DetectorSettings Voltage, volts
``detector_offset``    DetectorSettings Offset
``binning``            DetectorSettings Binning (e.g. ``2x2``)
``readout_rate_MHz``   DetectorSettings ReadOutRate, MHz
``detector_type``      the referenced Detector's Type (the detector's mode: PMT, hybrid,
                       CCD, EMCCD, CMOS ...)
``light_power_mW``     the referenced light source's Power, mW
``light_attenuation``  LightSourceSettings Attenuation (fraction transmitted)
``excitation_nm``      LightSourceSettings Wavelength, else Channel ExcitationWavelength, nm
``emission_nm``        Channel EmissionWavelength, nm
``pinhole_um``         Channel PinholeSize, micrometres
``nd_filter``          Channel NDFilter
``acquisition_mode``   Channel AcquisitionMode
=====================  ==========================================================

and per image ``bit_depth`` (Pixels SignificantBits) and ``pixel_type``.

References
----------
.. [1] Open Microscopy Environment, OME Data Model and XML schema 2016-06,
   https://www.openmicroscopy.org/Schemas/ (element and attribute names).
"""

from __future__ import annotations

import math
import warnings
import xml.etree.ElementTree as ElementTree
from pathlib import Path
from typing import Sequence

from ..errors import InputError, InputWarning

# Unit factors to the unit each setting is stored in (OME unit symbols).
_TIME = {"s": 1.0, "ms": 1e-3, "µs": 1e-6, "us": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0}
_LENGTH_UM = {"µm": 1.0, "um": 1.0, "nm": 1e-3, "mm": 1e3, "cm": 1e4, "m": 1e6, "pm": 1e-6}
_WAVELENGTH_NM = {"nm": 1.0, "µm": 1e3, "um": 1e3, "pm": 1e-3, "Å": 0.1, "m": 1e9}
_POWER_MW = {"mW": 1.0, "W": 1e3, "µW": 1e-3, "uW": 1e-3, "nW": 1e-6, "kW": 1e6}
_VOLTAGE_V = {"V": 1.0, "mV": 1e-3, "kV": 1e3}
_FREQUENCY_MHZ = {"MHz": 1.0, "kHz": 1e-3, "Hz": 1e-6, "GHz": 1e3}
_LIGHT_SOURCES = ("Laser", "Arc", "Filament", "LightEmittingDiode", "GenericExcitationSource")
# Numbers that differ by less than this, relatively, are the same setting (rounding in metadata
# writers; common practice).
RELATIVE_TOLERANCE = 1e-3


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _children(element, name: str):
    return [child for child in element if _local(child.tag) == name]


def _number(element, attribute: str, units: dict | None = None, default_unit: str | None = None):
    """An attribute as a number in the stored unit; a string when the unit is unknown; None if absent."""
    value = element.get(attribute)
    if value is None:
        return None
    try:
        number = float(value)
    except ValueError:
        return value.strip() or None
    if not math.isfinite(number):
        return None
    if units is None:
        return number
    unit = element.get(f"{attribute}Unit", default_unit)
    if unit not in units:
        return f"{value} {unit}"
    return number * units[unit]


def _text(element, attribute: str):
    value = element.get(attribute)
    return value.strip() if value and value.strip() else None


def parse_ome_settings(ome_xml: str, series: int = 0, channel_names: Sequence[str] | None = None) -> dict | None:
    """Acquisition settings of one OME Image (the `series`-th) from OME-XML text; None without any.

    Returns ``{"channels": {name: {setting: value}}, "image": {setting: value}}``.
    Channels are named by `channel_names` when given (in the file's channel
    order), else by the OME Channel names, else ``ch0``, ``ch1``, ...
    """
    try:
        root = ElementTree.fromstring(ome_xml)
    except ElementTree.ParseError:
        return None
    instruments = {}
    for instrument in (e for e in root.iter() if _local(e.tag) == "Instrument"):
        for element in instrument:
            if element.get("ID"):
                instruments[element.get("ID")] = element
    images = [e for e in root if _local(e.tag) == "Image"]
    if not 0 <= series < len(images):
        return None
    pixels = next(iter(_children(images[series], "Pixels")), None)
    if pixels is None:
        return None
    image = {}
    bits = _number(pixels, "SignificantBits")
    if isinstance(bits, float):
        image["bit_depth"] = int(bits)
    if _text(pixels, "Type"):
        image["pixel_type"] = _text(pixels, "Type")
    channels = _children(pixels, "Channel")
    planes = _children(pixels, "Plane")
    names = list(channel_names) if channel_names is not None and len(channel_names) == len(channels) else [
        c.get("Name") or f"ch{i}" for i, c in enumerate(channels)]
    result = {}
    for index, (name, channel) in enumerate(zip(names, channels)):
        values = {}
        plane = next((p for p in planes if p.get("TheC", "0") == str(index) and p.get("ExposureTime")), None)
        if plane is not None:
            values["exposure_s"] = _number(plane, "ExposureTime", _TIME, "s")
        detector = next(iter(_children(channel, "DetectorSettings")), None)
        if detector is not None:
            values["detector_gain"] = _number(detector, "Gain")
            values["detector_voltage_V"] = _number(detector, "Voltage", _VOLTAGE_V, "V")
            values["detector_offset"] = _number(detector, "Offset")
            values["binning"] = _text(detector, "Binning")
            values["readout_rate_MHz"] = _number(detector, "ReadOutRate", _FREQUENCY_MHZ, "MHz")
            described = instruments.get(detector.get("ID"))
            if described is not None:
                values["detector_type"] = _text(described, "Type")
        light = next(iter(_children(channel, "LightSourceSettings")), None)
        if light is not None:
            values["light_attenuation"] = _number(light, "Attenuation")
            values["excitation_nm"] = _number(light, "Wavelength", _WAVELENGTH_NM, "nm")
            source = instruments.get(light.get("ID"))
            if source is not None and _local(source.tag) in _LIGHT_SOURCES:
                values["light_power_mW"] = _number(source, "Power", _POWER_MW, "mW")
        if values.get("excitation_nm") is None:
            values["excitation_nm"] = _number(channel, "ExcitationWavelength", _WAVELENGTH_NM, "nm")
        values["emission_nm"] = _number(channel, "EmissionWavelength", _WAVELENGTH_NM, "nm")
        values["pinhole_um"] = _number(channel, "PinholeSize", _LENGTH_UM, "µm")
        values["nd_filter"] = _number(channel, "NDFilter")
        values["acquisition_mode"] = _text(channel, "AcquisitionMode")
        values = {key: value for key, value in values.items() if value is not None}
        if values:
            result[str(name)] = values
    if not result and not (set(image) - {"pixel_type"}):
        return None
    return {"channels": result, "image": image}


def _ome_xml(path: Path) -> str | None:
    if path.is_dir():
        companion = path / "OME" / "METADATA.ome.xml"
        try:
            return companion.read_text(encoding="utf-8") if companion.is_file() else None
        except (OSError, UnicodeDecodeError):
            return None
    import tifffile

    try:
        with tifffile.TiffFile(path) as tif:
            return tif.ome_metadata if tif.is_ome else None
    except Exception:  # noqa: BLE001 - unreadable files are refused by the image reader, not here
        return None


def read_settings(path, *, series: int = 0, channel_names: Sequence[str] | None = None) -> dict | None:
    """Acquisition settings of one image file (OME-TIFF, or OME-Zarr with OME-XML), or None without any.

    The result is plain JSON: ``{"source": file name, "channels": {...}, "image": {...}}``
    (see the module docstring for the settings and their units).
    """
    path = Path(path)
    text = _ome_xml(path)
    settings = parse_ome_settings(text, series, channel_names) if text else None
    if settings is None:
        return None
    return {"source": path.name, **settings}


def _same(a, b) -> bool:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return abs(a - b) <= RELATIVE_TOLERANCE * max(abs(a), abs(b))
    return str(a).strip().lower() == str(b).strip().lower()


def _shown(value) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


def differences(reference: dict, other: dict, channels: Sequence[str] | None = None) -> list[tuple]:
    """(channel or None for the image, setting, reference value, other value) for every setting that
    both give and that differs; channels matched by name (only `channels`, when given)."""
    found = []
    for key in sorted(set(reference.get("image", {})) & set(other.get("image", {}))):
        if not _same(reference["image"][key], other["image"][key]):
            found.append((None, key, reference["image"][key], other["image"][key]))
    ours, theirs = reference.get("channels", {}), other.get("channels", {})
    for name in (channels if channels is not None else list(ours)):
        if name not in ours or name not in theirs:
            continue
        for key in sorted(set(ours[name]) & set(theirs[name])):
            if not _same(ours[name][key], theirs[name][key]):
                found.append((name, key, ours[name][key], theirs[name][key]))
    return found


def describe(difference: tuple, reference_name: str, other_name: str) -> str:
    """One line: which setting differs and both values."""
    channel, key, ours, theirs = difference
    where = f"channel {channel} " if channel is not None else ""
    return f"{where}{key} is {_shown(theirs)} in {other_name} but {_shown(ours)} in {reference_name}"


def combine_settings(paths: Sequence, roles: Sequence[str], *, channel_names: Sequence[str] | None = None
                     ) -> dict | None:
    """The controls' settings for the matrix file: those of the first file that has any, and a
    warning line for every setting in which another control differs from it. Files without
    metadata are listed under ``"missing"`` and said once; None when no file has any."""
    read = [(Path(path), role, read_settings(path, channel_names=channel_names)) for path, role in zip(paths, roles)]
    found = [(path, role, settings) for path, role, settings in read if settings is not None]
    missing = [path.name for path, _, settings in read if settings is None]
    if not found:
        if missing:
            warnings.warn(f"no acquisition settings in the OME metadata of the controls ({', '.join(missing)}): the "
                          "samples' settings cannot be compared with them later", InputWarning, stacklevel=2)
        return None
    first_path, _, reference = found[0]
    for path, role, settings in found[1:]:
        for difference in differences(reference, settings):
            warnings.warn(f"{path}: acquisition settings differ between controls ({role}): "
                          f"{describe(difference, first_path.name, path.name)}; image every control with the "
                          "samples' settings", InputWarning, stacklevel=2)
    if missing:
        warnings.warn(f"no acquisition settings in the OME metadata of {', '.join(missing)}: not compared with "
                      "the other controls", InputWarning, stacklevel=2)
    return {**reference, "missing": missing}


def check_settings(reference: dict | None, inputs: Sequence, *, strict: bool = False, reference_name: str = "the matrix",
                   channels: Sequence[str] | None = None, channel_names: Sequence[str] | None = None) -> list[str]:
    """Compare each input's acquisition settings with the matrix's (`reference`, from its provenance).

    Every difference is one warning line naming the setting and both values;
    with `strict` the first is an InputError instead (naming the file), and
    so is metadata missing on either side (nothing can be verified then).
    Inputs without metadata, or a matrix without settings, are said once.
    Returns the difference lines.
    """
    if not reference or not reference.get("channels") and not reference.get("image"):
        message = (f"{reference_name}: records no acquisition settings (its controls had no OME acquisition "
                   "metadata): the inputs' settings cannot be compared with the controls'")
        if strict:
            raise InputError(f"{message}; drop --strict-settings or measure the matrix from OME files")
        warnings.warn(message, InputWarning, stacklevel=2)
        return []
    lines, missing = [], []
    for path in inputs:
        settings = read_settings(path, channel_names=channel_names)
        if settings is None:
            missing.append(Path(path).name)
            continue
        for difference in differences(reference, settings, channels):
            line = f"{path}: acquisition settings differ from the controls': " + describe(
                difference, reference_name, Path(path).name)
            if strict:
                raise InputError(f"{line}; image with the controls' settings or measure a matrix for these "
                                 "(--strict-settings)")
            lines.append(line)
            warnings.warn(f"{line}; the matrix may not hold for it", InputWarning, stacklevel=2)
    if missing:
        message = (f"no acquisition settings in the OME metadata of {', '.join(missing)}: not compared with "
                   f"{reference_name}'s")
        if strict:
            raise InputError(f"{missing[0]}: {message}; drop --strict-settings to go on without the check")
        warnings.warn(message, InputWarning, stacklevel=2)
    return lines
