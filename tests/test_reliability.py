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


def _matrix(folder: Path, values=((1.0, 0.02, 0.0), (0.25, 1.0, 0.0), (0.02, 0.39, 1.0)), name="m.json") -> Path:
    values = np.array(values)
    return BleedThroughMatrix(kind="measured", channels=tuple(CHANNELS), labels=("Pondpetal", "Fernlight", "Emberin"),
                              primary={"Pondpetal": "blue450", "Fernlight": "green525", "Emberin": "orange600"},
                              matrix=values, ci95_low=values - 0.01, ci95_high=values + 0.01,
                              background=np.full(3, 100.0), background_source="dark",
                              saturation=np.full(3, 4095.0)).save(folder / name)


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
        # No entry lost, even to a kill between the last rename and the manifest update.
        manifest = json.loads((out / "unmix-manifest.json").read_text())
        assert sorted(manifest["outputs"]) == [f"s{f}.unmixed.ome.tif" for f in range(3)]
    assert fingerprint(inputs + [str(matrix)]) == before  # inputs never modified


def _same_result(text: str, reference: str) -> bool:
    """Two matrix files alike but for the time they were made."""
    first, second = json.loads(text), json.loads(reference)
    for data in (first, second):
        data["provenance"].pop("created", None)
    return first == second


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
    # Either no output, or the whole one (the run may finish before the kill lands): never a part.
    assert not output.exists() or _same_result(output.read_text(), reference) or command == "report"
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


# --- output sets, shared folders, the manifest ----------------------------------------

def _matrix_b(folder: Path) -> Path:
    """A second matrix of the same channels and labels, other coefficients."""
    return _matrix(folder, ((1.0, 0.05, 0.01), (0.3, 1.0, 0.02), (0.05, 0.3, 1.0)), "b.json")


def _apply(matrix, inputs, out, *extra) -> tuple[int, str]:

    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(matrix), *map(str, inputs), "-o", str(out),
               "--quiet", *extra]
    done = subprocess.run(command, capture_output=True, text=True)
    return done.returncode, done.stderr


def _matrix_of(path: Path) -> str | None:
    record = read_provenance(path)
    return None if record is None else record["identity"]["matrix_sha256"]


def _set_made_with(out: Path, stem: str, matrix: Path, members=("unmixed", "saturation", "residual")) -> None:
    """Every member is there and records `matrix`; so does the manifest."""
    sha = load_matrix(matrix).sha256()
    for member in members:
        assert _matrix_of(out / f"{stem}.{member}.ome.tif") == sha, member
    entry = json.loads((out / "unmix-manifest.json").read_text())["outputs"][f"{stem}.unmixed.ome.tif"]
    assert entry["matrix_sha256"] == sha
    assert sorted(entry["members"]) == sorted(f"{stem}.{m}.ome.tif" for m in members)


def test_a_companion_of_another_matrix_is_never_kept(tmp_path):
    # --residual with A, then B with --overwrite (no residual), then B with --residual: the last
    # run must write B's residual, never keep A's.
    a, b = _matrix(tmp_path), _matrix_b(tmp_path)
    inputs = _batch(tmp_path, files=1, planes=2, size=32)
    out = tmp_path / "out"
    assert _apply(a, inputs, out, "--residual")[0] == 0
    assert _apply(b, inputs, out, "--overwrite")[0] == 0
    # A's residual belonged to the set B replaced: it is gone, not left beside B's outputs.
    assert not (out / "s0.residual.ome.tif").exists()
    assert _apply(b, inputs, out, "--residual")[0] == 0
    _set_made_with(out, "s0", b)


