"""The command line: bad input gives exit 2, one line naming the file, nothing written."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile

from conftest import fingerprint
from unmix.cli import main
from unmix.matrix import BleedThroughMatrix


@pytest.fixture
def files(tmp_path, demo):
    """Demo controls plus damaged and odd files, in a scratch folder."""
    c = demo["controls"]
    paths = {"cob": c["Cobaltin"][0], "cob2": c["Cobaltin"][1], "fern": c["Fernlight"][0],
             "emb": c["Emberin"][0], "dark": demo["dark"], "unstained": demo["unstained"]}
    data = Path(paths["cob"]).read_bytes()
    (tmp_path / "truncated.ome.tif").write_bytes(data[: len(data) // 3])
    (tmp_path / "notes.tif").write_text("these are not pixels\n")
    (tmp_path / "empty.tif").write_bytes(b"")
    cob = tifffile.imread(paths["cob"])
    tifffile.imwrite(tmp_path / "two_channels.ome.tif", cob[:2], ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525"]}})
    tifffile.imwrite(tmp_path / "renamed.ome.tif", cob, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["b", "g", "o"]}})
    tifffile.imwrite(tmp_path / "flat.ome.tif", np.full_like(cob, 4095), ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    nan = cob.astype(np.float32)
    nan[0, 10, 10] = np.nan
    tifffile.imwrite(tmp_path / "nan.ome.tif", nan, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    saturated = cob.copy()
    saturated[0][saturated[0] > 300] = 4095
    tifffile.imwrite(tmp_path / "saturated.ome.tif", saturated, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    tifffile.imwrite(tmp_path / "four_d.tif", np.stack([cob, cob]), photometric="minisblack")  # shape only, no axes
    _descriptions(tmp_path)
    _coloc_files(tmp_path, cob.shape[1:])
    _settings_files(tmp_path, cob)
    _registration_file(tmp_path)
    _odd_files(tmp_path)
    paths.update({p.stem.split(".")[0]: p for p in tmp_path.iterdir()})
    paths["out"] = tmp_path / "m.json"
    return paths


DESCRIPTION = """[description]
format = "unmix-description"
version = 1

[[label]]
name = "A"
excitation = { peak_nm = 490, fwhm_nm = 40 }
emission = { peak_nm = 520, fwhm_nm = 40 }
extinction = 70000
quantum_yield = 0.8

[[channel]]
name = "g"
source = { laser_nm = 488.0, power_mw = 3.0 }
emission_filter = { band = "525/50" }
"""


def _odd_files(folder: Path) -> None:
    """Images of unsupported pixel types, a tiny TIFF declaring a huge image, broken matrix files."""
    import struct

    tifffile.imwrite(folder / "complex.tif", np.ones((3, 8, 8), np.complex64), photometric="minisblack")
    tifffile.imwrite(folder / "booleans.tif", np.ones((3, 8, 8), bool), photometric="minisblack")
    huge = folder / "huge.tif"
    tifffile.imwrite(huge, np.ones((3, 4, 4), np.uint16), photometric="minisblack")
    data = bytearray(huge.read_bytes())
    with tifffile.TiffFile(huge) as tif:
        for page in tif.pages:
            for code in (256, 257):  # ImageWidth, ImageLength
                tag = page.tags[code]
                data[tag.valueoffset:tag.valueoffset + 2] = struct.pack("<H", 60000)
    huge.write_bytes(bytes(data))
    good = json.loads((folder / "coloc_matrix.json").read_text())
    (folder / "malformed_matrix.json").write_text('{"format": "unmix-matrix", "version": 1,')
    variants = {"version_matrix": {"version": 7}, "shape_matrix": {"matrix": [[1.0, 0.0, 0.0], [0.2, 1.0]]},
                "ci_matrix": {"ci95_high": [[1.0, 0.0, 0.0], [0.2, 1.0, 0.0], [0.0, 0.0, 1.0]]}}
    for name, change in variants.items():
        (folder / f"{name}.json").write_text(json.dumps({**good, **change}))
    (folder / "nan_matrix.json").write_text(json.dumps(good).replace('"matrix": [[1.0', '"matrix": [[NaN', 1))


def _settings_files(folder: Path, cob) -> None:
    """A sample imaged with twice the controls' exposure in one channel, and a matrix recording the
    controls' settings (as measure stores them)."""
    names = ["blue450", "green525", "orange600"]
    tifffile.imwrite(folder / "slow.ome.tif", cob, ome=True, metadata={
        "axes": "CYX", "Channel": {"Name": names}, "Plane": {"ExposureTime": [0.1, 0.4, 0.1]}})
    matrix = json.loads((folder / "coloc_matrix.json").read_text())
    matrix["provenance"] = {"acquisition": {"source": "control.ome.tif", "image": {}, "missing": [], "channels": {
        name: {"exposure_s": 0.1} for name in names}}}
    (folder / "settings_matrix.json").write_text(json.dumps(matrix))


