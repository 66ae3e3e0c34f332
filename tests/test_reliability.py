"""Nothing lost, nothing half-written, no crash on any input.

Kill tests (SIGKILL at many moments), two runs sharing an output folder, determinism, and
fuzzing of every reader with hypothesis (a small budget here; the large one is
tests/benchmarks/fuzz_readers.py).
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import fingerprint
from unmix.errors import InputError
from unmix.io.images import read_image, read_images, read_provenance
from unmix.matrix import BleedThroughMatrix, load_matrix

CHANNELS = ["blue450", "green525", "orange600"]
KILL_POINTS = 20


def _matrix(folder: Path) -> Path:
    values = np.array([[1.0, 0.02, 0.0], [0.25, 1.0, 0.0], [0.02, 0.39, 1.0]])
    return BleedThroughMatrix(kind="measured", channels=tuple(CHANNELS), labels=("Pondpetal", "Fernlight", "Emberin"),
                              primary={"Pondpetal": "blue450", "Fernlight": "green525", "Emberin": "orange600"},
                              matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01,
                              background=np.full(3, 100.0), background_source="dark",
                              saturation=np.full(3, 4095.0)).save(folder / "m.json")


def _batch(folder: Path, files: int = 3, planes: int = 12, size: int = 96) -> list[str]:
    rng = np.random.default_rng(5)
    paths = []
    for f in range(files):
        data = rng.integers(90, 3000, size=(planes, 3, size, size)).astype(np.uint16)
        path = folder / f"s{f}.ome.tif"
        tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                         metadata={"axes": "ZCYX", "Channel": {"Name": CHANNELS}})
        paths.append(str(path))
    return paths


def _same_outputs(clean: Path, other: Path, names) -> None:
    for name in names:
        a, b = read_image(clean / name), read_image(other / name)
        np.testing.assert_array_equal(a.data, b.data)
        assert a.channel_names == b.channel_names and a.axes == b.axes
        first, second = read_provenance(clean / name), read_provenance(other / name)
        if first is not None:
            for record in (first, second):
                record.pop("created", None)
            assert first == second


def _complete_or_absent(out: Path, clean: Path) -> None:
    """Every file under a final name is complete: readable and equal to the uninterrupted run's."""
    for path in out.glob("*.ome.tif"):
        _same_outputs(clean, out, [path.name])
    manifest = out / "unmix-manifest.json"
    if manifest.exists():
        assert isinstance(json.loads(manifest.read_text()), dict)


@pytest.mark.slow
def test_apply_killed_at_twenty_moments_then_rerun(tmp_path):
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path)
    before = fingerprint(inputs + [str(matrix)])
    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(matrix), *inputs, "--quiet"]
    start = time.monotonic()
    subprocess.run(command + ["-o", str(tmp_path / "clean")], check=True)
    duration = time.monotonic() - start
    names = [p.name for p in (tmp_path / "clean").glob("*.ome.tif")]
    assert len(names) == 6
    for point in range(KILL_POINTS):
        out = tmp_path / f"killed{point}"
        process = subprocess.Popen(command + ["-o", str(out)])
        time.sleep(duration * (point + 0.5) / KILL_POINTS)
        process.send_signal(signal.SIGKILL)
        process.wait()
        if out.exists():
            _complete_or_absent(out, tmp_path / "clean")
        subprocess.run(command + ["-o", str(out)], check=True)
        assert not list(out.glob(".*.partial"))
        _same_outputs(tmp_path / "clean", out, names)
    assert fingerprint(inputs + [str(matrix)]) == before  # inputs never modified


@pytest.mark.slow
@pytest.mark.parametrize("command", ["measure", "report"])
def test_measure_and_report_killed_then_rerun(tmp_path, demo, command):
    if command == "measure":
        c = demo["controls"]
        args = ["measure", *[f"--control={label}={','.join(map(str, paths))}" for label, paths in c.items()],
                "--unstained", str(demo["unstained"]), "--bootstrap", "2000", "--quiet"]
        output = tmp_path / "m.json"
    else:
        args = ["report", "--matrix", str(_matrix(tmp_path)), "--quiet"]
        output = tmp_path / "r.html"
    full = [sys.executable, "-m", "unmix.cli", *args, "-o", str(output)]
    start = time.monotonic()
    subprocess.run(full, check=True)
    duration = time.monotonic() - start
    reference = output.read_text()
    output.unlink()
    process = subprocess.Popen(full)
    time.sleep(duration * 0.7)
    process.send_signal(signal.SIGKILL)
    process.wait()
    assert not output.exists() or output.read_text() == reference or command == "report"
    subprocess.run(full, check=True)
    assert not list(tmp_path.glob(".*.partial"))
    if command == "measure":
        first, second = json.loads(reference), json.loads(output.read_text())
        for record in (first, second):
            record["provenance"].pop("created")
        assert first == second  # seeded: the same matrix again


