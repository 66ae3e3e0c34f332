"""Predicted matrices (the contract's formula) and measured-versus-predicted verdicts."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate

from unmix.optics import spectra
from unmix.optics.comparison import compare
from unmix.errors import InputError, InputWarning
from unmix.matrix import BleedThroughMatrix
from unmix.optics.description import load_description
from unmix.optics.prediction import predict, rank_setups

HEAD = '[description]\nformat = "unmix-description"\nversion = 1\nacquisition = "{mode}"\n'
LABELS = '''
[[label]]
name = "A"
excitation = {{ peak_nm = 490, fwhm_nm = 40 }}
emission = {{ peak_nm = 520, fwhm_nm = 40 }}
extinction = 70000
quantum_yield = 0.8

[[label]]
name = "B"
excitation = {{ peak_nm = 555, fwhm_nm = 40 }}
emission = {{ peak_nm = 590, fwhm_nm = 50 }}
extinction = 90000
quantum_yield = 0.5
'''
CHANNELS = '''
[[channel]]
name = "g"
source = {{ laser_nm = 488.0, power_mw = 3.0 }}
dichroic = {{ transition_nm = 500 }}
emission_filter = {{ band = "525/50" }}
exposure = 1.5

[[channel]]
name = "o"
source = {{ laser_nm = {second_laser}, power_mw = 2.0 }}
dichroic = {{ transition_nm = 570 }}
emission_filter = {{ band = "{orange_band}" }}
gain = 2.0
'''


def _write(tmp_path, mode="simultaneous", second_laser="561.0", orange_band="600/50", name="d.toml"):
    path = tmp_path / name
    path.write_text(HEAD.format(mode=mode) + LABELS.format()
                    + CHANNELS.format(second_laser=second_laser, orange_band=orange_band))
    return path


def _by_hand(mode: str, second_laser: float = 561.0):
    """The contract's formula written out with scipy.integrate.quad over the same curves."""
    bands = {"A": (490, 40, 520, 40, 70000, 0.8), "B": (555, 40, 590, 50, 90000, 0.5)}
    channels = {"g": (488.0, 3.0, 500, (525, 50), 1.5), "o": (second_laser, 2.0, 570, (600, 50), 2.0)}

    def excitation(label, nm):
        ex_peak, ex_width = bands[label][:2]
        grid = np.linspace(300, 1000, 140001)
        peak = spectra.label_band(grid, ex_peak, ex_width, toward="blue").max()
        return spectra.label_band(np.array([nm]), ex_peak, ex_width, toward="blue")[0] / peak * bands[label][4]

    def emission(label, nm):
        _, _, em_peak, em_width, _, _ = bands[label]
        band = spectra.label_band(np.array([nm]), em_peak, em_width, toward="red")
        return spectra.photon_density(band, np.array([nm]))[0]

    def x(channel, label):
        laser, power, dichroic_edge, _, _ = channels[channel]
        return power * laser * excitation(label, laser) * (1 - spectra.dichroic(np.array([laser]), dichroic_edge)[0])

    def d(channel, label):
        _, _, dichroic_edge, (centre, width), g = channels[channel]
        area, _ = integrate.quad(lambda nm: emission(label, nm), 300, 1000, limit=400)
        f = lambda nm: (emission(label, nm) / area * spectra.bandpass(np.array([nm]), centre, width)[0]  # noqa: E731
                        * spectra.dichroic(np.array([nm]), dichroic_edge)[0])
        value, _ = integrate.quad(f, 300, 1000, limit=400, points=[centre])
        return bands[label][5] * value * g

    signal = np.zeros((2, 2))
    for c, channel in enumerate("go"):
        for k, label in enumerate("AB"):
            excite = x(channel, label) if mode == "sequential" else x("g", label) + x("o", label)
            signal[c, k] = excite * d(channel, label)
    return signal / signal[[0, 1], [0, 1]]