def _registration_file(folder: Path) -> None:
    """A registration measured on images of another size (16 x 16) than the demo's."""
    from unmix.measure.registration import Registration

    Registration(("blue450", "green525", "orange600"), "blue450", np.zeros((3, 3)), (16, 16)).save(
        folder / "small_registration.json")


def _apply(files, matrix, image="cob"):
    folder = Path(files["out"]).parent
    return ["apply", "--matrix", folder / f"{matrix}.json", files[image], "-o", folder / "unmixed"]


def _coloc_files(folder: Path, shape) -> None:
    """A matrix of the demo's channels and labels, and masks of the wrong size or empty."""
    values = np.array([[1.0, 0.02, 0.0], [0.25, 1.0, 0.0], [0.02, 0.39, 1.0]])
    BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"),
                       labels=("Cobaltin", "Fernlight", "Emberin"),
                       primary={"Cobaltin": "blue450", "Fernlight": "green525", "Emberin": "orange600"},
                       matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01, background=np.full(3, 100.0),
                       background_source="dark", saturation=np.full(3, 4095.0)).save(folder / "coloc_matrix.json")
    tifffile.imwrite(folder / "small_mask.tif", np.ones((5, 5), np.uint8))
    tifffile.imwrite(folder / "empty_mask.tif", np.zeros(shape, np.uint8))
    tifffile.imwrite(folder / "stack.ome.tif", np.zeros((2, 3, 8, 8), np.uint16), ome=True,
                     metadata={"axes": "ZCYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})


def _coloc(files, *extra, image="cob"):
    folder = Path(files["out"]).parent
    return ["coloc", files[image], "--matrix", folder / "coloc_matrix.json", *extra]


def _descriptions(folder: Path) -> None:
    """A valid description and broken variants, with CSV spectra (invented set-up)."""
    (folder / "good_desc.toml").write_text(DESCRIPTION)
    variants = {
        "unknown_key": DESCRIPTION.replace("quantum_yield = 0.8", "quantum_yield = 0.8\nbrightness = 3"),
        "zero_width": DESCRIPTION.replace('"525/50"', '"525/0"'),
        "far_filter": DESCRIPTION.replace('"525/50"', '"1525/50"'),
        "nm_in_metres": DESCRIPTION.replace("laser_nm = 488.0", "laser_nm = 4.88e-7"),
        "bad_primary": DESCRIPTION.replace("quantum_yield = 0.8", 'quantum_yield = 0.8\nprimary = "red"'),
        "csv_text": DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "text.csv" }'),
        "csv_decreasing": DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "decreasing.csv" }'),
        "csv_negative": DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "negative.csv" }'),
        "csv_single": DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "single.csv" }'),
        "csv_duplicate": DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "duplicate.csv" }'),
        "invisible": DESCRIPTION.replace("peak_nm = 520, fwhm_nm = 40", "peak_nm = 800, fwhm_nm = 20").replace(
            "peak_nm = 490", "peak_nm = 760") + DESCRIPTION[DESCRIPTION.index("[[label]]"):DESCRIPTION.index(
                "[[channel]]")].replace('"A"', '"B"'),
        "bad_unit": DESCRIPTION.replace('{ peak_nm = 520, fwhm_nm = 40 }', '{ csv = "good.csv", unit = "lumens" }'),
        "not_toml": "[description\nformat = ",
        "unknown_filter_name": DESCRIPTION.replace('{ band = "525/50" }', '"em525"'),
        "unknown_shape": DESCRIPTION.replace("quantum_yield = 0.8", 'quantum_yield = 0.8\nshape = "generic-teal"'),
    }
    for name, text in variants.items():
        (folder / f"{name}.toml").write_text(text)
    (folder / "text.csv").write_text("500,0.1\n510,about half\n")
    (folder / "decreasing.csv").write_text("520,0.1\n510,0.2\n")
    (folder / "negative.csv").write_text("500,0.1\n510,-0.2\n")
    (folder / "single.csv").write_text("500,0.1\n")
    (folder / "duplicate.csv").write_text("500,0.1\n510,0.2\n510,0.3\n")
    (folder / "good.csv").write_text("500,0.1\n600,0.2\n")