def test_two_runs_sharing_an_output_folder(tmp_path):
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=4, planes=6, size=64)
    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(matrix), *inputs, "--quiet"]
    subprocess.run(command + ["-o", str(tmp_path / "clean")], check=True)
    runs = [subprocess.Popen(command + ["-o", str(tmp_path / "shared")], stderr=subprocess.PIPE) for _ in range(2)]
    for run in runs:
        run.wait()
        assert run.returncode == 0, run.stderr.read()
    names = [p.name for p in (tmp_path / "clean").glob("*.ome.tif")]
    _same_outputs(tmp_path / "clean", tmp_path / "shared", names)
    manifest = json.loads((tmp_path / "shared" / "unmix-manifest.json").read_text())
    assert len(manifest["outputs"]) == 4  # no entry lost to the other run
    assert not list((tmp_path / "shared").glob(".*"))  # no temporary, no lock file left


def test_same_inputs_and_seed_give_identical_results(tmp_path, demo):
    from unmix.cli import main

    matrix = _matrix(tmp_path)
    outputs = []
    for run in range(2):
        out = tmp_path / f"c{run}.json"
        assert main(["coloc", str(demo["sample"]), "--matrix", str(matrix), "--labels", "Fernlight,Emberin",
                     "--rounds", "49", "--seed", "3", "--json", str(out), "--quiet"]) == 0
        outputs.append(json.loads(out.read_text()))
    assert outputs[0] == outputs[1]


# --- fuzzing ------------------------------------------------------------------------

def _mutations():
    """Bit flips, truncation, insertion of random bytes and extreme numbers."""
    return st.one_of(
        st.tuples(st.just("flip"), st.integers(0, 10**6), st.integers(0, 7)),
        st.tuples(st.just("truncate"), st.integers(0, 10**6), st.just(0)),
        st.tuples(st.just("insert"), st.integers(0, 10**6), st.binary(min_size=1, max_size=16)),
        st.tuples(st.just("number"), st.integers(0, 10**6), st.sampled_from(
            [b"1e309", b"-1e309", b"NaN", b"-0", b"99999999999999999999", b"1e-320", b"\"x\"", b"[]", b"{}"])),
    )


def mutate(data: bytes, mutation) -> bytes:
    kind, position, value = mutation
    if not data:
        return data
    position %= len(data)
    if kind == "flip":
        return data[:position] + bytes([data[position] ^ (1 << value)]) + data[position + 1:]
    if kind == "truncate":
        return data[:position]
    return data[:position] + value + data[position:]


def _seed_files(folder: Path) -> dict:
    """One valid file per reader (invented content)."""
    matrix = _matrix(folder)
    description = folder / "d.toml"
    description.write_text('[description]\nformat = "unmix-description"\nversion = 1\n\n[[label]]\nname = "A"\n'
                           'excitation = { peak_nm = 490, fwhm_nm = 40 }\nemission = { csv = "em.csv" }\n'
                           'extinction = 70000\nquantum_yield = 0.8\n\n[[channel]]\nname = "g"\n'
                           'source = { laser_nm = 488.0, power_mw = 3.0 }\nemission_filter = { band = "525/50" }\n')
    spectrum = folder / "em.csv"
    spectrum.write_text("wavelength,value\n480,0\n500,20\n520,100\n560,40\n620,0\n")
    image = folder / "i.ome.tif"
    tifffile.imwrite(image, np.arange(3 * 16 * 16, dtype=np.uint16).reshape(3, 16, 16), ome=True,
                     metadata={"axes": "CYX", "Channel": {"Name": CHANNELS}})
    return {"matrix": matrix, "description": description, "spectrum": spectrum, "image": image}


def read_with(kind: str, path: Path):
    """The reader of each kind of user file."""
    from unmix.optics.description import load_description
    from unmix.optics.spectra import read_spectrum_csv

    if kind == "matrix":
        return load_matrix(path)
    if kind == "description":
        return load_description(path)
    if kind == "spectrum":
        return read_spectrum_csv(path)
    return [np.asarray(image.data) for image in read_images(path)]


@pytest.fixture(scope="module")
def seeds(tmp_path_factory):
    return _seed_files(tmp_path_factory.mktemp("seeds"))


