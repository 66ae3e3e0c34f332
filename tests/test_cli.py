"""The command line: bad input gives exit 2, one line naming the file, nothing written."""

from __future__ import annotations

import argparse
import json
import re
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
    paths = {"pond": c["Pondpetal"][0], "pond2": c["Pondpetal"][1], "fern": c["Fernlight"][0],
             "emb": c["Emberin"][0], "dark": demo["dark"], "unstained": demo["unstained"]}
    data = Path(paths["pond"]).read_bytes()
    (tmp_path / "truncated.ome.tif").write_bytes(data[: len(data) // 3])
    (tmp_path / "notes.tif").write_text("these are not pixels\n")
    (tmp_path / "empty.tif").write_bytes(b"")
    pond = tifffile.imread(paths["pond"])
    tifffile.imwrite(tmp_path / "two_channels.ome.tif", pond[:2], ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525"]}})
    tifffile.imwrite(tmp_path / "renamed.ome.tif", pond, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["b", "g", "o"]}})
    tifffile.imwrite(tmp_path / "flat.ome.tif", np.full_like(pond, 4095), ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    nan = pond.astype(np.float32)
    nan[0, 10, 10] = np.nan
    tifffile.imwrite(tmp_path / "nan.ome.tif", nan, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    saturated = pond.copy()
    saturated[0][saturated[0] > 300] = 4095
    tifffile.imwrite(tmp_path / "saturated.ome.tif", saturated, ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    tifffile.imwrite(tmp_path / "four_d.tif", np.stack([pond, pond]), photometric="minisblack")  # shape only, no axes
    _descriptions(tmp_path)
    _coloc_files(tmp_path, pond.shape[1:])
    _settings_files(tmp_path, pond)
    _registration_file(tmp_path)
    _odd_files(tmp_path)
    _unsafe_files(tmp_path, pond)
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
    (folder / "digits_matrix.json").write_text(json.dumps(good).replace('"background": [100.0',
                                                                         '"background": [' + "9" * 400, 1))
    (folder / "flags_matrix.json").write_text(json.dumps({**good, "qc": {"flags": 5}}))


def _unsafe_files(folder: Path, pixels) -> None:
    """Inputs that hang, loop, never end or would be written into: a FIFO, a symbolic link loop,
    an OME-Zarr input, an output folder holding a foreign manifest, a text file too large, deeply
    nested TOML, a needlessly fine grid, descriptions reading /dev/zero."""
    import os

    from unmix.io.images import Image, write_ome_zarr

    os.mkfifo(folder / "pipe.tif")
    os.symlink(folder / "loop_b.tif", folder / "loop_a.tif")
    os.symlink(folder / "loop_a.tif", folder / "loop_b.tif")
    write_ome_zarr(folder / "input.ome.zarr", Image(pixels, "CYX", ("blue450", "green525", "orange600")))
    (folder / "foreign_manifest").mkdir()
    (folder / "foreign_manifest" / "unmix-manifest.json").write_text('{"format": "someone-else"}')
    (folder / "manifest_folder" / "unmix-manifest.json").mkdir(parents=True)
    with open(folder / "huge_matrix.json", "wb") as handle:
        handle.truncate(65 << 20)  # sparse: costs no disk
    (folder / "nested.toml").write_text(DESCRIPTION + "deep = " + "[" * 5000 + "]" * 5000 + "\n")
    (folder / "fine_grid.toml").write_text(DESCRIPTION.replace("version = 1\n", "version = 1\n"
                                                               "grid = { start = 400, stop = 700, step = 1e-7 }\n", 1))
    (folder / "zero_csv.toml").write_text(DESCRIPTION.replace('{ band = "525/50" }', '{ csv = "/dev/zero" }'))
    (folder / "zero_include.toml").write_text(DESCRIPTION.replace("version = 1\n", 'version = 1\n'
                                                                  'include = ["/dev/zero"]\n', 1))
    (folder / "long_input").mkdir()
    (folder / "long_input" / ("n" * 240 + ".tif")).write_bytes((folder / "two_channels.ome.tif").read_bytes())
    (folder / "a_file").write_text("not a folder\n")


def _settings_files(folder: Path, pixels) -> None:
    """A sample imaged with twice the controls' exposure in one channel, and a matrix recording the
    controls' settings (as measure stores them)."""
    names = ["blue450", "green525", "orange600"]
    tifffile.imwrite(folder / "slow.ome.tif", pixels, ome=True, metadata={
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


def _apply(files, matrix, image="pond"):
    folder = Path(files["out"]).parent
    return ["apply", "--matrix", folder / f"{matrix}.json", files[image], "-o", folder / "unmixed"]


def _coloc_files(folder: Path, shape) -> None:
    """A matrix of the demo's channels and labels, and masks of the wrong size or empty."""
    values = np.array([[1.0, 0.02, 0.0], [0.25, 1.0, 0.0], [0.02, 0.39, 1.0]])
    BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"),
                       labels=("Pondpetal", "Fernlight", "Emberin"),
                       primary={"Pondpetal": "blue450", "Fernlight": "green525", "Emberin": "orange600"},
                       matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01, background=np.full(3, 100.0),
                       background_source="dark", saturation=np.full(3, 4095.0)).save(folder / "coloc_matrix.json")
    side = {"pearson": 0.5, "p_value": 0.001, "thresholds": [1.0, 2.0]}
    record = {"pair": ["Pondpetal", "Emberin"], "before": side, "after": side, "verdict": "persists"}
    (folder / "old_coloc.json").write_text(json.dumps(record))  # written before coloc recorded its matrix
    (folder / "foreign_coloc.json").write_text(json.dumps({**record, "matrix_sha256": "0" * 64}))
    tifffile.imwrite(folder / "small_mask.tif", np.ones((5, 5), np.uint8))
    tifffile.imwrite(folder / "empty_mask.tif", np.zeros(shape, np.uint8))
    tifffile.imwrite(folder / "stack.ome.tif", np.zeros((2, 3, 8, 8), np.uint16), ome=True,
                     metadata={"axes": "ZCYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})


def _coloc(files, *extra, image="pond", matrix="coloc_matrix"):
    folder = Path(files["out"]).parent
    return ["coloc", files[image], "--matrix", folder / f"{matrix}.json", *extra]


def _report(files, *extra):
    folder = Path(files["out"]).parent
    return ["report", "--matrix", folder / "coloc_matrix.json", *extra, "-o", folder / "report.html"]


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
    "channel count differs": (lambda f: _measure(f"A={f['pond']}", f"B={f['two_channels']}",
                                                 extra=["-o", f["out"]]), "two_channels"),
    "channel names differ": (lambda f: _measure(f"A={f['pond']}", f"B={f['renamed']}",
                                                extra=["-o", f["out"]]), "renamed"),
    "no usable pixels": (lambda f: _measure(f"A={f['dark']}", extra=["-o", f["out"]]), "dark.ome.tif"),
    "all saturated": (lambda f: _measure(f"A={f['flat']}", extra=["-o", f["out"]]), "flat.ome.tif"),
    "saturated above limit": (lambda f: _measure(f"A={f['saturated']}", extra=["-o", f["out"]]), "saturated.ome.tif"),
    "nan without allow": (lambda f: _measure(f"A={f['nan']}", extra=["-o", f["out"]]), "--allow-nonfinite"),
    "label twice": (lambda f: _measure(f"A={f['pond']}", f"A={f['fern']}", extra=["-o", f["out"]]), "given twice"),
    "file twice": (lambda f: _measure(f"A={f['pond']}", f"B={f['pond']}", extra=["-o", f["out"]]), "given twice"),
    "file twice in one label": (lambda f: _measure(f"A={f['pond']},{f['pond']}", extra=["-o", f["out"]]), "given twice"),
    "output is an input": (lambda f: _measure(f"A={f['pond']}", extra=["-o", f["pond"]]), "also an input"),
    "output folder missing": (lambda f: _measure(f"A={f['pond']}", extra=["-o", "/no/such/dir/m.json"]), "does not exist"),
    "unknown primary channel": (lambda f: _measure(f"A={f['pond']}", extra=["--primary", "A=red700", "-o", f["out"]]), "red700"),
    "primary for unknown label": (lambda f: _measure(f"A={f['pond']}", extra=["--primary", "Z=blue450", "-o", f["out"]]), "'Z'"),
    "bad saturation": (lambda f: _measure(f"A={f['pond']}", extra=["--saturation", "lots", "-o", f["out"]]), "--saturation"),
    "saturation count": (lambda f: _measure(f"A={f['pond']}", extra=["--saturation", "1,2", "-o", f["out"]]), "--saturation"),
    "axes wrong length": (lambda f: _measure(f"A={f['pond']}", extra=["--axes", "ZCYX", "-o", f["out"]]), "--axes"),
    "axes invalid": (lambda f: _measure(f"A={f['pond']}", extra=["--axes", "QYX", "-o", f["out"]]), "--axes"),
    "no axes for 4-D": (lambda f: _measure(f"A={f['four_d']}", extra=["-o", f["out"]]), "--axes"),
    "channel names count": (lambda f: _measure(f"A={f['pond']}", extra=["--channel-names", "a,b", "-o", f["out"]]), "--channel-names"),
    "malformed control": (lambda f: _measure("A", extra=["-o", f["out"]]), "LABEL=PATH"),
    "missing output": (lambda f: _measure(f"A={f['pond']}"), "-o"),
    "unknown option": (lambda f: _measure(f"A={f['pond']}", extra=["--frobnicate", "-o", f["out"]]), "--frobnicate"),
    "bad bootstrap": (lambda f: _measure(f"A={f['pond']}", extra=["--bootstrap", "3", "-o", f["out"]]), "n_boot"),
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
    "coloc label not in matrix": (lambda f: _coloc(f, "--labels", "Pondpetal,Violetta"), "Violetta"),
    "coloc malformed pair": (lambda f: _coloc(f, "--labels", "Pondpetal"), "A,B"),
    "coloc mask of another size": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--mask", f["small_mask"]),
                                   "small_mask"),
    "coloc empty mask": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--mask", f["empty_mask"]),
                         "empty_mask"),
    "coloc plane outside the stack": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--plane", "99",
                                                       image="stack"), "--plane 99"),
    "coloc frames without time": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--frames", "0:2",
                                                   image="stack"), "--frames 0:2"),
    "coloc image lacks channels": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", image="renamed"),
                                   "renamed.ome.tif"),
    "coloc bad thresholds": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--thresholds", "5"), "TA,TB"),
    "coloc negative seed": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--seed", "-1"), "--seed -1"),
    "coloc pixel size nan": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--pixel-um", "nan"),
                             "--pixel-um nan"),
    "coloc pixel size negative": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--pixel-um", "-1"),
                                  "--pixel-um -1"),
    "coloc min-r nan": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--min-r", "nan"), "--min-r nan"),
    "matrix with a 400-digit number": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin",
                                                        matrix="digits_matrix"), "digits_matrix.json"),
    "matrix with qc.flags not a list": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin",
                                                         matrix="flags_matrix"), "flags_matrix.json"),
    "coloc bad psf": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--psf", "1.4"), "NA,WAVELENGTH_NM"),
    "coloc too few rounds": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--rounds", "5"), "--rounds"),
    "coloc json is the input": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--json", f["pond"]),
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
    "report coloc of another matrix": (lambda f: _report(f, "--coloc", f["foreign_coloc"]), "foreign_coloc.json"),
    "report coloc without its matrix": (lambda f: _report(f, "--coloc", f["old_coloc"]), "old_coloc.json"),
    "report sample missing": (lambda f: _report(f, "--sample", "/no/such/sample.tif"), "/no/such/sample.tif"),
    "apply settings differ, strict": (lambda f: _apply(f, "settings_matrix", image="slow") + ["--strict-settings"],
                                      "exposure_s is 0.4 in slow.ome.tif"),
    "apply strict without settings": (lambda f: _apply(f, "coloc_matrix") + ["--strict-settings"],
                                      "records no acquisition settings"),
    "coloc settings differ, strict": (lambda f: ["coloc", f["slow"], "--matrix", Path(f["out"]).parent /
                                                 "settings_matrix.json", "--labels", "Pondpetal,Emberin",
                                                 "--strict-settings"], "slow.ome.tif"),
    "align channels not the matrix's": (lambda f: ["align", "--beads", f["renamed"], "--matrix",
                                                   Path(f["out"]).parent / "coloc_matrix.json", "-o", f["out"]],
                                        "renamed.ome.tif"),
    "align too few beads": (lambda f: ["align", "--beads", f["dark"], "-o", f["out"]], "need at least 5"),
    "apply registration of another size": (lambda f: _apply(f, "coloc_matrix") + [
        "--registration", Path(f["out"]).parent / "small_registration.json"], "measured on 16 x 16"),
    "measure registration of another size": (lambda f: _measure(f"A={f['pond']}", extra=[
        "--registration", Path(f["out"]).parent / "small_registration.json", "-o", f["out"]]), "Pondpetal_field1"),
    "registration not json": (lambda f: _apply(f, "coloc_matrix") + ["--registration", f["notes"]], "notes.tif"),
    "coloc registration of another size": (lambda f: _coloc(f, "--labels", "Pondpetal,Emberin", "--registration",
                                                            Path(f["out"]).parent / "small_registration.json"),
                                           "measured on 16 x 16"),
    "autofluorescence with as many labels as channels": (lambda f: _measure(
        f"Pondpetal={f['pond']}", f"Fernlight={f['fern']}", f"Emberin={f['emb']}",
        extra=["--unstained", f["unstained"], "--autofluorescence", "Glow", "-o", f["out"]]),
        "--autofluorescence Glow: 3 channels cannot separate 3 labels"),
    "autofluorescence without unstained": (lambda f: _measure(f"Pondpetal={f['pond']}", extra=[
        "--autofluorescence", "Glow", "-o", f["out"]]), "needs --unstained"),
    "autofluorescence mask of another size": (lambda f: _measure(f"Pondpetal={f['pond']}", extra=[
        "--unstained", f["unstained"], "--autofluorescence", "Glow", "--autofluorescence-mask", f["small_mask"],
        "-o", f["out"]]), "--autofluorescence-mask"),
    "compare channels differ": (lambda f: _compare_pair(f), "channels differ"),
    "compare labels differ": (lambda f: _compare_pair(f, labels=True), "labels differ"),
    "compare swapped controls": (lambda f: _compare_pair(f, swapped=True), "swapped controls"),
    "compare not a matrix": (lambda f: ["compare", f["notes"], f["notes"], "-o", Path(f["out"]).parent / "cmp"],
                             "notes.tif"),
    "fifo as an image": (lambda f: _measure(f"A={f['pipe']}", extra=["-o", f["out"]]), "not a regular file"),
    "fifo as a matrix": (lambda f: ["apply", "--matrix", f["pipe"], f["pond"], "-o", _folder(f, "unmixed")],
                         "not a regular file"),
    "fifo as a description": (lambda f: ["predict", "--config", f["pipe"], "-o", f["out"]], "not a regular file"),
    "device as a matrix": (lambda f: ["apply", "--matrix", "/dev/zero", f["pond"], "-o", _folder(f, "unmixed")],
                           "/dev/zero"),
    "device as a description": (lambda f: ["predict", "--config", "/dev/zero", "-o", f["out"]], "/dev/zero"),
    "device as a spectrum": (lambda f: _predict(f, "zero_csv"), "/dev/zero"),
    "device as an include": (lambda f: _predict(f, "zero_include"), "/dev/zero"),
    "device as a coloc file": (lambda f: ["report", "--matrix", _folder(f, "coloc_matrix.json"), "--coloc", "/dev/zero",
                                          "-o", _folder(f, "r.html")], "/dev/zero"),
    "text file too large": (lambda f: ["apply", "--matrix", f["huge_matrix"], f["pond"], "-o", _folder(f, "unmixed")],
                            "too large"),
    "description nested too deeply": (lambda f: _predict(f, "nested"), "nested too deeply"),
    "grid step too fine": (lambda f: _predict(f, "fine_grid"), "step"),
    "symbolic link loop as a control": (lambda f: _measure(f"A={_folder(f, 'loop_a.tif')}", extra=["-o", f["out"]]),
                                        "loop_a.tif"),
    "symbolic link loop as -o": (lambda f: _measure(f"A={f['pond']}", extra=["-o", _folder(f, "loop_a.tif")]),
                                 "loop_a.tif"),
    "apply output is the zarr input": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["input"],
                                                  "-o", f["input"]], "also an input"),
    "apply output inside the zarr input": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"),
                                                      f["input"], "-o", Path(f["input"]) / "sub"], "inside the input"),
    "measure output inside a zarr control": (lambda f: _measure(f"A={f['input']}", extra=[
        "-o", Path(f["input"]) / "m.json"]), "inside the input"),
    "coloc json inside the zarr input": (lambda f: ["coloc", f["input"], "--matrix", _folder(f, "coloc_matrix.json"),
                                                    "--labels", "Pondpetal,Emberin", "--json",
                                                    Path(f["input"]) / "c.json"], "inside the input"),
    "output name too long": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"),
                                        _folder(f, "long_input/" + "n" * 240 + ".tif"), "-o", _folder(f, "unmixed")],
                             "255"),
    "foreign manifest": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["pond"], "-o",
                                    _folder(f, "foreign_manifest")], "unmix-manifest.json"),
    "manifest is a folder": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["pond"], "-o",
                                        _folder(f, "manifest_folder")], "unmix-manifest.json"),
    "scheduler not an address": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["pond"], "-o",
                                            _folder(f, "unmixed"), "--scheduler", "nonsense"], "--scheduler"),
    "memory not a size": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["pond"], "-o",
                                     _folder(f, "unmixed"), "--memory", "lots"], "--memory"),
    "memory too small": (lambda f: ["apply", "--matrix", _folder(f, "coloc_matrix.json"), f["pond"], "-o",
                                    _folder(f, "unmixed"), "--memory", "1K"], "--memory"),
    "bootstrap beyond bound": (lambda f: _measure(f"A={f['pond']}", extra=["--bootstrap", "100000000", "-o",
                                                                         f["out"]]), "--bootstrap"),
    "negative seed": (lambda f: _measure(f"A={f['pond']}", extra=["--seed", "-1", "-o", f["out"]]), "--seed"),
    "saturated percent out of range": (lambda f: _measure(f"A={f['pond']}", extra=["--max-saturated-percent", "nan",
                                                                                 "-o", f["out"]]),
                                       "--max-saturated-percent"),
    "compare negative tolerance": (lambda f: [*_compare_pair(f, same=True), "--tolerance", "-1"], "--tolerance"),
    "compare tolerance nan": (lambda f: [*_compare_pair(f, same=True), "--tolerance", "nan"], "--tolerance"),
    "compare output below a file": (lambda f: [*_compare_pair(f, same=True)[:-1], _folder(f, "a_file/sub")],
                                    "a_file"),
    "demo output is a file": (lambda f: ["demo", "-o", _folder(f, "a_file")], "a_file"),
}