def _measure(*controls, extra=()):
    argv = ["measure"]
    for control in controls:
        argv += ["--control", control]
    return argv + list(extra)


# Each case: (argv builder, text the one error line must contain).
BAD_INPUT = {
    "missing file": (lambda f: _measure("A=/no/such/file.tif", extra=["-o", f["out"]]), "file.tif"),
    "truncated tiff": (lambda f: _measure(f"A={f['truncated']}", extra=["-o", f["out"]]), "truncated"),
    "not an image": (lambda f: _measure(f"A={f['notes']}", extra=["-o", f["out"]]), "notes.tif"),
    "empty file": (lambda f: _measure(f"A={f['empty']}", extra=["-o", f["out"]]), "empty.tif"),
    "channel count differs": (lambda f: _measure(f"A={f['cob']}", f"B={f['two_channels']}",
                                                 extra=["-o", f["out"]]), "two_channels"),
    "channel names differ": (lambda f: _measure(f"A={f['cob']}", f"B={f['renamed']}",
                                                extra=["-o", f["out"]]), "renamed"),
    "no usable pixels": (lambda f: _measure(f"A={f['dark']}", extra=["-o", f["out"]]), "dark.ome.tif"),
    "all saturated": (lambda f: _measure(f"A={f['flat']}", extra=["-o", f["out"]]), "flat.ome.tif"),
    "saturated above limit": (lambda f: _measure(f"A={f['saturated']}", extra=["-o", f["out"]]), "saturated.ome.tif"),
    "nan without allow": (lambda f: _measure(f"A={f['nan']}", extra=["-o", f["out"]]), "--allow-nonfinite"),
    "label twice": (lambda f: _measure(f"A={f['cob']}", f"A={f['fern']}", extra=["-o", f["out"]]), "given twice"),
    "file twice": (lambda f: _measure(f"A={f['cob']}", f"B={f['cob']}", extra=["-o", f["out"]]), "given twice"),
    "file twice in one label": (lambda f: _measure(f"A={f['cob']},{f['cob']}", extra=["-o", f["out"]]), "given twice"),
    "output is an input": (lambda f: _measure(f"A={f['cob']}", extra=["-o", f["cob"]]), "also an input"),
    "output folder missing": (lambda f: _measure(f"A={f['cob']}", extra=["-o", "/no/such/dir/m.json"]), "does not exist"),
    "unknown primary channel": (lambda f: _measure(f"A={f['cob']}", extra=["--primary", "A=red700", "-o", f["out"]]), "red700"),
    "primary for unknown label": (lambda f: _measure(f"A={f['cob']}", extra=["--primary", "Z=blue450", "-o", f["out"]]), "'Z'"),
    "bad saturation": (lambda f: _measure(f"A={f['cob']}", extra=["--saturation", "lots", "-o", f["out"]]), "--saturation"),
    "saturation count": (lambda f: _measure(f"A={f['cob']}", extra=["--saturation", "1,2", "-o", f["out"]]), "--saturation"),
    "axes wrong length": (lambda f: _measure(f"A={f['cob']}", extra=["--axes", "ZCYX", "-o", f["out"]]), "--axes"),
    "axes invalid": (lambda f: _measure(f"A={f['cob']}", extra=["--axes", "QYX", "-o", f["out"]]), "--axes"),
    "no axes for 4-D": (lambda f: _measure(f"A={f['four_d']}", extra=["-o", f["out"]]), "--axes"),
    "channel names count": (lambda f: _measure(f"A={f['cob']}", extra=["--channel-names", "a,b", "-o", f["out"]]), "--channel-names"),
    "malformed control": (lambda f: _measure("A", extra=["-o", f["out"]]), "LABEL=PATH"),
    "missing output": (lambda f: _measure(f"A={f['cob']}"), "-o"),
    "unknown option": (lambda f: _measure(f"A={f['cob']}", extra=["--frobnicate", "-o", f["out"]]), "--frobnicate"),
    "bad bootstrap": (lambda f: _measure(f"A={f['cob']}", extra=["--bootstrap", "3", "-o", f["out"]]), "n_boot"),
    "unknown command": (lambda f: ["transmogrify"], "transmogrify"),
    "description unknown key": (lambda f: _predict(f, "unknown_key"), "brightness"),
    "filter width zero": (lambda f: _predict(f, "zero_width"), "width"),
    "filter outside 200-1200 nm": (lambda f: _predict(f, "far_filter"), "200-1200"),
    "wavelength in wrong unit": (lambda f: _predict(f, "nm_in_metres"), "laser_nm"),
    "description unknown primary": (lambda f: _predict(f, "bad_primary"), "'red'"),
    "csv spectrum with text": (lambda f: _predict(f, "csv_text"), "text.csv"),
    "csv spectrum decreasing": (lambda f: _predict(f, "csv_decreasing"), "decreasing.csv"),
    "csv spectrum negative": (lambda f: _predict(f, "csv_negative"), "negative.csv"),
    "csv spectrum single point": (lambda f: _predict(f, "csv_single"), "single.csv"),
    "csv spectrum duplicate wavelength": (lambda f: _predict(f, "csv_duplicate"), "appears twice"),
    "label invisible everywhere": (lambda f: _predict(f, "invisible"), "'A'"),
    "unknown spectrum unit": (lambda f: _predict(f, "bad_unit"), "lumens"),
    "description not toml": (lambda f: _predict(f, "not_toml"), "not_toml.toml"),
    "description missing": (lambda f: ["predict", "--config", "/no/such.toml", "-o", f["out"]], "/no/such.toml"),
    "predict output is the description": (lambda f: ["predict", "--config", f["good_desc"], "-o", f["good_desc"]],
                                          "also an input"),
    "description unknown filter name": (lambda f: _predict(f, "unknown_filter_name"), "em525"),
    "description unknown label shape": (lambda f: _predict(f, "unknown_shape"), "generic-teal"),
    "coloc label not in matrix": (lambda f: _coloc(f, "--labels", "Cobaltin,Violetta"), "Violetta"),
    "coloc malformed pair": (lambda f: _coloc(f, "--labels", "Cobaltin"), "A,B"),
    "coloc mask of another size": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--mask", f["small_mask"]),
                                   "small_mask"),
    "coloc empty mask": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--mask", f["empty_mask"]),
                         "empty_mask"),
    "coloc stack not a plane": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", image="stack"), "one plane"),
    "coloc image lacks channels": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", image="renamed"),
                                   "renamed.ome.tif"),
    "coloc bad thresholds": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--thresholds", "5"), "TA,TB"),
    "coloc bad psf": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--psf", "1.4"), "NA,WAVELENGTH_NM"),
    "coloc too few rounds": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--rounds", "5"), "--rounds"),
    "coloc json is the input": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--json", f["cob"]),
                                "also an input"),
    "complex pixels": (lambda f: _measure(f"A={f['complex']}", extra=["-o", f["out"]]), "complex64"),
    "boolean pixels": (lambda f: _measure(f"A={f['booleans']}", extra=["-o", f["out"]]), "bool"),
    "huge image declared in a tiny file": (lambda f: _measure(f"A={f['huge']}", extra=["-o", f["out"]]), "huge.tif"),
    "matrix malformed json": (lambda f: _apply(f, "malformed_matrix"), "malformed_matrix.json"),
    "matrix wrong version": (lambda f: _apply(f, "version_matrix"), "version"),
    "matrix inconsistent shapes": (lambda f: _apply(f, "shape_matrix"), "shape_matrix.json"),
    "matrix interval excludes its value": (lambda f: _apply(f, "ci_matrix"), "interval"),
    "matrix non-finite value": (lambda f: _apply(f, "nan_matrix"), "nan_matrix.json"),
    "apply complex pixels": (lambda f: _apply(f, "coloc_matrix", image="complex"), "complex64"),
    "apply settings differ, strict": (lambda f: _apply(f, "settings_matrix", image="slow") + ["--strict-settings"],
                                      "exposure_s is 0.4 in slow.ome.tif"),
    "apply strict without settings": (lambda f: _apply(f, "coloc_matrix") + ["--strict-settings"],
                                      "records no acquisition settings"),
    "coloc settings differ, strict": (lambda f: ["coloc", f["slow"], "--matrix", Path(f["out"]).parent /
                                                 "settings_matrix.json", "--labels", "Cobaltin,Emberin",
                                                 "--strict-settings"], "slow.ome.tif"),
    "align channels not the matrix's": (lambda f: ["align", "--beads", f["renamed"], "--matrix",
                                                   Path(f["out"]).parent / "coloc_matrix.json", "-o", f["out"]],
                                        "renamed.ome.tif"),
    "align too few beads": (lambda f: ["align", "--beads", f["dark"], "-o", f["out"]], "need at least 5"),
    "apply registration of another size": (lambda f: _apply(f, "coloc_matrix") + [
        "--registration", Path(f["out"]).parent / "small_registration.json"], "measured on 16 x 16"),
    "measure registration of another size": (lambda f: _measure(f"A={f['cob']}", extra=[
        "--registration", Path(f["out"]).parent / "small_registration.json", "-o", f["out"]]), "Cobaltin_field1"),
    "registration not json": (lambda f: _apply(f, "coloc_matrix") + ["--registration", f["notes"]], "notes.tif"),
    "coloc registration of another size": (lambda f: _coloc(f, "--labels", "Cobaltin,Emberin", "--registration",
                                                            Path(f["out"]).parent / "small_registration.json"),
                                           "measured on 16 x 16"),
    "autofluorescence with as many labels as channels": (lambda f: _measure(
        f"Cobaltin={f['cob']}", f"Fernlight={f['fern']}", f"Emberin={f['emb']}",
        extra=["--unstained", f["unstained"], "--autofluorescence", "Glow", "-o", f["out"]]),
        "--autofluorescence Glow: 3 channels cannot separate 3 labels"),
    "autofluorescence without unstained": (lambda f: _measure(f"Cobaltin={f['cob']}", extra=[
        "--autofluorescence", "Glow", "-o", f["out"]]), "needs --unstained"),
    "autofluorescence mask of another size": (lambda f: _measure(f"Cobaltin={f['cob']}", extra=[
        "--unstained", f["unstained"], "--autofluorescence", "Glow", "--autofluorescence-mask", f["small_mask"],
        "-o", f["out"]]), "--autofluorescence-mask"),
    "compare channels differ": (lambda f: _compare_pair(f), "channels differ"),
    "compare labels differ": (lambda f: _compare_pair(f, labels=True), "labels differ"),
    "compare not a matrix": (lambda f: ["compare", f["notes"], f["notes"], "-o", Path(f["out"]).parent / "cmp"],
                             "notes.tif"),
}