def test_a_mixed_set_is_refused_then_replaced_whole(tmp_path):
    # A run with --overwrite killed after renaming its first member leaves B's abundances beside
    # A's mask and residual: a rerun without --overwrite names the foreign member (exit 2);
    # with --overwrite it writes the whole set again, and the manifest records B.
    a, b = _matrix(tmp_path), _matrix_b(tmp_path)
    inputs = _batch(tmp_path, files=1, planes=2, size=32)
    assert _apply(a, inputs, tmp_path / "out", "--residual")[0] == 0
    assert _apply(b, inputs, tmp_path / "other", "--residual")[0] == 0
    (tmp_path / "out" / "s0.unmixed.ome.tif").write_bytes((tmp_path / "other" / "s0.unmixed.ome.tif").read_bytes())
    code, err = _apply(b, inputs, tmp_path / "out", "--residual")
    assert code == 2 and "s0.saturation.ome.tif" in err and "--overwrite" in err, err
    assert _apply(b, inputs, tmp_path / "out", "--residual", "--overwrite")[0] == 0
    _set_made_with(tmp_path / "out", "s0", b)


@pytest.mark.slow
def test_overwrite_killed_at_ten_moments_then_rerun(tmp_path):
    # Each member under a final name is always a complete output of A or of B; the rerun with
    # --overwrite leaves B's whole set and B in the manifest.
    a, b = _matrix(tmp_path), _matrix_b(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=12, size=96)
    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(b), *inputs, "--quiet", "--residual",
               "--overwrite"]
    start = time.monotonic()
    subprocess.run(command + ["-o", str(tmp_path / "timing")], check=True)
    duration = time.monotonic() - start
    shas = {load_matrix(a).sha256(), load_matrix(b).sha256()}
    for point in range(10):
        out = tmp_path / f"killed{point}"
        assert _apply(a, inputs, out, "--residual")[0] == 0
        process = subprocess.Popen(command + ["-o", str(out)])
        time.sleep(duration * (point + 0.5) / 10)
        process.send_signal(signal.SIGKILL)
        process.wait()
        for path in out.glob("*.ome.tif"):
            assert _matrix_of(path) in shas
            read_image(path)  # complete
        subprocess.run(command + ["-o", str(out)], check=True)
        for stem in ("s0", "s1"):
            _set_made_with(out, stem, b)
        assert not list(out.glob(".*.partial"))


def test_manifest_entry_lost_to_a_kill_is_repaired(tmp_path):
    # Killed between the last rename and the manifest update: the rerun keeps the outputs and
    # makes their entry again from their own records (counts included).
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=2, size=32)
    out = tmp_path / "out"
    assert _apply(matrix, inputs, out)[0] == 0
    manifest = json.loads((out / "unmix-manifest.json").read_text())
    entry = manifest["outputs"].pop("s1.unmixed.ome.tif")
    (out / "unmix-manifest.json").write_text(json.dumps(manifest))
    assert _apply(matrix, inputs, out)[0] == 0
    repaired = json.loads((out / "unmix-manifest.json").read_text())["outputs"]["s1.unmixed.ome.tif"]
    for key in ("input", "matrix_sha256", "members", "nan_pixels", "saturated_pixels"):
        assert repaired[key] == entry[key], key


@pytest.mark.slow
def test_two_runs_with_different_matrices_never_replace_each_other(tmp_path):
    # Started together into one folder without --overwrite, in six trials: every output set is
    # whole and made by one of the two matrices (the manifest agrees), and a run exits 0 exactly
    # when every set is its own; otherwise 2, the other run having written first.
    a, b = _matrix(tmp_path), _matrix_b(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=6, size=64)
    shas = {m: load_matrix(m).sha256() for m in (a, b)}
    for trial in range(6):
        out = tmp_path / f"shared{trial}"
        runs = {m: subprocess.Popen([sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(m), *inputs, "-o",
                                     str(out), "--quiet"], stderr=subprocess.PIPE, text=True) for m in (a, b)}
        codes = {m: run.wait() for m, run in runs.items()}
        owners = {}
        for stem in ("s0", "s1"):
            owners[stem] = next(m for m in (a, b) if _matrix_of(out / f"{stem}.unmixed.ome.tif") == shas[m])
            _set_made_with(out, stem, owners[stem], members=("unmixed", "saturation"))
        for m, code in codes.items():
            assert code == (0 if all(owner == m for owner in owners.values()) else 2), (m.name, runs[m].stderr.read())
        assert not list(out.glob(".*.partial"))