@pytest.mark.parametrize("kind", ["matrix", "description", "spectrum", "image"])
def test_readers_never_crash_on_mutated_files(kind, seeds, tmp_path_factory):
    folder = tmp_path_factory.mktemp(f"fuzz_{kind}")
    original = Path(seeds[kind]).read_bytes()
    # The description's CSV must sit beside it.
    (folder / "em.csv").write_bytes(Path(seeds["spectrum"]).read_bytes())
    target = folder / Path(seeds[kind]).name

    @settings(max_examples=60, deadline=None, derandomize=True,
              suppress_health_check=[HealthCheck.function_scoped_fixture])
    @given(st.lists(_mutations(), min_size=1, max_size=4))
    def check(mutations):
        data = original
        for mutation in mutations:
            data = mutate(data, mutation)
        target.write_bytes(data)
        try:
            read_with(kind, target)
        except InputError as exc:
            assert "\n" not in str(exc) and str(target.name) in str(exc) or kind == "description"

    check()


def test_no_subcommand_modifies_its_inputs(tmp_path, demo):
    # sha256 and modification time of every input, before and after each subcommand.
    import shutil

    from unmix.cli import main

    configs = Path(__file__).parent.parent / "configs"
    for name in ("demo_optics.toml", "label_shapes.toml"):
        shutil.copy(configs / name, tmp_path / name)
    matrix = _matrix(tmp_path)
    sample = tmp_path / "sample.ome.tif"
    shutil.copy(demo["sample"], sample)
    inputs = [str(p) for p in (matrix, sample, tmp_path / "demo_optics.toml", tmp_path / "label_shapes.toml")]
    before = fingerprint(inputs)
    commands = [
        ["predict", "--config", str(tmp_path / "demo_optics.toml"), "-o", str(tmp_path / "p.json")],
        ["compare", str(matrix), str(tmp_path / "p.json"), "-o", str(tmp_path / "cmp")],
        ["plan", str(tmp_path / "demo_optics.toml")],
        ["apply", "--matrix", str(matrix), str(sample), "-o", str(tmp_path / "out")],
        ["coloc", str(sample), "--matrix", str(matrix), "--labels", "Pondpetal,Emberin", "--rounds", "19",
         "--json", str(tmp_path / "c.json")],
        ["report", "--matrix", str(matrix), "--predicted", str(tmp_path / "p.json"), "--coloc",
         str(tmp_path / "c.json"), "-o", str(tmp_path / "r.html")],
    ]
    for argv in commands:
        assert main([*argv, "--quiet"]) == 0, argv
        assert fingerprint(inputs) == before, argv[0]


def test_output_folder_read_only_mid_batch_keeps_finished_files(tmp_path, monkeypatch, capsys):
    # Simulated (root ignores permission bits): writing the second input's output fails with
    # EACCES; the first output stays, the second leaves nothing, one clear error line, exit 2.
    import errno

    import unmix.engine.batch as batch
    from unmix.cli import main

    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=2, size=32)
    real = batch._write_outputs
    calls = []

    def read_only_after_first(*args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise PermissionError(errno.EACCES, "Permission denied")
        return real(*args, **kwargs)

    monkeypatch.setattr(batch, "_write_outputs", read_only_after_first)
    assert main(["apply", "--matrix", str(matrix), *inputs, "-o", str(tmp_path / "out"), "--quiet"]) == 2
    errors = [line for line in capsys.readouterr().err.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and "s1.unmixed.ome.tif" in errors[0] and "Permission denied" in errors[0]
    names = sorted(p.name for p in (tmp_path / "out").iterdir() if not p.name.startswith("."))
    assert names == ["s0.saturation.ome.tif", "s0.unmixed.ome.tif", "unmix-manifest.json"]
    read_image(tmp_path / "out" / "s0.unmixed.ome.tif")


@pytest.mark.slow
def test_a_dask_worker_dying_mid_run_changes_nothing(tmp_path):
    # Two worker processes; one is killed while the batch runs: its tasks are computed again
    # on the other, and the outputs equal the local run's.
    import os
    import threading

    from distributed import Client, LocalCluster

    from unmix.engine.batch import ApplySettings, apply_matrix

    matrix = load_matrix(_matrix(tmp_path))
    inputs = _batch(tmp_path, files=2, planes=48, size=256)
    apply_matrix(matrix, inputs, tmp_path / "local")
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        pids = list(client.run(os.getpid).values())
        results = {}
        run = threading.Thread(target=lambda: results.update(out=apply_matrix(
            matrix, inputs, tmp_path / "cluster", settings=ApplySettings(batch_blocks=2),
            scheduler=cluster.scheduler_address)))
        run.start()
        deadline = time.monotonic() + 120
        while not list((tmp_path / "cluster").glob(".s0.unmixed*.partial")) and time.monotonic() < deadline:
            time.sleep(0.01)  # until the first output is being written
        assert run.is_alive()  # the batch is running when the worker dies
        os.kill(pids[0], signal.SIGKILL)
        run.join(timeout=300)
        assert not run.is_alive()
    assert all(r.status == "written" for r in results["out"])
    names = [p.name for p in (tmp_path / "local").glob("*.ome.tif")]
    _same_outputs(tmp_path / "local", tmp_path / "cluster", names)
