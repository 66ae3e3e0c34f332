"""Spectra on a common wavelength grid: measured curves from CSV and parametric shapes.

Everything the spectral model multiplies and integrates is sampled on one
wavelength grid (nm), so that a prediction is a handful of array products
over (labels or channels) x wavelengths and never a loop over wavelengths.

Units (the description file's contract): emission spectra are photon spectra
(quanta per nm), detector curves quantum efficiency (electrons per photon),
filter and dichroic curves transmission (0..1), excitation spectra relative
absorption. Sources are power spectra (mW per nm); the photon flux they give
is proportional to power x wavelength (photon energy hc / lambda). Curves in
other units are converted only when their unit is stated
(:func:`convert_unit`), never silently.

Parametric shapes:

- label bands: the log-normal band of Siano & Metzler (1969), defined on the
  wavenumber axis, with an optional vibronic shoulder;
- filters: band-pass from "centre/width" (full width at half transmission),
  long-pass, short-pass, multi-band, and dichroic mirrors (reflect below the
  edge, transmit above), each with an edge steepness and out-of-band
  blocking given as optical density (OD 6 = 1e-6 transmission, common
  practice);
- sources: laser lines (optionally with a bandwidth), LED bands, the mercury
  arc line spectrum (line positions from the NIST Atomic Spectra Database)
  and a halogen lamp from Planck's law;
- detector quantum-efficiency curves: invented camera-like and
  photomultiplier-like examples (not any real device; use measured curves
  for quantitative work).

References
----------
.. [1] D. B. Siano and D. E. Metzler, "Band shapes of the electronic spectra
   of complex molecules", J. Chem. Phys. 51:1856-1861 (1969).
.. [2] NIST Atomic Spectra Database, mercury (Hg I) lines.
.. [3] M. Planck (1901), Ann. Phys. 309:553; the spectral radiance
   B(lambda, T) = 2 h c^2 / lambda^5 / (exp(h c / (lambda k T)) - 1).
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, read_user_text

# Wavelengths a description may use (nm): the span of fluorescence microscopy
# optics, ultraviolet to near infrared (common practice).
MIN_NM, MAX_NM = 200.0, 1200.0
DEFAULT_STEP_NM = 0.5
# The finest wavelength grid accepted: finer steps only cost memory (common practice: published
# spectra are tabulated every 0.5-1 nm).
MIN_STEP_NM = 0.01
# Units a curve may be stated in; the first four are the description's own.
NATIVE_UNITS = ("relative", "photons", "qe", "transmission")
UNITS = NATIVE_UNITS + ("energy", "radiant_sensitivity")
# Mercury arc lines, nm (NIST Atomic Spectra Database). Relative intensities of
# a typical short-arc lamp: (from memory, approximate).
MERCURY_LINES_NM = (365.0, 404.7, 435.8, 546.1, 577.0, 579.1)
MERCURY_RELATIVE_INTENSITY = (0.9, 0.45, 0.85, 1.0, 0.45, 0.5)
# Edge steepness of interference filters when none is given: 10-90 % rise over
# this many nm (common practice for hard-coated filters).
DEFAULT_EDGE_NM = 3.0
DEFAULT_BLOCKING_OD = 6.0
DEFAULT_PEAK_TRANSMISSION = 0.95
# Vibronic progression spacing of organic dyes, wavenumbers (from memory, approximate).
VIBRONIC_SPACING_PER_CM = 1300.0
_LOGISTIC_10_90 = 2.0 * np.log(9.0)  # 10-90 % width of a unit logistic


@dataclass(frozen=True)
class Grid:
    """A uniform wavelength grid, nm."""

    start: float = 300.0
    stop: float = 1000.0
    step: float = DEFAULT_STEP_NM

    @property
    def nm(self) -> np.ndarray:
        count = int(round((self.stop - self.start) / self.step)) + 1
        return self.start + self.step * np.arange(count)

    def integrate(self, values: np.ndarray, axis: int = -1) -> np.ndarray:
        """Integral over wavelength (trapezoid rule on the uniform grid)."""
        values = np.asarray(values, dtype=float)
        total = values.sum(axis=axis) - 0.5 * (np.take(values, 0, axis=axis) + np.take(values, -1, axis=axis))
        return total * self.step


@dataclass(frozen=True)
class Spectrum:
    """A tabulated curve: wavelengths (nm, strictly increasing) and values."""

    wavelength: np.ndarray
    value: np.ndarray
    name: str = ""

    def on(self, nm: np.ndarray) -> np.ndarray:
        """Linear interpolation onto `nm`, 0 outside the tabulated range (the contract's rule)."""
        return np.interp(nm, self.wavelength, self.value, left=0.0, right=0.0)


# --- measured curves ----------------------------------------------------------

def read_spectrum_csv(path, *, transmission: bool = False) -> Spectrum:
    """Read a two-column CSV spectrum: wavelength in nm, value; optional header line.

    Separators: comma, semicolon, tab or spaces. A value column whose maximum
    exceeds 1.5 is read as percent. With `transmission` (filters, dichroics,
    detector efficiency) values must lie in 0..1 after that conversion.

    Raises
    ------
    InputError
        Naming the file (and line) and what to fix.
    """
    path = Path(path)
    text = read_user_text(path, "spectrum file", "give a two-column text CSV", encoding="utf-8-sig")
    rows = []
    first = _first_line(text)  # once: calling it per line made reading quadratic in the row count
    for number, line in enumerate(text.splitlines(), start=1):
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        fields = [f for f in re.split(r"[,;\t ]+", line) if f]
        if number == first and not all(_is_number(f) for f in fields):
            continue  # the optional header line
        if len(fields) != 2:
            raise InputError(f"{path}: line {number} has {len(fields)} columns; give wavelength (nm) and value")
        if not all(_is_number(f) for f in fields):
            raise InputError(f"{path}: line {number} is not two numbers ({', '.join(fields)}); "
                             "give wavelength (nm) and value")
        pair = (float(fields[0]), float(fields[1]))
        if not np.all(np.isfinite(pair)):
            raise InputError(f"{path}: line {number} holds a non-finite number; give finite values")
        rows.append(pair)
    if len(rows) < 2:
        raise InputError(f"{path}: a spectrum needs at least two points; give the whole curve")
    table = np.asarray(rows)
    wavelength, value = table[:, 0], table[:, 1]
    steps = np.diff(wavelength)
    if np.any(steps == 0):
        repeated = wavelength[1:][steps == 0][0]
        raise InputError(f"{path}: wavelength {repeated:g} nm appears twice; give each wavelength once")
    if np.any(steps < 0):
        raise InputError(f"{path}: wavelengths are not increasing; sort the rows by wavelength")
    if wavelength[0] < MIN_NM or wavelength[-1] > MAX_NM:
        raise InputError(f"{path}: wavelengths {wavelength[0]:g}-{wavelength[-1]:g} nm leave {MIN_NM:g}-{MAX_NM:g} nm; "
                         "give wavelengths in nm")
    if np.any(value < 0):
        raise InputError(f"{path}: negative values; a spectrum is never below 0")
    if value.max() > 1.5:
        value = value / 100.0  # percent (the contract's rule)
    if transmission and value.max() > 1.0 + 1e-9:
        raise InputError(f"{path}: transmission or efficiency above 100 %; check the values or their unit")
    if value.max() <= 0:
        raise InputError(f"{path}: every value is 0; give the measured curve")
    return Spectrum(wavelength, value, path.name)


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _first_line(text: str) -> int:
    for number, line in enumerate(text.splitlines(), start=1):
        if line.strip() and not line.strip().startswith("#"):
            return number
    return 0


def convert_unit(values: np.ndarray, nm: np.ndarray, unit: str, where: str) -> np.ndarray:
    """Convert a curve to the description's units, by its stated `unit`.

    - ``"photons"``, ``"qe"``, ``"transmission"``, ``"relative"``: as they are;
    - ``"energy"``: an energy spectrum (W per nm) to photons per nm, x lambda / (h c);
    - ``"radiant_sensitivity"``: a detector's A/W to quantum efficiency,
      QE = S h c / (e lambda).
    """
    from scipy import constants

    if unit in NATIVE_UNITS:
        return values
    metres = nm * 1e-9
    if unit == "energy":
        return values * metres / (constants.h * constants.c)
    if unit == "radiant_sensitivity":
        return values * constants.h * constants.c / (constants.e * metres)
    raise InputError(f"{where}: unknown unit {unit!r}; use photons, energy, qe, radiant_sensitivity or transmission")


# --- label bands -------------------------------------------------------------

def lognormal_band(nm: np.ndarray, peak_nm: float, fwhm_nm: float, skew: float = 1.3,
                   toward: str = "red") -> np.ndarray:
    """Siano & Metzler's log-normal band, peak 1, sampled on wavelengths `nm`.

    The band is defined on the wavenumber axis (cm^-1) with its maximum at
    the wavenumber of `peak_nm`, full width at half maximum equal to the
    wavenumber span of `peak_nm` +- `fwhm_nm` / 2, and skewness ratio `skew`
    (> 1; 1.3 is typical of dyes, from memory). ``toward="red"`` puts the
    long tail at long wavelengths (emission), ``"blue"`` at short
    wavelengths (absorption). Values are the band's height at each
    wavelength; see :func:`photon_density` for emission per nm.
    """
    if skew <= 1.0:
        raise ValueError("skew must be > 1")
    nu = 1e7 / np.asarray(nm, dtype=float)
    nu0 = 1e7 / peak_nm
    width = 1e7 / (peak_nm - fwhm_nm / 2) - 1e7 / (peak_nm + fwhm_nm / 2)
    if toward == "blue":
        nu = 2 * nu0 - nu  # mirror about the peak: the tail goes to higher energy
    a = nu0 + width * skew / (skew**2 - 1)
    band = np.zeros_like(nu)
    inside = nu < a
    band[inside] = np.exp(-np.log(2) / np.log(skew) ** 2 * np.log((a - nu[inside]) / (a - nu0)) ** 2)
    return band


def label_band(nm: np.ndarray, peak_nm: float, fwhm_nm: float, skew: float = 1.3, toward: str = "red",
               shoulder: float = 0.0, shoulder_per_cm: float = VIBRONIC_SPACING_PER_CM) -> np.ndarray:
    """A log-normal band plus, optionally, a vibronic shoulder of relative height `shoulder`
    one vibronic spacing away (to the red for emission, to the blue for absorption); peak 1."""
    shape = (peak_nm, fwhm_nm, skew, toward, shoulder, shoulder_per_cm)
    return _band(np.asarray(nm, dtype=float), *shape) / _band_peak(*shape)


def _band(nm, peak_nm, fwhm_nm, skew, toward, shoulder, shoulder_per_cm):
    values = lognormal_band(nm, peak_nm, fwhm_nm, skew, toward)
    if shoulder > 0:
        shift = -shoulder_per_cm if toward == "red" else shoulder_per_cm
        shoulder_nm = 1e7 / (1e7 / peak_nm + shift)
        values = values + shoulder * lognormal_band(nm, shoulder_nm, fwhm_nm, skew, toward)
    return values


@functools.lru_cache(maxsize=256)
def _band_peak(*shape) -> float:
    """The band's maximum on a fixed fine grid: a single wavelength (a laser line) must get
    the same value as the same wavelength on any grid."""
    return float(_band(np.arange(MIN_NM, MAX_NM + 0.05, 0.05), *shape).max())


def photon_density(band: np.ndarray, nm: np.ndarray) -> np.ndarray:
    """A band defined per wavenumber as photons per nm: the Jacobian d(nu)/d(lambda) ~ 1 / lambda^2."""
    return band / np.asarray(nm, dtype=float) ** 2


# --- filters ------------------------------------------------------------------

def _logistic(x: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * x))