def _predict(files, variant):
    return ["predict", "--config", Path(files["out"]).parent / f"{variant}.toml", "-o", files["out"]]


def _compare_pair(files, labels=False):
    folder = Path(files["out"]).parent
    measured = BleedThroughMatrix(kind="measured", channels=("g", "o"), labels=("A",), primary={"A": "g"},
                                  matrix=np.array([[1.0], [0.2]]), ci95_low=np.array([[1.0], [0.1]]),
                                  ci95_high=np.array([[1.0], [0.3]]), background=np.zeros(2), background_source="dark")
    predicted = BleedThroughMatrix(kind="predicted", channels=("g", "o") if labels else ("g", "r"),
                                   labels=("Z",) if labels else ("A",), primary={"Z" if labels else "A": "g"},
                                   matrix=np.array([[1.0], [0.2]]))
    measured.save(folder / "measured.json")
    predicted.save(folder / "predicted.json")
    return ["compare", folder / "measured.json", folder / "predicted.json", "-o", folder / "cmp"]


@pytest.mark.parametrize("case", list(BAD_INPUT))
def test_bad_input_one_line_exit_2_nothing_written(case, files, capsys):
    build, expected = BAD_INPUT[case]
    argv = [str(a) for a in build(files)]
    inputs = [p for p in files.values() if Path(p).is_file()]
    before = fingerprint(inputs)
    listing = sorted(p.name for p in Path(files["out"]).parent.iterdir())
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if not line.startswith("warning:")]
    assert len(errors) == 1, err
    assert errors[0].startswith("error: ") and expected in errors[0], errors[0]
    assert "Traceback" not in "\n".join(err)
    assert fingerprint(inputs) == before  # inputs untouched
    assert sorted(p.name for p in Path(files["out"]).parent.iterdir()) == listing  # nothing written