@pytest.mark.parametrize("content", ["{not json", '{"format": "something-else", "outputs": {}}', "folder"])
def test_a_manifest_that_is_not_ours_is_refused_before_anything_is_written(tmp_path, content):
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=1, planes=2, size=32)
    out = tmp_path / "out"
    out.mkdir()
    manifest = out / "unmix-manifest.json"
    if content == "folder":
        manifest.mkdir()
    else:
        manifest.write_text(content)
    code, err = _apply(matrix, inputs, out)
    assert code == 2 and err.count("error:") == 1 and "unmix-manifest.json" in err, err
    assert sorted(p.name for p in out.iterdir()) == ["unmix-manifest.json"]
    if content != "folder":
        assert manifest.read_text() == content  # its entries are not lost


def test_temporaries_are_removed_only_when_their_owner_is_surely_gone(tmp_path):
    # Same host, boot and PID namespace: the process id decides. Another machine or container:
    # only a lease untouched for LEASE_SECONDS (by the file system's clock) lets it go.
    import os

    from unmix.io.atomic import LEASE_SECONDS, machine_id, remove_stale_temporaries

    final = tmp_path / "x.unmixed.ome.tif"
    here = machine_id()
    dead = tmp_path / f".x.unmixed.ome.tif.999999999-{here}-aaaaaa.partial"
    alive = tmp_path / f".x.unmixed.ome.tif.{os.getppid()}-{here}-bbbbbb.partial"
    elsewhere = tmp_path / ".x.unmixed.ome.tif.999999999-0badf00d-cccccc.partial"
    abandoned = tmp_path / ".x.unmixed.ome.tif.999999999-0badf00d-dddddd.partial"
    for path in (dead, alive, elsewhere, abandoned):
        path.write_bytes(b"partial")
    old = time.time() - LEASE_SECONDS - 120
    os.utime(abandoned, (old, old))
    assert sorted(remove_stale_temporaries(final)) == sorted([dead, abandoned])
    assert alive.exists() and elsewhere.exists()


def test_long_input_names_give_short_temporaries(tmp_path):
    # A name near the 255-byte limit: temporaries stay within it; an output name beyond it is a
    # one-line error naming the input.
    from unmix.cli import main

    matrix = _matrix(tmp_path)
    (source,) = _batch(tmp_path, files=1, planes=1, size=16)
    fits = tmp_path / ("n" * (255 - len(".saturation.ome.tif") - len(".ome.tif")) + ".ome.tif")
    Path(source).rename(fits)
    assert main(["apply", "--matrix", str(matrix), str(fits), "-o", str(tmp_path / "out"), "--quiet"]) == 0
    too_long = tmp_path / ("n" * 240 + ".tif")
    fits.rename(too_long)
    code, err = _apply(matrix, [too_long], tmp_path / "out2")
    errors = [line for line in err.splitlines() if line.startswith("error:")]
    assert code == 2 and len(errors) == 1 and "255" in errors[0] and "nnnn" in errors[0], err
    assert all(line.startswith(("error:", "warning:")) for line in err.splitlines())
    assert not (tmp_path / "out2").exists()


def _unshared(command: list[str]) -> list[str]:
    """`command` in a new PID namespace (as a second machine would see process ids)."""
    return ["unshare", "--pid", "--fork", "--mount-proc", *command]


def _can_unshare() -> bool:
    import shutil

    return shutil.which("unshare") is not None and subprocess.run(
        _unshared(["true"]), capture_output=True).returncode == 0