@pytest.mark.parametrize("mode", ["sequential", "simultaneous"])
def test_prediction_follows_the_contract_formula(tmp_path, mode):
    # Reference: the formula evaluated independently with scipy.integrate.quad.
    prediction = predict(load_description(_write(tmp_path, mode)))
    expected = _by_hand(mode)
    np.testing.assert_allclose(prediction.matrix.matrix, expected, rtol=2e-3, atol=1e-7)
    assert prediction.matrix.kind == "predicted" and prediction.matrix.primary == {"A": "g", "B": "o"}
    np.testing.assert_allclose(prediction.excitation_factor * prediction.emission_factor, prediction.matrix.matrix,
                               rtol=1e-9, atol=1e-12)


def test_shared_laser_counts_once_in_simultaneous_mode(tmp_path):
    # Two channels listing the same 488 nm laser: its light reaches the specimen once.
    path = _write(tmp_path, "simultaneous", second_laser="488.0", name="shared.toml")
    path.write_text(path.read_text().replace("power_mw = 2.0", "power_mw = 3.0"))
    shared = load_description(path)
    prediction = predict(shared)
    own_g = predict(shared, "sequential").excitation[0]
    np.testing.assert_allclose(prediction.excitation[0], own_g, rtol=1e-12)
    np.testing.assert_allclose(prediction.excitation[1], own_g, rtol=1e-12)


def _grouped(tmp_path, groups, mode="grouped", key="group"):
    """The two-channel description imaged in groups: channel g in groups[0], channel o in groups[1]."""
    text = _write(tmp_path).read_text().replace('acquisition = "simultaneous"', f'acquisition = "{mode}"')
    path = tmp_path / f"{mode}-{key}-{'-'.join(groups)}.toml"
    path.write_text(text.replace('exposure = 1.5', f'exposure = 1.5\n{key} = "{groups[0]}"').replace(
        'gain = 2.0', f'gain = 2.0\n{key} = "{groups[1]}"'))
    return path


def test_grouped_acquisition_generalises_both_modes(tmp_path):
    base = load_description(_write(tmp_path))
    np.testing.assert_allclose(predict(load_description(_grouped(tmp_path, ("one", "two")))).matrix.matrix,
                               predict(base, "sequential").matrix.matrix, rtol=1e-12)
    np.testing.assert_allclose(predict(load_description(_grouped(tmp_path, ("t", "t")))).matrix.matrix,
                               predict(base, "simultaneous").matrix.matrix, rtol=1e-12)


def test_files_with_the_earlier_names_of_grouping_are_read_with_one_warning(tmp_path):
    # acquisition = "tracks" and a channel's "track" were this tool's earlier names: a file that
    # uses them predicts what the renamed file predicts, and the command line says so once.
    import subprocess
    import sys

    old, new = _grouped(tmp_path, ("t", "t"), "tracks", "track"), _grouped(tmp_path, ("t", "t"))
    with pytest.warns(InputWarning, match="rename them"):
        old_description = load_description(old)
    assert old_description.acquisition == "grouped" and [c.group for c in old_description.channels] == ["t", "t"]
    np.testing.assert_array_equal(predict(old_description).matrix.matrix, predict(load_description(new)).matrix.matrix)
    run = subprocess.run([sys.executable, "-m", "unmix.cli", "predict", "--config", str(old), "-o",
                          str(tmp_path / "p.json"), "--quiet"], capture_output=True, text=True)
    assert run.returncode == 0 and run.stderr.count("warning:") == 1 and "'group'" in run.stderr, run.stderr
    both = tmp_path / "both.toml"
    both.write_text(new.read_text().replace('group = "t"', 'group = "t"\ntrack = "t"', 1))
    with pytest.raises(InputError, match="both 'group' and 'track'"):
        load_description(both)


