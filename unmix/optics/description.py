"""The description file: labels, channels (sources, filters, detectors) and acquisition.

A description (TOML, ``format = "unmix-description"``, version 1) says what
a microscope set-up is made of, so that :mod:`unmix.optics.prediction` can compute the
bleed-through it should give. The binding subset (see the README) is read
exactly as the command-line contract writes it; the extensions are:

- parametric label spectra: ``excitation = { peak_nm = 490, fwhm_nm = 45,
  skew = 1.3, shoulder = 0.2 }`` (log-normal bands, :mod:`unmix.optics.spectra`), or
  ``shape = "NAME"`` taking both spectra (and, unless given, extinction and
  quantum yield) from a ``[label_shapes.NAME]`` table;
- filters: ``{ band = "600/50" }``, ``{ bands = ["450/40", "600/50"] }``,
  ``{ longpass_nm = 500 }``, ``{ shortpass_nm = 600 }``, each with optional
  ``steepness_nm`` (10-90 % edge width), ``od`` (out-of-band blocking) and
  ``peak`` (in-band transmission); dichroics ``{ transition_nm = 505 }``;
- sources: lasers ``{ laser_nm, power_mw, bandwidth_nm }``, LEDs ``{ led_nm,
  fwhm_nm, power_mw }``, lamps ``{ lamp = "mercury" | "halogen", power_mw,
  temperature_k }`` and measured power spectra ``{ csv, power_mw }``;
- detectors: ``{ model = "camera" | "pmt" }`` (invented example curves) or
  ``{ csv, unit }``;
- units: ``unit = "energy"`` on an emission CSV, ``"radiant_sensitivity"`` on
  a detector CSV (converted, see :func:`unmix.optics.spectra.convert_unit`);
- libraries: ``[filters.NAME]``, ``[sources.NAME]``, ``[detectors.NAME]``,
  ``[label_shapes.NAME]`` tables, here or in files listed in
  ``include = [...]`` under ``[description]``; a channel then says
  ``emission_filter = "NAME"``;
- ``group = "NAME"`` per channel with ``acquisition = "grouped"``: channels of
  one group are imaged together (simultaneous within, sequential between);
  files written with the earlier names (``acquisition = "tracks"``, a
  channel's ``track``) are read as these, with a warning;
- ``grid = { start, stop, step }`` under ``[description]``: the wavelength
  grid in nm (default 300-1000 nm every 0.5 nm).

Every curve is kept as a function of wavelength, so that a laser line is
evaluated exactly at its wavelength (the contract's formula) and everything
else is integrated on the grid. Parsing uses :mod:`tomllib` (data only).
"""

from __future__ import annotations

import math
import tomllib
import warnings
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import Callable

import numpy as np

from . import spectra
from ..errors import InputError, InputWarning, read_user_text

FORMAT = "unmix-description"
VERSION = 1
ACQUISITIONS = ("simultaneous", "sequential", "grouped")
# Earlier names of the grouped mode and of a channel's group: still read, with a warning.
OLD_GROUPED, OLD_GROUP_KEY = "tracks", "track"
LIBRARIES = ("filters", "sources", "detectors", "label_shapes")

_DESCRIPTION_KEYS = {"format", "version", "acquisition", "include", "grid", "name", "notes"}
_LABEL_KEYS = {"name", "excitation", "emission", "extinction", "quantum_yield", "primary", "shape", "notes"}
_SHAPE_KEYS = {"excitation", "emission", "extinction", "quantum_yield", "notes"}
_CHANNEL_KEYS = {"name", "source", "excitation_filter", "dichroic", "emission_filter", "detector", "exposure",
                 "gain", "group", OLD_GROUP_KEY, "notes"}
_BAND_KEYS = {"peak_nm", "fwhm_nm", "skew", "shoulder", "csv", "unit"}
_FILTER_KEYS = {"csv", "band", "bands", "longpass_nm", "shortpass_nm", "transition_nm", "steepness_nm", "od",
                "peak", "unit"}