@pytest.mark.slow
@pytest.mark.skipif(not _can_unshare(), reason="needs unshare --pid (root on Linux)")
def test_runs_in_two_pid_namespaces_share_an_output_folder(tmp_path):
    # The second run starts, in another PID namespace, while the first is writing: it must not
    # take the first's temporaries for a dead run's. Twelve trials, both runs succeed in each.
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=24, size=128)
    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(matrix), *inputs, "--quiet"]
    subprocess.run(command + ["-o", str(tmp_path / "clean")], check=True)
    names = [p.name for p in (tmp_path / "clean").glob("*.ome.tif")]
    for trial in range(12):
        out = tmp_path / f"shared{trial}"
        first = subprocess.Popen(command + ["-o", str(out)], stderr=subprocess.PIPE, text=True)
        deadline = time.monotonic() + 60
        while not list(out.glob(".*.partial")) and time.monotonic() < deadline and first.poll() is None:
            time.sleep(0.005)
        second = subprocess.Popen(_unshared(command + ["-o", str(out)]), stderr=subprocess.PIPE, text=True)
        for run in (first, second):
            assert run.wait() == 0, run.stderr.read()
        _same_outputs(tmp_path / "clean", out, names)
        assert not list(out.glob(".*.partial"))


@pytest.mark.slow
@pytest.mark.skipif(not _can_unshare(), reason="needs unshare --mount (root on Linux)")
def test_read_only_install_and_unwritable_home(tmp_path, demo):
    # The package folder mounted read-only and HOME where nothing can be written (a container's
    # service account): measure and apply still work, without warnings.
    package = Path(__file__).resolve().parent.parent / "unmix"
    matrix = _matrix(tmp_path)
    (sample,) = _batch(tmp_path, files=1, planes=1, size=32)
    control = demo["controls"]["Fernlight"][0]
    script = (f"mount --bind {package} {package} && mount -o remount,ro,bind {package} && "
              f"{sys.executable} -m unmix.cli measure --control Fernlight={control} --bootstrap 200 --quiet "
              f"-o {tmp_path / 'm.json'} && "
              f"{sys.executable} -m unmix.cli apply --matrix {matrix} {sample} -o {tmp_path / 'out'} --quiet")
    environment = {"PATH": "/usr/bin:/bin", "HOME": "/proc/no-home", "TMPDIR": str(tmp_path / "tmp")}
    (tmp_path / "tmp").mkdir()
    done = subprocess.run(["unshare", "--mount", "sh", "-c", script], capture_output=True, text=True,
                          env=environment)
    assert done.returncode == 0, done.stderr
    # Nothing about the compiled kernels' cache: at most the warnings about the (absent) acquisition settings.
    assert "cache" not in done.stderr and "locator" not in done.stderr, done.stderr
    assert all("acquisition settings" in line for line in done.stderr.splitlines()), done.stderr
    assert (tmp_path / "m.json").exists() and (tmp_path / "out" / "s0.unmixed.ome.tif").exists()
    assert list((tmp_path / "tmp").glob("unmix-numba-cache-*/*"))  # the kernels were cached there


# --- disk full: a real small file system (tmpfs) ---------------------------------------

def _can_mount() -> bool:
    import os
    import tempfile

    if os.geteuid() != 0:
        return False
    with tempfile.TemporaryDirectory() as folder:
        if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", folder],
                          capture_output=True).returncode != 0:
            return False
        subprocess.run(["umount", folder], check=True)
    return True


needs_mount = pytest.mark.skipif(not _can_mount(), reason="needs root to mount a small tmpfs")


@pytest.fixture
def small_disk(tmp_path):
    """A function mounting a tmpfs of `size` bytes at a new folder (unmounted afterwards)."""
    mounted = []

    def mount(size: int, fill: bool = False) -> Path:
        folder = tmp_path / f"disk{len(mounted)}"
        folder.mkdir()
        subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)], check=True)
        mounted.append(folder)
        if fill:  # nothing left for anyone
            import os

            handle = os.open(folder / ".filler", os.O_WRONLY | os.O_CREAT)
            with pytest.raises(OSError):
                while True:
                    os.write(handle, b"\0" * 4096)
            os.close(handle)
        return folder

    yield mount
    for folder in mounted:
        subprocess.run(["umount", "-l", str(folder)], check=False)