def test_flat_power_source_weights_long_wavelengths_by_photon_energy(tmp_path):
    # A flat power spectrum delivers photons in proportion to wavelength (E = h c / lambda):
    # two labels absorbing in narrow bands at 400 and 600 nm get 1.5x more photons at 600.
    flat = tmp_path / "flat.csv"
    flat.write_text("300,1\n1000,1\n")
    (tmp_path / "f.toml").write_text(HEAD.format(mode="sequential") + '''
[[label]]
name = "V"
excitation = { peak_nm = 400, fwhm_nm = 4, skew = 1.01 }
emission = { peak_nm = 520, fwhm_nm = 40 }
extinction = 1000
quantum_yield = 1.0

[[label]]
name = "R"
excitation = { peak_nm = 600, fwhm_nm = 6, skew = 1.01 }
emission = { peak_nm = 520, fwhm_nm = 40 }
extinction = 1000
quantum_yield = 1.0

[[channel]]
name = "c"
source = { csv = "flat.csv", power_mw = 1.0 }
emission_filter = { band = "520/40" }
''')
    prediction = predict(load_description(tmp_path / "f.toml"), "sequential")
    # Same band area in wavelength: 4 nm at 400 and 6 nm at 600 are equal wavenumber widths,
    # so compare per nm of band: photons per unit power ~ lambda.
    widths = np.array([4.0, 6.0])
    ratio = (prediction.excitation[0, 1] / widths[1]) / (prediction.excitation[0, 0] / widths[0])
    assert ratio == pytest.approx(600 / 400, rel=0.01)


def _measured_from(prediction, relative_ci=0.05):
    m = prediction.matrix
    width = relative_ci * m.matrix + 0.001
    return BleedThroughMatrix(kind="measured", channels=m.channels, labels=m.labels, primary=m.primary,
                              matrix=m.matrix, ci95_low=m.matrix - width, ci95_high=m.matrix + width,
                              background=np.zeros(len(m.channels)), background_source="dark")


def test_compare_agrees_with_itself_and_points_at_a_changed_filter():
    # Self-consistency (invented set-up): the "measured" matrix comes from the same optics
    # with the orange channel's real emission filter shifted to the red of its nominal one.
    from unmix.optics.description import with_channel_parts

    demo = load_description(Path(__file__).parent.parent / "configs" / "demo_optics.toml")
    nominal = predict(demo)
    same = compare(_measured_from(nominal), nominal.matrix)
    assert {row["verdict"] for row in same.coefficients} <= {"agrees", "below-detection"}
    assert same.likely_channel is None
    built = with_channel_parts(demo, "orange600", {"emission_filter": {"band": "640/50"}}, "test")
    result = compare(_measured_from(predict(built)), nominal.matrix)
    disagreeing = {(r["channel"], r["label"]) for r in result.coefficients if r["verdict"] in ("higher", "lower")}
    assert disagreeing and all(c == "orange600" or label == "Emberin" for c, label in disagreeing)
    assert result.likely_channel == "orange600" and "orange600" in result.summary
    json.dumps(result.to_dict(), allow_nan=False)


def test_compare_renormalises_to_the_measured_primaries():
    predicted = BleedThroughMatrix(kind="predicted", channels=("a", "b"), labels=("X",), primary={"X": "a"},
                                   matrix=np.array([[1.0], [0.5]]))
    measured = BleedThroughMatrix(kind="measured", channels=("b", "a"), labels=("X",), primary={"X": "b"},
                                  matrix=np.array([[1.0], [2.0]]), ci95_low=np.array([[1.0], [1.9]]),
                                  ci95_high=np.array([[1.0], [2.1]]), background=np.zeros(2), background_source="dark")
    (row,) = compare(measured, predicted).coefficients
    assert row["channel"] == "a" and row["predicted"] == pytest.approx(2.0) and row["verdict"] == "agrees"


def test_below_detection_never_divides_by_a_tiny_prediction():
    predicted = BleedThroughMatrix(kind="predicted", channels=("a", "b"), labels=("X",), primary={"X": "a"},
                                   matrix=np.array([[1.0], [1e-9]]))
    measured = BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("X",), primary={"X": "a"},
                                  matrix=np.array([[1.0], [0.0005]]), ci95_low=np.array([[1.0], [-0.001]]),
                                  ci95_high=np.array([[1.0], [0.002]]), background=np.zeros(2),
                                  background_source="dark")
    (row,) = compare(measured, predicted).coefficients
    assert row["verdict"] == "below-detection" and row["ratio"] is None