_SOURCE_KEYS = {"laser_nm", "power_mw", "bandwidth_nm", "led_nm", "fwhm_nm", "lamp", "temperature_k",
                "line_fwhm_nm", "csv", "unit"}
_DETECTOR_KEYS = {"csv", "model", "unit"}


@dataclass(frozen=True)
class Curve:
    """A curve as a function of wavelength (nm) and where it came from."""

    function: Callable[[np.ndarray], np.ndarray]
    origin: str

    def __call__(self, nm) -> np.ndarray:
        return np.asarray(self.function(np.asarray(nm, dtype=float)), dtype=float)


@dataclass(frozen=True)
class Source:
    """A light source: a line at `line_nm` (evaluated there) or a power spectrum (per nm)."""

    power_mw: float
    identity: tuple  # equal identities are the same physical source (counted once when shared)
    line_nm: float | None = None
    spectrum: Curve | None = None  # power per nm, unit area, times power_mw when used


@dataclass(frozen=True)
class LabelOptics:
    name: str
    excitation: Curve  # relative absorption, peak 1
    emission: Curve  # photons per nm (any scale; normalised to unit area on the grid)
    extinction: float
    quantum_yield: float
    primary: str | None


@dataclass(frozen=True)
class ChannelOptics:
    name: str
    source: Source
    excitation_filter: Curve | None
    dichroic: Curve | None
    emission_filter: Curve | None
    detector: Curve | None
    exposure: float
    gain: float
    group: str | None  # channels of one group are imaged together (acquisition "grouped")


@dataclass(frozen=True)
class Description:
    """A parsed description file."""

    labels: tuple[LabelOptics, ...]
    channels: tuple[ChannelOptics, ...]
    acquisition: str
    grid: spectra.Grid
    path: str
    name: str = ""

    @property
    def label_names(self) -> list[str]:
        return [label.name for label in self.labels]

    @property
    def channel_names(self) -> list[str]:
        return [channel.name for channel in self.channels]


def load_description(path) -> Description:
    """Read and validate a description file; InputError names the file and the first problem."""
    path = Path(path)
    data = _read_toml(path)
    head = _table(data.get("description"), f"{path}: [description]")
    _check_keys(head, _DESCRIPTION_KEYS, f"{path}: [description]")
    if head.get("format") != FORMAT:
        raise InputError(f"{path}: [description] format must be \"{FORMAT}\"; this is not a description file")
    if head.get("version") != VERSION:
        raise InputError(f"{path}: unsupported version {head.get('version')!r}; this tool reads version {VERSION}")
    acquisition = head.get("acquisition", "simultaneous")
    if acquisition == OLD_GROUPED:
        acquisition = "grouped"
    if acquisition not in ACQUISITIONS:
        raise InputError(f"{path}: acquisition {acquisition!r}; use one of {', '.join(ACQUISITIONS)}")
    grid = _grid(head.get("grid"), path)
    libraries = _libraries(data, path, head.get("include", []))
    unknown = set(data) - {"description", "label", "channel", *LIBRARIES}
    if unknown:
        raise InputError(f"{path}: unknown table(s) {sorted(unknown)}; allowed: description, label, channel, "
                         + ", ".join(LIBRARIES))
    parser = _Parser(path, libraries)
    channel_tables = _entries(data, "channel", path)
    label_tables = _entries(data, "label", path)
    channels = tuple(parser.channel(table, i) for i, table in enumerate(channel_tables))
    labels = tuple(parser.label(table, i) for i, table in enumerate(label_tables))
    _unique([c.name for c in channels], "channel", path)
    _unique([lab.name for lab in labels], "label", path)
    for label in labels:
        if label.primary is not None and label.primary not in {c.name for c in channels}:
            raise InputError(f"{path}: label {label.name!r} names primary channel {label.primary!r}, which is not "
                             "a [[channel]]; fix the name")
    old = ([f'acquisition = "{OLD_GROUPED}" (now "grouped")'] if head.get("acquisition") == OLD_GROUPED else []) + (
        [f"a channel's '{OLD_GROUP_KEY}' (now 'group')"] if any(OLD_GROUP_KEY in t for t in channel_tables) else [])
    if old:
        warnings.warn(f"{path}: read {' and '.join(old)}, earlier names of the same thing; rename them in the file",
                      InputWarning, stacklevel=2)
    if acquisition == "grouped" and not any(c.group for c in channels):
        raise InputError(f"{path}: acquisition \"grouped\" but no channel has a group; give group = \"NAME\" per "
                         "channel")
    return Description(labels, channels, acquisition, grid, str(path), str(head.get("name", "")))