def _edge_scale(edge_nm: float) -> float:
    return max(edge_nm, 1e-3) / _LOGISTIC_10_90


def bandpass(nm: np.ndarray, centre: float, width: float, edge_nm: float = DEFAULT_EDGE_NM,
             od: float = DEFAULT_BLOCKING_OD, peak: float = DEFAULT_PEAK_TRANSMISSION) -> np.ndarray:
    """Band-pass "centre/width": half transmission at centre +- width / 2, 10-90 % edges over
    `edge_nm`, `peak` transmission in band, 10^-od outside."""
    s = _edge_scale(edge_nm)
    shape = _logistic((nm - (centre - width / 2)) / s) * _logistic(((centre + width / 2) - nm) / s)
    return _with_blocking(shape, od, peak)


def longpass(nm: np.ndarray, edge: float, edge_nm: float = DEFAULT_EDGE_NM, od: float = DEFAULT_BLOCKING_OD,
             peak: float = DEFAULT_PEAK_TRANSMISSION) -> np.ndarray:
    """Long-pass: half transmission at `edge`, transmits longer wavelengths."""
    return _with_blocking(_logistic((nm - edge) / _edge_scale(edge_nm)), od, peak)


def shortpass(nm: np.ndarray, edge: float, edge_nm: float = DEFAULT_EDGE_NM, od: float = DEFAULT_BLOCKING_OD,
              peak: float = DEFAULT_PEAK_TRANSMISSION) -> np.ndarray:
    """Short-pass: half transmission at `edge`, transmits shorter wavelengths."""
    return _with_blocking(_logistic((edge - nm) / _edge_scale(edge_nm)), od, peak)