def test_compare_refuses_different_channels():
    a = BleedThroughMatrix(kind="predicted", channels=("a", "b"), labels=("X",), primary={"X": "a"},
                           matrix=np.array([[1.0], [0.1]]))
    b = BleedThroughMatrix(kind="measured", channels=("a", "c"), labels=("X",), primary={"X": "a"},
                           matrix=np.array([[1.0], [0.1]]), ci95_low=np.array([[1.0], [0.05]]),
                           ci95_high=np.array([[1.0], [0.15]]), background=np.zeros(2), background_source="dark")
    with pytest.raises(InputError, match="channels differ"):
        compare(b, a)


def test_planner_ranks_sequential_before_simultaneous_for_cross_excitation(tmp_path):
    description = load_description(_write(tmp_path))
    ranked = rank_setups([("d", description, "sequential"), ("d", description, "simultaneous")])
    assert ranked[0]["acquisition"] == "sequential"
    assert ranked[0]["largest_leak"] <= ranked[1]["largest_leak"]


def test_label_invisible_everywhere_is_refused(tmp_path):
    path = _write(tmp_path)
    path.write_text(path.read_text().replace("peak_nm = 555, fwhm_nm = 40", "peak_nm = 900, fwhm_nm = 20").replace(
        "peak_nm = 590, fwhm_nm = 50", "peak_nm = 950, fwhm_nm = 20"))
    with pytest.raises(InputError, match="'B' gives no signal"):
        predict(load_description(path))


def test_catalogue_shapes_predict_from_the_command_line(tmp_path):
    # Every catalogue shape loads and predicts (a real process); the far-red shape's emission
    # peaks where the catalogue puts it (log-normal band: its maximum is its peak, Siano & Metzler
    # 1969), at round family values, not a product's data-sheet values.
    import subprocess
    import sys
    import tomllib

    from unmix.io.shipped import shipped_dir

    catalogue = shipped_dir("configs") / "label_shapes.toml"
    shapes = tomllib.loads(catalogue.read_text())["label_shapes"]
    red = shapes["generic-red"]
    assert red["emission"]["peak_nm"] % 5 == 0 and red["excitation"]["peak_nm"] % 5 == 0
    assert red["extinction"] % 10000 == 0
    lasers = {"generic-violet": 405.0, "generic-green": 488.0, "generic-orange": 561.0, "generic-red": 640.0}
    text = [HEAD.format(mode="sequential").replace('version = 1', f'version = 1\ninclude = ["{catalogue}"]')]
    for name, laser in lasers.items():
        peak = shapes[name]["emission"]["peak_nm"]
        text.append(f'[[label]]\nname = "{name}"\nshape = "{name}"\n')
        text.append(f'[[channel]]\nname = "c{int(laser)}"\nsource = {{ laser_nm = {laser}, power_mw = 1.0 }}\n'
                    f'emission_filter = {{ band = "{peak + 10}/30" }}\n')
    (tmp_path / "all.toml").write_text("\n".join(text))
    run = subprocess.run([sys.executable, "-m", "unmix.cli", "predict", "--config", str(tmp_path / "all.toml"),
                          "-o", str(tmp_path / "p.json")], capture_output=True, text=True)
    assert run.returncode == 0 and run.stderr == "", run.stderr
    primary = json.loads((tmp_path / "p.json").read_text())["primary"]
    assert primary == {name: f"c{int(laser)}" for name, laser in lasers.items()}
    description = load_description(tmp_path / "all.toml")
    nm = description.grid.nm
    emission = description.labels[list(lasers).index("generic-red")].emission(nm)
    assert nm[np.argmax(emission)] == pytest.approx(red["emission"]["peak_nm"], abs=1.0)