def _folder(files, name):
    return Path(files["out"]).parent / name


def _predict(files, variant):
    return ["predict", "--config", Path(files["out"]).parent / f"{variant}.toml", "-o", files["out"]]


def _compare_pair(files, labels=False, same=False, swapped=False):
    folder = Path(files["out"]).parent
    measured = BleedThroughMatrix(kind="measured", channels=("g", "o"), labels=("A",), primary={"A": "g"},
                                  matrix=np.array([[1.0], [0.2]]), ci95_low=np.array([[1.0], [0.1]]),
                                  ci95_high=np.array([[1.0], [0.3]]), background=np.zeros(2), background_source="dark")
    predicted = BleedThroughMatrix(kind="predicted", channels=("g", "o") if labels or same or swapped else ("g", "r"),
                                   labels=("Z",) if labels else ("A",), primary={"Z" if labels else "A": "g"},
                                   matrix=np.array([[1.0], [0.2]]))
    if swapped:  # A's control was another label's: brightest in o, where A itself gives almost nothing
        predicted = BleedThroughMatrix(kind="predicted", channels=("g", "o"), labels=("A",), primary={"A": "o"},
                                       matrix=np.array([[3e-6], [1.0]]))
    measured.save(folder / "measured.json")
    predicted.save(folder / "predicted.json")
    return ["compare", folder / "measured.json", folder / "predicted.json", "-o", folder / "cmp"]