def _one_error(stderr: str, *expected: str) -> None:
    errors = [line for line in stderr.splitlines() if line and not line.startswith("warning:")]
    assert len(errors) == 1 and errors[0].startswith("error: ") and "Traceback" not in stderr, stderr
    for text in expected:
        assert text in errors[0], errors[0]


@needs_mount
def test_disk_full_during_a_tiff_batch_keeps_finished_outputs(tmp_path, small_disk):
    matrix = _matrix(tmp_path)
    inputs = _batch(tmp_path, files=2, planes=12, size=96)  # about 1.35 MB of outputs per input
    out = small_disk(2_000_000)
    code, err = _apply(matrix, inputs, out)
    assert code == 2
    _one_error(err, "s1.unmixed.ome.tif", "No space left", "free space")
    assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == [
        "s0.saturation.ome.tif", "s0.unmixed.ome.tif", "unmix-manifest.json"]
    assert not list(out.glob(".*.partial"))
    _set_made_with(out, "s0", matrix, members=("unmixed", "saturation"))


@needs_mount
def test_disk_full_during_a_zarr_batch_leaves_no_hidden_folder(tmp_path, small_disk):
    from unmix.io.images import Image, write_ome_zarr

    matrix = _matrix(tmp_path)
    rng = np.random.default_rng(3)
    source = tmp_path / "z.ome.zarr"
    write_ome_zarr(source, Image(rng.integers(90, 3000, size=(3, 40, 128, 128)).astype(np.uint16), "CZYX",
                                 tuple(CHANNELS)))
    for trial in range(3):
        out = small_disk(400_000 + 200_000 * trial)
        code, err = _apply(matrix, [source], out)
        assert code == 2
        _one_error(err, "No space left")
        assert list(out.iterdir()) == []  # no hidden ".partial" folder recreated by running tasks


def _full_disk_commands(tmp_path: Path, demo, disk: Path) -> dict:
    from unmix.io.shipped import shipped_dir

    matrix = _matrix(tmp_path)
    description = shipped_dir("configs") / "demo_optics.toml"
    predicted = tmp_path / "p.json"
    subprocess.run([sys.executable, "-m", "unmix.cli", "predict", "--config", str(description), "-o", str(predicted),
                    "--quiet"], check=True)
    measured = tmp_path / "measured.json"
    subprocess.run([sys.executable, "-m", "unmix.cli", "measure", *[
        f"--control={label}={','.join(map(str, paths))}" for label, paths in demo["controls"].items()],
        "--bootstrap", "200", "-o", str(measured), "--quiet"], check=True)
    return {
        "measure": ["measure", f"--control=Fernlight={demo['controls']['Fernlight'][0]}", "--bootstrap", "200",
                    "-o", str(disk / "m.json")],
        "predict": ["predict", "--config", str(description), "-o", str(disk / "p.json")],
        "compare": ["compare", str(measured), str(predicted), "-o", str(disk / "cmp")],
        "report": ["report", "--matrix", str(matrix), "-o", str(disk / "r.html")],
        "coloc": ["coloc", str(demo["sample"]), "--matrix", str(matrix), "--labels", "Pondpetal,Emberin",
                  "--rounds", "19", "--json", str(disk / "c.json")],
    }


@needs_mount
def test_disk_full_for_every_other_command_is_one_line(tmp_path, demo, small_disk):
    disk = small_disk(64 * 1024, fill=True)
    for name, argv in _full_disk_commands(tmp_path, demo, disk).items():
        done = subprocess.run([sys.executable, "-m", "unmix.cli", *argv, "--quiet"], capture_output=True, text=True)
        assert done.returncode == 2, (name, done.stderr)
        _one_error(done.stderr, "No space left")
        assert [p.name for p in disk.rglob("*") if p.name != ".filler"] in ([], ["cmp"]), name