def multiband(nm: np.ndarray, bands, edge_nm: float = DEFAULT_EDGE_NM, od: float = DEFAULT_BLOCKING_OD,
              peak: float = DEFAULT_PEAK_TRANSMISSION) -> np.ndarray:
    """Several pass bands, each (centre, width), in one filter."""
    shape = np.zeros_like(np.asarray(nm, dtype=float))
    s = _edge_scale(edge_nm)
    for centre, width in bands:
        shape = np.maximum(shape, _logistic((nm - (centre - width / 2)) / s) * _logistic(((centre + width / 2) - nm) / s))
    return _with_blocking(shape, od, peak)


def dichroic(nm: np.ndarray, edge: float, edge_nm: float = DEFAULT_EDGE_NM, od: float = 2.0,
             peak: float = DEFAULT_PEAK_TRANSMISSION) -> np.ndarray:
    """Dichroic mirror's transmission: reflects below `edge`, transmits above (an
    epi-fluorescence cube's long-pass mirror). Its reflection is taken as 1 - transmission
    (no absorption losses)."""
    return longpass(nm, edge, edge_nm, od, peak)


def _with_blocking(shape: np.ndarray, od: float, peak: float) -> np.ndarray:
    floor = 10.0 ** (-od)
    return floor + (peak - floor) * shape