@pytest.mark.parametrize("case", list(BAD_INPUT))
def test_bad_input_one_line_exit_2_nothing_written(case, files, capsys):
    build, expected = BAD_INPUT[case]
    argv = [str(a) for a in build(files)]
    folder = Path(files["out"]).parent
    inputs = [p for p in folder.rglob("*") if p.is_file() and not p.is_symlink() and p.name != "pipe.tif"]
    before = fingerprint(inputs)
    listing = sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if not line.startswith("warning:")]
    assert len(errors) == 1, err
    assert errors[0].startswith("error: ") and expected in errors[0], errors[0]
    assert "Traceback" not in "\n".join(err)
    assert fingerprint(inputs) == before  # inputs untouched
    assert sorted(str(p.relative_to(folder)) for p in folder.rglob("*")) == listing  # nothing written


def test_measure_success_writes_matrix_and_csv(files, capsys, tmp_path):
    csv_path = tmp_path / "m.csv"
    inputs = [files["pond"], files["pond2"], files["fern"], files["emb"], files["unstained"]]
    before = fingerprint(inputs)
    argv = _measure(f"Pondpetal={files['pond']},{files['pond2']}", f"Fernlight={files['fern']}",
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


def _maths_matrices(folder: Path) -> tuple[Path, Path]:
    """A measured and a predicted matrix whose label and channel names matplotlib would read as
    mathematics (invented names)."""
    labels, channels = ("$x^$", "B$"), ("g$_", "$o")
    measured = BleedThroughMatrix(kind="measured", channels=channels, labels=labels,
                                  primary={labels[0]: channels[0], labels[1]: channels[1]},
                                  matrix=np.array([[1.0, 0.1], [0.2, 1.0]]),
                                  ci95_low=np.array([[1.0, 0.05], [0.1, 1.0]]),
                                  ci95_high=np.array([[1.0, 0.15], [0.3, 1.0]]), background=np.zeros(2),
                                  background_source="dark")
    predicted = BleedThroughMatrix(kind="predicted", channels=channels, labels=labels,
                                   primary={labels[0]: channels[0], labels[1]: channels[1]},
                                   matrix=np.array([[1.0, 0.4], [0.21, 1.0]]))
    return measured.save(folder / "maths_measured.json"), predicted.save(folder / "maths_predicted.json")


def test_names_that_look_like_mathematics_are_drawn_as_text(tmp_path, demo, capsys):
    measured, predicted = _maths_matrices(tmp_path)
    assert main(["compare", str(measured), str(predicted), "-o", str(tmp_path / "cmp"), "--quiet"]) == 0
    assert sorted(p.name for p in (tmp_path / "cmp").iterdir()) == ["compare-matrices.png", "compare-scatter.png",
                                                                    "compare.csv", "compare.json"]
    assert main(["report", "--matrix", str(measured), "--predicted", str(predicted), "-o", str(tmp_path / "r.html"),
                 "--quiet"]) == 0
    from unmix.report.plots import plain

    assert plain("$x^$") == r"\$x^\$"  # matplotlib's escape for a literal dollar sign


def test_compare_writes_nothing_when_a_figure_fails(tmp_path, monkeypatch, capsys):
    # Every figure is drawn before any file is written: a failing figure leaves no table behind.
    import unmix.report.plots as plots

    measured, predicted = _maths_matrices(tmp_path)

    def broken(comparison):
        raise ValueError("figure failed")

    monkeypatch.setattr(plots, "comparison_figure", broken)
    assert main(["compare", str(measured), str(predicted), "-o", str(tmp_path / "cmp")]) == 1
    assert not (tmp_path / "cmp").exists() or not list((tmp_path / "cmp").iterdir())


def test_coloc_histograms_with_long_and_mathematical_label_names(tmp_path, demo, capsys):
    # 5000-character names and names with "$": histogram files within the 255-byte limit, figures
    # drawn, the report built from the results.
    labels = ("C" * 5000, "F$x^$", "E" * 5000 + "2")
    values = np.array([[1.0, 0.02, 0.0], [0.25, 1.0, 0.0], [0.02, 0.39, 1.0]])
    matrix = BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"), labels=labels,
                                primary=dict(zip(labels, ("blue450", "green525", "orange600"))), matrix=values,
                                ci95_low=values - 0.01, ci95_high=values + 0.01, background=np.full(3, 100.0),
                                background_source="dark", saturation=np.full(3, 4095.0)).save(tmp_path / "long.json")
    assert main(["coloc", str(demo["sample"]), "--matrix", str(matrix), "--labels", f"{labels[0]},{labels[1]}",
                 "--labels", f"{labels[1]},{labels[2]}", "--rounds", "19", "--histograms", str(tmp_path / "h"),
                 "--json", str(tmp_path / "c.json"), "--quiet"]) == 0
    names = [p.name for p in (tmp_path / "h").iterdir()]
    assert len(names) == 2 and all(len(name) <= 255 for name in names)
    assert "no noise model" in capsys.readouterr().err  # this matrix has none: said once, nothing else
    assert main(["report", "--matrix", str(matrix), "--coloc", str(tmp_path / "c.json"), "-o",
                 str(tmp_path / "r.html"), "--quiet"]) == 0
    assert capsys.readouterr().err == ""


