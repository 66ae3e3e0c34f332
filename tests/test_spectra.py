"""Spectra and filters against published formulas, physical constants and NIST line positions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants, integrate, stats

from unmix.optics import spectra
from unmix.errors import InputError

NM = spectra.Grid(300.0, 1000.0, 0.05).nm


def test_bandpass_centre_width_passes_band_and_blocks_outside():
    # "600/50" passes about 575-625 nm, OD 6 blocking outside (common practice).
    t = spectra.bandpass(NM, 600.0, 50.0, edge_nm=3.0, od=6.0, peak=0.95)
    at = lambda nm: float(np.interp(nm, NM, t))  # noqa: E731
    assert at(600) == pytest.approx(0.95, rel=1e-3)
    assert at(575) == pytest.approx(0.475, rel=0.02) and at(625) == pytest.approx(0.475, rel=0.02)
    assert at(585) > 0.9 and at(615) > 0.9
    assert at(520) < 2e-6 and at(700) < 2e-6 and at(520) >= 1e-6


def test_longpass_edge_at_its_wavelength_and_shortpass_mirror():
    # A long-pass edge is where transmission is half its peak (common practice).
    t = spectra.longpass(NM, 500.0, edge_nm=4.0, od=5.0, peak=0.9)
    assert float(np.interp(500.0, NM, t)) == pytest.approx(0.45, rel=1e-3)
    # 10-90 % of the rise over the stated 4 nm edge width.
    ten, ninety = NM[np.argmax(t > 0.1 * 0.9)], NM[np.argmax(t > 0.9 * 0.9)]
    assert ninety - ten == pytest.approx(4.0, abs=0.1)
    s = spectra.shortpass(NM, 500.0, edge_nm=4.0, od=5.0, peak=0.9)
    assert float(np.interp(510.0, NM, s)) == pytest.approx(float(np.interp(490.0, NM, t)), rel=1e-6)


def test_dichroic_reflects_below_and_transmits_above_its_transition():
    t = spectra.dichroic(NM, 505.0)
    assert float(np.interp(480.0, NM, t)) < 0.011  # reflects the excitation
    assert float(np.interp(530.0, NM, t)) > 0.9  # transmits the emission
    assert float(np.interp(505.0, NM, t)) == pytest.approx(0.5 * (0.95 + 0.01), rel=1e-2)


def test_grid_integral_matches_gaussian_overlap_identity_and_scipy():
    # Textbook identity: integral N(x; m1, s1) N(x; m2, s2) dx = N(m1 - m2; 0, sqrt(s1^2 + s2^2)).
    grid = spectra.Grid(300.0, 1000.0, 0.5)
    nm = grid.nm
    for (m1, s1), (m2, s2) in [((520, 15), (560, 25)), ((450, 8), (470, 30)), ((600, 40), (600, 10))]:
        product = stats.norm.pdf(nm, m1, s1) * stats.norm.pdf(nm, m2, s2)
        identity = stats.norm.pdf(m1 - m2, 0, np.hypot(s1, s2))
        assert grid.integrate(product) == pytest.approx(identity, rel=1e-6)
        quad, _ = integrate.quad(lambda x: stats.norm.pdf(x, m1, s1) * stats.norm.pdf(x, m2, s2), 300, 1000,
                                 points=[m1, m2], limit=200)
        assert grid.integrate(product) == pytest.approx(quad, rel=1e-6)


def test_planck_law_against_scipy_constants_and_wien_peak():
    # Planck's law written out with scipy.constants; Wien's displacement law b / T for the peak.
    temperature = 3100.0
    metres = NM * 1e-9
    expected = 2 * constants.h * constants.c**2 / metres**5 / np.expm1(
        constants.h * constants.c / (metres * constants.k * temperature))
    np.testing.assert_allclose(spectra.planck_radiance(NM, temperature), expected, rtol=1e-12)
    wide = np.linspace(300.0, 2000.0, 34001)
    peak_nm = wide[np.argmax(spectra.planck_radiance(wide, temperature))]
    assert peak_nm == pytest.approx(constants.Wien / temperature * 1e9, abs=0.1)


def test_mercury_lines_are_the_nist_positions():
    # NIST Atomic Spectra Database Hg I lines used by the arc model.
    nist = (365.0, 404.7, 435.8, 546.1, 577.0, 579.1)
    assert spectra.MERCURY_LINES_NM == nist
    arc = spectra.mercury_arc(NM, line_fwhm=0.5)
    maxima = NM[1:-1][(arc[1:-1] > arc[:-2]) & (arc[1:-1] >= arc[2:]) & (arc[1:-1] > 0.01 * arc.max())]
    np.testing.assert_allclose(maxima, nist, atol=0.05)
    assert spectra.Grid(300.0, 1000.0, 0.05).integrate(arc) == pytest.approx(1.0, rel=1e-6)


def test_energy_units_convert_to_photons_by_photon_energy():
    # A flat energy spectrum carries photons in proportion to wavelength: E = h c / lambda.
    flat = np.ones(2)
    nm = np.array([400.0, 600.0])
    photons = spectra.convert_unit(flat, nm, "energy", "test")
    assert photons[1] / photons[0] == pytest.approx((constants.h * constants.c / 400e-9)
                                                    / (constants.h * constants.c / 600e-9))
    assert photons[0] == pytest.approx(1.0 / (constants.h * constants.c / 400e-9))
    # Radiant sensitivity 0.1 A/W at 500 nm is QE = S h c / (e lambda).
    qe = spectra.convert_unit(np.array([0.1]), np.array([500.0]), "radiant_sensitivity", "test")
    assert qe[0] == pytest.approx(0.1 * constants.h * constants.c / (constants.e * 500e-9))
    assert qe[0] == pytest.approx(0.248, abs=1e-3)


def test_lognormal_band_peak_width_and_skewness():
    # Siano & Metzler 1969: on the wavenumber axis the band peaks at nu0, its full width at
    # half maximum is H, and the half-maximum points lie at distances in the ratio rho.
    nm = np.linspace(400.0, 800.0, 400001)
    band = spectra.lognormal_band(nm, 520.0, 40.0, skew=1.4, toward="red")
    nu = 1e7 / nm
    assert nm[np.argmax(band)] == pytest.approx(520.0, abs=0.01)
    above = nu[band >= 0.5]
    nu0 = 1e7 / 520.0
    width = 1e7 / 500.0 - 1e7 / 540.0
    assert above.max() - above.min() == pytest.approx(width, rel=1e-3)
    assert (nu0 - above.min()) / (above.max() - nu0) == pytest.approx(1.4, rel=1e-3)  # the red tail is the long one


def test_percent_and_fraction_csv_give_the_same_spectrum(tmp_path):
    fraction = tmp_path / "fraction.csv"
    percent = tmp_path / "percent.csv"
    fraction.write_text("wavelength_nm,transmission\n500,0.0\n520,0.45\n540,0.9\n560,0.9\n580,0.0\n")
    percent.write_text("# measured, percent\n500;0\n520;45\n540;90\n560;90\n580;0\n")
    a = spectra.read_spectrum_csv(fraction, transmission=True)
    b = spectra.read_spectrum_csv(percent, transmission=True)
    np.testing.assert_allclose(a.on(NM), b.on(NM))
    assert a.on(np.array([530.0]))[0] == pytest.approx(0.675)  # linear interpolation (contract)
    assert a.on(np.array([490.0, 600.0])).tolist() == [0.0, 0.0]  # 0 outside the tabulated range


@pytest.mark.parametrize("text, message", [
    ("500,0.1\n510,high\n", "not two numbers"),
    ("500,0.1\n490,0.2\n", "not increasing"),
    ("500,0.1\n500,0.2\n", "appears twice"),
    ("500,-0.1\n510,0.2\n", "negative"),
    ("500,0.1\n", "at least two"),
    ("50,0.1\n60,0.2\n", "outside".replace("outside", "nm")),
    ("500,0.1,7\n510,0.2,8\n", "columns"),
    ("500,1.2\n510,1.3\n", "above 100"),
])
def test_bad_csv_spectra_are_refused_naming_the_file(tmp_path, text, message):
    path = tmp_path / "curve.csv"
    path.write_text(text)
    with pytest.raises(InputError, match=message) as info:
        spectra.read_spectrum_csv(path, transmission=True)
    assert "curve.csv" in str(info.value)


def test_reading_a_csv_spectrum_takes_time_linear_in_its_rows(tmp_path):
    # 40,000 rows against 4,000: a linear reader takes about 10 times as long, a quadratic one
    # about 100 times. A ratio measured in the same process (best of three), not a time limit.
    import time

    from unmix.optics.spectra import read_spectrum_csv

    def timed(rows: int) -> float:
        path = tmp_path / f"s{rows}.csv"
        wavelengths = np.linspace(300, 1000, rows)
        path.write_text("wavelength,value\n" + "".join(f"{w:.6f},{0.5 + 0.4 * np.sin(w):.6f}\n"
                                                       for w in wavelengths))
        best = float("inf")
        for _ in range(3):
            start = time.perf_counter()
            spectrum = read_spectrum_csv(path)
            best = min(best, time.perf_counter() - start)
        assert len(spectrum.wavelength) == rows
        return best

    ratio = timed(40_000) / timed(4_000)
    assert ratio < 30, ratio
