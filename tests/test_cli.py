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
    paths.update({p.stem.split(".")[0]: p for p in tmp_path.iterdir()})
    paths["out"] = tmp_path / "m.json"
    return paths


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
}


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