def test_measure_success_writes_matrix_and_csv(files, capsys, tmp_path):
    csv_path = tmp_path / "m.csv"
    inputs = [files["cob"], files["cob2"], files["fern"], files["emb"], files["unstained"]]
    before = fingerprint(inputs)
    argv = _measure(f"Cobaltin={files['cob']},{files['cob2']}", f"Fernlight={files['fern']}",
                    f"Emberin={files['emb']}", extra=["--unstained", files["unstained"], "-o", files["out"],
                                                      "--csv", csv_path, "--bootstrap", "300"])
    assert main([str(a) for a in argv]) == 0
    out = capsys.readouterr().out
    assert "Bleed-through matrix" in out and "Fernlight" in out
    matrix = json.loads(Path(files["out"]).read_text())
    assert matrix["format"] == "unmix-matrix" and matrix["kind"] == "measured"
    assert matrix["background_source"] == "unstained"
    assert len(csv_path.read_text().splitlines()) == 1 + 9
    assert fingerprint(inputs) == before
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".partial")]


def test_warnings_are_single_prefixed_lines(files, capsys):
    argv = _measure(f"Fernlight={files['fern']}", extra=["--primary", "Fernlight=orange600", "-o", files["out"],
                                                         "--bootstrap", "200", "--quiet"])
    assert main([str(a) for a in argv]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert err and all(line.startswith("warning: ") for line in err)
    assert any("not the brightest" in line for line in err)


def test_real_process_exit_codes(files):
    # The installed entry point as a user runs it: exit status and stderr.
    missing = subprocess.run([sys.executable, "-m", "unmix.cli", "measure", "--control", "A=/nope.tif",
                              "-o", str(files["out"])], capture_output=True, text=True)
    assert missing.returncode == 2
    assert missing.stderr.strip() == "error: /nope.tif: no such file; check the path"
    version = subprocess.run([sys.executable, "-m", "unmix.cli", "--version"], capture_output=True, text=True)
    assert version.returncode == 0 and version.stdout.startswith("unmix ")


def test_predict_compare_and_plan_from_the_command_line(tmp_path, capsys):
    # The shipped demo description, predicted, compared with itself as a "measured" matrix.
    from unmix.io.shipped import shipped_dir

    description = shipped_dir("configs") / "demo_optics.toml"
    predicted = tmp_path / "predicted.json"
    assert main(["predict", "--config", str(description), "-o", str(predicted), "--plot",
                 str(tmp_path / "spectra.png")]) == 0
    out = capsys.readouterr().out
    assert "cross-excitation factor" in out and "Relative brightness" in out
    matrix = json.loads(predicted.read_text())
    assert matrix["kind"] == "predicted" and matrix["ci95_low"] is None and "emission_factor" in matrix["qc"]
    values = np.array(matrix["matrix"])
    measured = BleedThroughMatrix(kind="measured", channels=tuple(matrix["channels"]), labels=tuple(matrix["labels"]),
                                  primary=matrix["primary"], matrix=values, ci95_low=values * 0.9,
                                  ci95_high=values * 1.1, background=np.zeros(len(values)), background_source="dark")
    measured.save(tmp_path / "measured.json")
    assert main(["compare", str(tmp_path / "measured.json"), str(predicted), "-o", str(tmp_path / "cmp"),
                 "--config", str(description)]) == 0
    result = json.loads((tmp_path / "cmp" / "compare.json").read_text())
    assert len(result["coefficients"]) == 6
    assert {row["verdict"] for row in result["coefficients"]} <= {"agrees", "below-detection"}
    for name in ("compare.csv", "compare-matrices.png", "compare-scatter.png", "compare-spectra.png"):
        assert (tmp_path / "cmp" / name).stat().st_size > 0
    assert (tmp_path / "spectra.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    capsys.readouterr()
    assert main(["plan", str(description)]) == 0
    assert "sequential" in capsys.readouterr().out


def test_settings_difference_is_one_warning_line_per_setting(files, capsys, tmp_path):
    folder = Path(files["out"]).parent
    argv = ["apply", "--matrix", folder / "settings_matrix.json", files["slow"], "-o", tmp_path / "unmixed",
            "--quiet"]
    assert main([str(a) for a in argv]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    settings = [line for line in err if "acquisition settings differ" in line]
    assert len(settings) == 1 and settings[0].startswith("warning: ")
    assert "channel green525 exposure_s is 0.4 in slow.ome.tif but 0.1 in" in settings[0]