def parse_band(text: str, where: str) -> tuple[float, float]:
    """"centre/width" in nm, e.g. "600/50" (passes about 575-625 nm, common practice)."""
    centre, sep, width = str(text).partition("/")
    try:
        centre_nm, width_nm = float(centre), float(width)
    except ValueError:
        raise InputError(f"{where}: {text!r} is not centre/width in nm, e.g. \"600/50\"") from None
    if not sep:
        raise InputError(f"{where}: {text!r} is not centre/width in nm, e.g. \"600/50\"")
    check_wavelength(centre_nm, where)
    if not width_nm > 0:
        raise InputError(f"{where}: band width {width_nm:g} nm must be positive")
    check_wavelength(centre_nm - width_nm / 2, where)
    check_wavelength(centre_nm + width_nm / 2, where)
    return centre_nm, width_nm


def check_wavelength(value: float, where: str) -> float:
    if not (isinstance(value, (int, float)) and not isinstance(value, bool)) or not MIN_NM <= value <= MAX_NM:
        raise InputError(f"{where}: wavelength {value!r} is outside {MIN_NM:g}-{MAX_NM:g} nm; give it in nm")
    return float(value)


# --- sources --------------------------------------------------------------------

def gaussian_line(nm: np.ndarray, centre: float, fwhm: float) -> np.ndarray:
    """A line of unit area (per nm), Gaussian with full width at half maximum `fwhm`."""
    sigma = fwhm / (2.0 * np.sqrt(2.0 * np.log(2.0)))
    return np.exp(-0.5 * ((nm - centre) / sigma) ** 2) / (sigma * np.sqrt(2.0 * np.pi))


def mercury_arc(nm: np.ndarray, line_fwhm: float = 2.0) -> np.ndarray:
    """Mercury arc power spectrum (per nm, unit total power): its lines, each broadened to
    `line_fwhm`; the weak continuum is neglected."""
    weights = np.asarray(MERCURY_RELATIVE_INTENSITY) / np.sum(MERCURY_RELATIVE_INTENSITY)
    return sum(w * gaussian_line(nm, line, line_fwhm) for w, line in zip(weights, MERCURY_LINES_NM))


def planck_radiance(nm: np.ndarray, temperature_k: float) -> np.ndarray:
    """Spectral radiance of a black body, W sr^-1 m^-3 (energy per wavelength), Planck's law."""
    from scipy import constants

    metres = np.asarray(nm, dtype=float) * 1e-9
    exponent = constants.h * constants.c / (metres * constants.k * temperature_k)
    return 2.0 * constants.h * constants.c**2 / metres**5 / np.expm1(exponent)


def halogen_lamp(nm: np.ndarray, temperature_k: float = 3100.0) -> np.ndarray:
    """Halogen lamp power spectrum (per nm), a black body at about 3000-3200 K (from memory),
    scaled to unit power over the grid."""
    radiance = planck_radiance(nm, temperature_k)
    from scipy.integrate import trapezoid

    return radiance / trapezoid(radiance, nm)


# --- detectors ------------------------------------------------------------------

def example_detector_qe(nm: np.ndarray, model: str) -> np.ndarray:
    """Invented example quantum-efficiency curves, for planning only (not any real device).

    ``"camera"``: a scientific camera-like curve, broad, about 0.8 at 550-650 nm.
    ``"pmt"``: a photomultiplier-like curve, about 0.25 in the blue, falling into the red.
    """
    nm = np.asarray(nm, dtype=float)
    if model == "camera":
        return 0.82 * _logistic((nm - 420.0) / 30.0) * _logistic((900.0 - nm) / 70.0) + 0.05 * _logistic((nm - 330.0) / 20.0)
    if model == "pmt":
        return 0.26 * _logistic((nm - 300.0) / 15.0) * _logistic((620.0 - nm) / 45.0) + 0.01
    raise ValueError(f"unknown example detector {model!r}; use camera or pmt")