def with_channel_parts(description: Description, channel: str, parts: dict, where: str) -> Description:
    """The description with some parts of one channel replaced, each given as an inline table
    as in a description file (e.g. ``{"emission_filter": {"band": "580/70"}}``): a set-up as
    built rather than as described."""
    from dataclasses import replace

    if channel not in description.channel_names:
        raise InputError(f"{where}: no channel {channel!r} in {description.path}")
    parser = _Parser(Path(description.path), {kind: {} for kind in LIBRARIES})
    builders = {"excitation_filter": parser.filter, "dichroic": parser.filter, "emission_filter": parser.filter,
                "detector": parser.detector, "source": parser.source}
    unknown = sorted(set(parts) - set(builders))
    if unknown:
        raise InputError(f"{where}: cannot replace {unknown} of a channel; give {', '.join(builders)}")
    index = description.channel_names.index(channel)
    changed = replace(description.channels[index], **{part: builders[part](table, f"{where} {part}")
                                                      for part, table in parts.items()})
    channels = description.channels[:index] + (changed,) + description.channels[index + 1:]
    return replace(description, channels=channels)


# --- parsing helpers --------------------------------------------------------------

def _read_toml(path: Path) -> dict:
    text = read_user_text(path, "description file", "give a UTF-8 TOML file")
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc}); fix the file") from None
    except RecursionError:
        raise InputError(f"{path}: tables or arrays nested too deeply to read; fix the file") from None


def _table(value, where: str) -> dict:
    if not isinstance(value, dict):
        raise InputError(f"{where}: missing or not a table; see the description format in the README")
    return value


def _entries(data: dict, key: str, path: Path) -> list[dict]:
    value = data.get(key)
    if not isinstance(value, list) or not value or not all(isinstance(v, dict) for v in value):
        raise InputError(f"{path}: give at least one [[{key}]] table")
    return value