@pytest.mark.parametrize("change, words", [
    (lambda r: r["before"].update(thresholds=["a", "b"]), "before.thresholds"),
    (lambda r: r["after"].update(thresholds=[1.0]), "after.thresholds"),
    (lambda r: r.update(before={}), "'before'"),
    (lambda r: r.update(pair=[]), "'pair'"),
    (lambda r: r.update(verdict=["persists"]), "unknown verdict"),
    (lambda r: r["after"].update(pearson="high"), "after.pearson"),
    (lambda r: r.update(inflation=10**400), "'inflation'"),
    (lambda r: r.update(object=1.5), "'object'"),
    (lambda r: r.update(plane_profile=[{"plane": "top"}]), "plane_profile"),
    (lambda r: r.update(plane_profile=[{"plane": 10**12, "pearson_before": 0.1, "pearson_noise_corrected": 0.1,
                                        "interval": None}]), "plane_profile"),
    (lambda r: r.update(plane_profile=[{"plane": 0, "pearson_before": 0.1, "interval": None}]),
     "plane_profile"),  # a key missing (found by tests/benchmarks/fuzz_readers.py)
    (lambda r: r.update(planes=[4, 1]), "'planes'"),
    (lambda r: r.update(planes="all"), "'planes'"),
    (lambda r: r.update(z_step_um="0.3 um"), "'z_step_um'"),
    (lambda r: r.update(depth_trend={"slope_per_plane": 0.01, "flagged": "yes"}), "depth_trend"),
])
def test_report_refuses_malformed_coloc_results(tmp_path, capsys, change, words):
    # Hand-edited or damaged coloc files: one line naming the file and the key, exit 2, nothing written.
    from unmix.coloc.verdict import analyse_pair
    from pair_scenes import measured_matrix, pair_scene

    scene = pair_scene(3, shape=(48, 48))
    matrix = measured_matrix(scene, 3)
    record = analyse_pair(scene.raw, matrix, ("A", "B"), rounds=19).to_dict()
    change(record)
    (tmp_path / "c.json").write_text(json.dumps(record))
    matrix.save(tmp_path / "m.json")
    assert main(["report", "--matrix", str(tmp_path / "m.json"), "--coloc", str(tmp_path / "c.json"), "-o",
                 str(tmp_path / "r.html")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "c.json" in err[0] and words in err[0]
    assert not (tmp_path / "r.html").exists()


@pytest.mark.parametrize("change, words", [
    (lambda d: d.update(time_summaries={"pair": ["A", "B"]}), "'time_summaries' must be a list"),
    (lambda d: d["time_summaries"][0].update(frames=[]), "'frames'"),
    (lambda d: d["time_summaries"][0].update(frames=["first", "last"]), "'frames'"),
    (lambda d: d["time_summaries"][0].update(verdicts={"maybe": 2}), "'verdicts'"),
    (lambda d: d["time_summaries"][0].update(pearson_noise_corrected=[0.3]), "'pearson_noise_corrected'"),
    (lambda d: d["time_summaries"][0].update(intervals=[[0.1], None]), "'intervals'"),
    (lambda d: d["time_summaries"][0]["bleaching"]["A"].update(flagged="yes"), "'bleaching'"),
    (lambda d: d["time_summaries"][0]["bleaching"]["B"].update(mean_signal=[1.0, "x"]), "'bleaching'"),
    (lambda d: d["time_summaries"][0]["residual"].pop("note"), "'residual'"),
    (lambda d: d["time_summaries"][0].update(bleach_limit=20), "'bleach_limit'"),
    (lambda d: d["time_summaries"][0].update(notes="bleached"), "'notes'"),
    (lambda d: d["time_summaries"][0].update(pair=["A"]), "'pair'"),
])
def test_report_refuses_malformed_time_summaries(tmp_path, capsys, change, words):
    # A time series' results as unmix coloc writes them, then one value damaged: one line naming the
    # file, the summary and the key; exit 2; nothing written.
    from pair_scenes import series_matrix, time_series, write_stack

    data, truth = time_series(53, frames=2)
    matrix = series_matrix(truth, tmp_path / "m.json")
    movie = write_stack(tmp_path / "movie.ome.tif", data[:, :, :1], axes="TCZYX", names=("c0", "c1", "c2"))
    assert main(["coloc", str(movie), "--matrix", str(matrix), "--labels", "A,B", "--rounds", "19", "--json",
                 str(tmp_path / "t.json"), "--quiet"]) == 0
    document = json.loads((tmp_path / "t.json").read_text())
    change(document)
    (tmp_path / "t.json").write_text(json.dumps(document))
    capsys.readouterr()
    assert main(["report", "--matrix", str(matrix), "--coloc", str(tmp_path / "t.json"), "-o",
                 str(tmp_path / "r.html")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if line.startswith("error:")]
    assert len(errors) == 1 and "t.json" in errors[0] and words in errors[0], err
    assert "Traceback" not in "\n".join(err) and not (tmp_path / "r.html").exists()


def test_report_refuses_deeply_nested_coloc_json(tmp_path, capsys):
    from pair_scenes import measured_matrix, pair_scene

    measured_matrix(pair_scene(3, shape=(48, 48)), 3).save(tmp_path / "m.json")
    (tmp_path / "c.json").write_text("[" * 100_000 + "]" * 100_000)
    assert main(["report", "--matrix", str(tmp_path / "m.json"), "--coloc", str(tmp_path / "c.json"), "-o",
                 str(tmp_path / "r.html")]) == 2
    assert "c.json" in capsys.readouterr().err


def _run(*argv):
    """The command as a user runs it: a real process."""
    return subprocess.run([sys.executable, "-m", "unmix.cli", *map(str, argv)], capture_output=True, text=True)


def test_top_level_help_is_a_short_user_description_with_two_examples():
    run = _run("--help")
    assert run.returncode == 0 and run.stderr == ""
    text = run.stdout
    assert "`" not in text and ":class:" not in text and ":mod:" not in text  # no reStructuredText
    assert "bleed-through" in text and "each command has its own help" in text.lower()
    examples = text[text.index("examples:"):]
    assert len(re.findall(r"^  unmix \w+", examples, re.M)) == 2
    for command in ("measure", "apply", "coloc", "report", "demo"):
        assert re.search(rf"^  {command}\s+\S", text, re.M), command
    assert len(text.splitlines()) <= 40


def test_matrix_option_has_a_help_line_in_every_subcommand():
    from unmix.cli import build_parser

    parser = build_parser()
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices
    with_matrix = {name: [a for a in sub._actions if "--matrix" in a.option_strings] for name, sub in commands.items()}
    with_matrix = {name: actions[0] for name, actions in with_matrix.items() if actions}
    assert set(with_matrix) == {"align", "apply", "coloc", "report"}
    assert all(action.help and len(action.help) > 10 for action in with_matrix.values())
    for name in with_matrix:
        assert "--matrix MATRIX.json" in _run(name, "--help").stdout


@pytest.mark.parametrize("argv, message", [
    (["apply", "--matrx", "m.json", "x.tif", "-o", "out"], "unmix apply: unknown option --matrx; did you mean --matrix?"),
    (["coloc", "x.tif", "--matrix", "m.json", "--labels", "A,B", "--min_r", "0.2"],
     "unmix coloc: unknown option --min_r; did you mean --min-r?"),
    (["measure", "--control", "A=a.tif", "--unstaned", "u.tif", "-o", "m.json"],
     "unmix measure: unknown option --unstaned; did you mean --unstained?"),
    (["report", "--matrix", "m.json", "--colocs=c.json", "-o", "r.html"],
     "unmix report: unknown option --colocs; did you mean --coloc?"),
    (["mesure", "--control", "A=a.tif"], "unmix: unknown command 'mesure'; did you mean 'measure'?"),
])
def test_a_misspelt_option_is_named_with_a_suggestion(tmp_path, argv, message):
    run = subprocess.run([sys.executable, "-m", "unmix.cli", *argv], capture_output=True, text=True, cwd=tmp_path)
    assert run.returncode == 2 and run.stdout == ""
    assert run.stderr.strip().splitlines() == [f"error: {message}"]
    assert list(tmp_path.iterdir()) == []


def test_values_that_look_like_options_are_left_to_their_option(files, tmp_path):
    # A negative number is a value, and a unique prefix still works (argparse's own rules).
    run = _run("coloc", files["pond"], "--matrix", Path(files["out"]).parent / "coloc_matrix.json", "--labels",
               "Pondpetal,Emberin", "--min-r", "-0.2", "--round", "19", "--json", tmp_path / "c.json", "--quiet")
    assert run.returncode == 0, run.stderr
    assert json.loads((tmp_path / "c.json").read_text())["min_r"] == -0.2


def test_measure_prints_each_qc_warning_once(files, tmp_path):
    run = _run("measure", "--control", f"Fernlight={files['fern']}", "--primary", "Fernlight=orange600",
               "--bootstrap", "200", "-o", tmp_path / "m.json")
    assert run.returncode == 0, run.stderr
    said = [line for line in (run.stdout + run.stderr).splitlines() if "not the brightest" in line]
    assert len(said) == 1 and said[0].startswith("warning: ")


def test_a_short_option_may_carry_its_value(files, tmp_path):
    run = _run("measure", "--control", f"Fernlight={files['fern']}", "--bootstrap", "200", f"-o{tmp_path / 'm.json'}",
               "--quiet")
    assert run.returncode == 0, run.stderr
    assert (tmp_path / "m.json").exists()


def test_settings_difference_is_one_warning_line_per_setting(files, capsys, tmp_path):
    folder = Path(files["out"]).parent
    argv = ["apply", "--matrix", folder / "settings_matrix.json", files["slow"], "-o", tmp_path / "unmixed",
            "--quiet"]
    assert main([str(a) for a in argv]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    settings = [line for line in err if "acquisition settings differ" in line]
    assert len(settings) == 1 and settings[0].startswith("warning: ")
    assert "channel green525 exposure_s is 0.4 in slow.ome.tif but 0.1 in" in settings[0]