def _check_keys(table: dict, allowed: set, where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise InputError(f"{where}: unknown key(s) {unknown}; allowed: {', '.join(sorted(allowed))}")


def _unique(names: list[str], kind: str, path: Path) -> None:
    seen = set()
    for name in names:
        if name in seen:
            raise InputError(f"{path}: {kind} {name!r} is described twice; give each {kind} once")
        seen.add(name)


def _number(table: dict, key: str, where: str, default=None, positive=True, upper=None) -> float:
    value = table.get(key, default)
    if value is None:
        raise InputError(f"{where}: '{key}' is missing; give it")
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not _finite(value):
        raise InputError(f"{where}: '{key}' must be a finite number of sensible size, not {value!r}")
    if positive and not value > 0:
        raise InputError(f"{where}: '{key}' must be positive, not {value!r}")
    if upper is not None and value > upper:
        raise InputError(f"{where}: '{key}' must be at most {upper}, not {value!r}")
    return float(value)


def _finite(value) -> bool:
    try:
        return math.isfinite(float(value))
    except OverflowError:  # an integer too large for a float
        return False


def _grid(value, path: Path) -> spectra.Grid:
    if value is None:
        return spectra.Grid()
    where = f"{path}: [description] grid"
    table = _table(value, where)
    _check_keys(table, {"start", "stop", "step"}, where)
    start = spectra.check_wavelength(table.get("start", 300.0), where)
    stop = spectra.check_wavelength(table.get("stop", 1000.0), where)
    step = _number(table, "step", where, default=spectra.DEFAULT_STEP_NM, upper=10.0)
    if stop <= start:
        raise InputError(f"{where}: stop must be above start")
    if step < spectra.MIN_STEP_NM:
        raise InputError(f"{where}: step {step:g} nm is finer than {spectra.MIN_STEP_NM:g} nm; spectra are not "
                         "known that finely, give a larger step")
    return spectra.Grid(start, stop, step)


def _libraries(data: dict, path: Path, include) -> dict:
    """Named filters, sources, detectors and label shapes from this file and its includes."""
    if not isinstance(include, list) or not all(isinstance(i, str) for i in include):
        raise InputError(f"{path}: [description] include must be a list of file names")
    libraries = {kind: {} for kind in LIBRARIES}
    for name in include:
        library_path = (path.parent / name)
        library = _read_toml(library_path)
        unknown = set(library) - set(LIBRARIES)
        if unknown:
            raise InputError(f"{library_path}: a library holds only {', '.join(LIBRARIES)} tables, not {sorted(unknown)}")
        for kind in LIBRARIES:
            for key, value in _table(library.get(kind, {}), f"{library_path}: [{kind}]").items():
                libraries[kind][key] = (value, library_path)
    for kind in LIBRARIES:
        for key, value in _table(data.get(kind, {}), f"{path}: [{kind}]").items():
            libraries[kind][key] = (value, path)
    return libraries


class _Parser:
    def __init__(self, path: Path, libraries: dict):
        self.path, self.libraries = path, libraries

    def _resolve(self, value, kind: str, where: str) -> tuple[dict, Path]:
        """A table given inline, or the name of one in a library (with the file it came from)."""
        if isinstance(value, str):
            if value not in self.libraries[kind]:
                known = ", ".join(sorted(self.libraries[kind])) or "none"
                raise InputError(f"{where}: no [{kind}.{value}] in this file or its includes (known: {known})")
            table, origin = self.libraries[kind][value]
            return _table(table, f"{origin}: [{kind}.{value}]"), origin
        return _table(value, where), self.path

    def _csv(self, table: dict, origin: Path, where: str, transmission: bool) -> Curve:
        spectrum = spectra.read_spectrum_csv(origin.parent / str(table["csv"]), transmission=transmission)
        unit = table.get("unit", "relative")
        if unit not in spectra.UNITS:
            raise InputError(f"{where}: unknown unit {unit!r}; use one of {', '.join(spectra.UNITS)}")
        function = spectrum.on if unit in spectra.NATIVE_UNITS else _converted(spectrum.on, unit, where)
        return Curve(function, str(origin.parent / str(table["csv"])))

    def _named(self, table: dict, index: int, kind: str, allowed: set) -> tuple[str, str]:
        """Where a [[label]] or [[channel]] table is (for messages), and its checked name."""
        where = f"{self.path}: [[{kind}]] {table.get('name', index + 1)!r}"
        _check_keys(table, allowed, where)
        name = table.get("name")
        if not isinstance(name, str) or not name.strip():
            raise InputError(f"{where}: give the {kind} a name" + (" (the image channel name)" if kind == "channel" else ""))
        return where, name

    # --- labels

    def band(self, value, where: str, toward: str) -> Curve:
        table, origin = _table(value, where), self.path
        _check_keys(table, _BAND_KEYS, where)
        if "csv" in table:
            return self._csv(table, origin, where, transmission=False)
        peak = spectra.check_wavelength(table.get("peak_nm"), f"{where} peak_nm")
        fwhm = _number(table, "fwhm_nm", where, upper=400.0)
        skew = _number(table, "skew", where, default=1.3)
        if skew <= 1.0:
            raise InputError(f"{where}: skew must be above 1 (1.3 is typical), not {skew}")
        shoulder = _number(table, "shoulder", where, default=0.0, positive=False, upper=1.0)
        if shoulder < 0:
            raise InputError(f"{where}: shoulder must be between 0 and 1")
        band = partial(spectra.label_band, peak_nm=peak, fwhm_nm=fwhm, skew=skew, toward=toward, shoulder=shoulder)
        if toward == "red":  # emission: photons per nm
            return Curve(lambda nm: spectra.photon_density(band(nm), nm), f"log-normal {peak:g}/{fwhm:g} nm")
        return Curve(band, f"log-normal {peak:g}/{fwhm:g} nm")

    def label(self, table: dict, index: int) -> LabelOptics:
        where, name = self._named(table, index, "label", _LABEL_KEYS)
        shape = {}
        if "shape" in table:
            shape, _ = self._resolve(str(table["shape"]), "label_shapes", where)
            _check_keys(shape, _SHAPE_KEYS, f"{where} shape {table['shape']!r}")
        merged = {**shape, **{k: v for k, v in table.items() if k != "shape"}}
        for key in ("excitation", "emission"):
            if key not in merged:
                raise InputError(f"{where}: '{key}' is missing; give a spectrum (csv or peak_nm/fwhm_nm) or a shape")
        excitation = self.band(merged["excitation"], f"{where} excitation", toward="blue")
        emission = self.band(merged["emission"], f"{where} emission", toward="red")
        extinction = _number(merged, "extinction", where, upper=1e7)
        quantum_yield = _number(merged, "quantum_yield", where, upper=1.0)
        primary = table.get("primary")
        if primary is not None and not isinstance(primary, str):
            raise InputError(f"{where}: primary must be a channel name")
        peak_check = excitation(np.linspace(spectra.MIN_NM, spectra.MAX_NM, 2001))
        if peak_check.max() <= 0:
            raise InputError(f"{where}: the excitation spectrum is 0 everywhere; give the measured curve")
        return LabelOptics(name, excitation, emission, extinction, quantum_yield, primary)

    # --- channels

    def filter(self, value, where: str) -> Curve | None:
        if value is None:
            return None
        table, origin = self._resolve(value, "filters", where)
        _check_keys(table, _FILTER_KEYS, where)
        if "csv" in table:
            return self._csv(table, origin, where, transmission=True)
        steepness = _number(table, "steepness_nm", where, default=spectra.DEFAULT_EDGE_NM, upper=100.0)
        od = _number(table, "od", where, default=spectra.DEFAULT_BLOCKING_OD, upper=12.0)
        peak = _number(table, "peak", where, default=spectra.DEFAULT_PEAK_TRANSMISSION, upper=1.0)
        given = [k for k in ("band", "bands", "longpass_nm", "shortpass_nm", "transition_nm") if k in table]
        if len(given) != 1:
            raise InputError(f"{where}: give exactly one of csv, band, bands, longpass_nm, shortpass_nm, "
                             "transition_nm")
        key = given[0]
        common = {"edge_nm": steepness, "od": od, "peak": peak}
        if key == "band":
            centre, width = spectra.parse_band(table["band"], where)
            return Curve(partial(spectra.bandpass, centre=centre, width=width, **common), f"band-pass {table['band']}")
        if key == "bands":
            if not isinstance(table["bands"], list) or not table["bands"]:
                raise InputError(f"{where}: bands must be a list of \"centre/width\" strings")
            bands = [spectra.parse_band(b, where) for b in table["bands"]]
            return Curve(partial(spectra.multiband, bands=bands, **common), f"multi-band {table['bands']}")
        edge = spectra.check_wavelength(table[key], f"{where} {key}")
        function = {"longpass_nm": spectra.longpass, "shortpass_nm": spectra.shortpass,
                    "transition_nm": spectra.dichroic}[key]
        if key == "transition_nm" and "od" not in table:
            common["od"] = 2.0  # a dichroic is no blocking filter
        return Curve(partial(function, edge=edge, **common), f"{key.split('_')[0]} {edge:g} nm")

    def source(self, value, where: str) -> Source:
        table, origin = self._resolve(value, "sources", where)
        _check_keys(table, _SOURCE_KEYS, where)
        power = _number(table, "power_mw", where, default=1.0, upper=1e4)
        if "laser_nm" in table:
            line = spectra.check_wavelength(table["laser_nm"], f"{where} laser_nm")
            if "bandwidth_nm" in table:
                width = _number(table, "bandwidth_nm", where, upper=50.0)
                return Source(power, ("laser", line, power, width),
                              spectrum=Curve(partial(spectra.gaussian_line, centre=line, fwhm=width),
                                             f"laser {line:g} nm"))
            return Source(power, ("laser", line, power), line_nm=line)
        if "led_nm" in table:
            centre = spectra.check_wavelength(table["led_nm"], f"{where} led_nm")
            width = _number(table, "fwhm_nm", where, default=20.0, upper=200.0)
            return Source(power, ("led", centre, width, power),
                          spectrum=Curve(partial(spectra.gaussian_line, centre=centre, fwhm=width), f"LED {centre:g} nm"))
        if "lamp" in table:
            lamp = table["lamp"]
            if lamp == "mercury":
                width = _number(table, "line_fwhm_nm", where, default=2.0, upper=20.0)
                curve = Curve(partial(spectra.mercury_arc, line_fwhm=width), "mercury arc")
            elif lamp == "halogen":
                temperature = _number(table, "temperature_k", where, default=3100.0, upper=6000.0)
                curve = Curve(partial(_unit_area_planck, temperature_k=temperature), f"halogen {temperature:g} K")
            else:
                raise InputError(f"{where}: lamp {lamp!r}; use mercury or halogen")
            return Source(power, ("lamp", lamp, power, str(sorted(table.items()))), spectrum=curve)
        if "csv" in table:
            curve = self._csv(table, origin, where, transmission=False)
            return Source(power, ("csv", curve.origin, power), spectrum=curve)
        raise InputError(f"{where}: give laser_nm, led_nm, lamp or csv for the source")

    def detector(self, value, where: str) -> Curve | None:
        if value is None:
            return None
        table, origin = self._resolve(value, "detectors", where)
        _check_keys(table, _DETECTOR_KEYS, where)
        if "csv" in table:
            curve = self._csv(table, origin, where, transmission=table.get("unit", "qe") != "radiant_sensitivity")
            return curve
        model = table.get("model")
        if model not in ("camera", "pmt"):
            raise InputError(f"{where}: detector model {model!r}; use camera or pmt (invented examples) or csv")
        return Curve(partial(spectra.example_detector_qe, model=model), f"example {model}")

    def channel(self, table: dict, index: int) -> ChannelOptics:
        where, name = self._named(table, index, "channel", _CHANNEL_KEYS)
        if "source" not in table:
            raise InputError(f"{where}: 'source' is missing; give e.g. {{ laser_nm = 488.0, power_mw = 3.0 }}")
        if "group" in table and OLD_GROUP_KEY in table:
            raise InputError(f"{where}: both 'group' and '{OLD_GROUP_KEY}' (its earlier name); keep 'group'")
        group = table.get("group", table.get(OLD_GROUP_KEY))
        if group is not None and not isinstance(group, str):
            raise InputError(f"{where}: group must be a name")
        if "emission_filter" not in table:
            raise InputError(f"{where}: 'emission_filter' is missing; give a csv or e.g. {{ band = \"525/50\" }}")
        return ChannelOptics(
            name=name, source=self.source(table["source"], f"{where} source"),
            excitation_filter=self.filter(table.get("excitation_filter"), f"{where} excitation_filter"),
            dichroic=self.filter(table.get("dichroic"), f"{where} dichroic"),
            emission_filter=self.filter(table["emission_filter"], f"{where} emission_filter"),
            detector=self.detector(table.get("detector"), f"{where} detector"),
            exposure=_number(table, "exposure", where, default=1.0, upper=1e6),
            gain=_number(table, "gain", where, default=1.0, upper=1e6),
            group=group,
        )


def _unit_area_planck(nm, temperature_k):
    return spectra.halogen_lamp(nm, temperature_k)


def _converted(function, unit: str, where: str):
    def converted(nm):
        return spectra.convert_unit(function(nm), nm, unit, where)

    return converted
