"""`unmix apply`: batch unmixing, outputs, resume and refusals."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
import tifffile

from conftest import fingerprint
from unmix.cli import main
from unmix.io.images import read_image, read_provenance
from unmix.matrix import BleedThroughMatrix, load_matrix
from unmix.measure.controls import MeasureSettings, measure_files
from unmix.engine.solver import Unmixer


@pytest.fixture(scope="module")
def demo_matrix(tmp_path_factory, demo):
    path = tmp_path_factory.mktemp("matrix") / "m.json"
    measure_files(demo["controls"], unstained=demo["unstained"], settings=MeasureSettings(n_boot=200)).save(path)
    return path


def _run(argv, capsys):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, [line for line in captured.err.splitlines() if line]


def test_demo_sample_recovers_ground_truth(demo, demo_matrix, tmp_path, capsys):
    # Self-consistency on the invented demo: abundances match the simulated truth within noise.
    before = fingerprint([demo["sample"], demo_matrix])
    code, out, err = _run(["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path], capsys)
    assert code == 0, err
    assert "Noise penalty" in out and "condition number" in out
    result = read_image(tmp_path / "sample.unmixed.ome.tif")
    truth = read_image(Path(demo["sample"]).with_name("sample_truth.ome.tif"))
    assert result.channel_names == truth.channel_names and result.data.dtype == np.float32
    for k in range(3):
        error = result.data[k] - truth.data[k]
        assert abs(error.mean()) < 0.01 * truth.data[k].max()
        assert np.corrcoef(result.data[k].ravel(), truth.data[k].ravel())[0, 1] > 0.98
    provenance = read_provenance(tmp_path / "sample.unmixed.ome.tif")
    assert provenance["matrix"]["sha256"] == load_matrix(demo_matrix).sha256()
    assert provenance["method"] == "nnls" and provenance["input"]["name"] == "sample.ome.tif"
    assert read_image(tmp_path / "sample.saturation.ome.tif").channel_names == ("saturated",)
    manifest = json.loads((tmp_path / "unmix-manifest.json").read_text())
    assert "sample.unmixed.ome.tif" in manifest["outputs"]
    assert fingerprint([demo["sample"], demo_matrix]) == before


def test_rerun_keeps_finished_outputs_and_refuses_other_settings(demo, demo_matrix, tmp_path, capsys):
    argv = ["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path]
    assert _run(argv, capsys)[0] == 0
    output = tmp_path / "sample.unmixed.ome.tif"
    stamp = output.stat().st_mtime_ns
    code, out, _ = _run(argv, capsys)
    assert code == 0 and "kept" in out and output.stat().st_mtime_ns == stamp
    code, _, err = _run(argv + ["--method", "ls"], capsys)
    assert code == 2 and "--overwrite" in err[-1] and output.stat().st_mtime_ns == stamp
    assert _run(argv + ["--method", "ls", "--overwrite"], capsys)[0] == 0
    assert read_provenance(output)["method"] == "ls"


def _stack_file(path, data, axes, names):
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": axes, "Channel": {"Name": list(names)}})
    return path


def test_z_stack_blocks_equal_the_kernel(tmp_path, capsys):
    matrix = BleedThroughMatrix(kind="measured", channels=("a", "b", "c"), labels=("P", "Q"),
                                primary={"P": "a", "Q": "b"},
                                matrix=np.array([[1.0, 0.2], [0.3, 1.0], [0.1, 0.4]]),
                                background=np.array([10.0, 12.0, 9.0]), background_source="dark")
    matrix_path = matrix.save(tmp_path / "m.json")
    rng = np.random.default_rng(0)
    data = rng.integers(0, 3000, size=(4, 3, 40, 50)).astype(np.uint16)  # Z C Y X
    source = _stack_file(tmp_path / "z.ome.tif", data, "ZCYX", "abc")
    code, _, err = _run(["apply", "--matrix", matrix_path, source, "-o", tmp_path / "out", "--quiet"], capsys)
    assert code == 0, err
    result = read_image(tmp_path / "out" / "z.unmixed.ome.tif")
    assert result.axes == "CZYX" and result.data.shape == (2, 4, 40, 50)  # read back in canonical order
    with tifffile.TiffFile(tmp_path / "out" / "z.unmixed.ome.tif") as stored:  # as stored: the input's order
        assert stored.series[0].axes == "ZCYX" and stored.series[0].shape == (4, 2, 40, 50)
    expected = Unmixer(matrix.matrix).unmix(np.moveaxis(data, 1, 0), matrix.background)
    np.testing.assert_array_equal(result.data, expected)


def _record_many(manifest, start, count):
    from unmix.io.atomic import folder_lock, write_text_atomic

    for i in range(start, start + count):
        with folder_lock(manifest.with_name(f".{manifest.name}.lock")):
            entries = json.loads(manifest.read_text()) if manifest.exists() else {"outputs": {}}
            entries["outputs"][f"out{i}.unmixed.ome.tif"] = {"input": f"in{i}.tif"}
            write_text_atomic(manifest, json.dumps(entries))


def test_manifest_updates_are_exclusive_and_leave_no_lock_file(tmp_path):
    # Four processes add 25 entries each to one manifest: none is lost (the lock excludes the
    # others while one reads, updates and replaces it), and no lock file stays behind.
    import multiprocessing

    manifest = tmp_path / "unmix-manifest.json"
    processes = [multiprocessing.get_context("fork").Process(target=_record_many, args=(manifest, 25 * i, 25))
                 for i in range(4)]
    for process in processes:
        process.start()
    for process in processes:
        process.join()
        assert process.exitcode == 0
    assert len(json.loads(manifest.read_text())["outputs"]) == 100
    assert sorted(p.name for p in tmp_path.iterdir()) == ["unmix-manifest.json"]


def test_nan_pixels_give_nan_and_are_counted(tmp_path, demo_matrix, capsys):
    data = np.full((3, 20, 20), 150, np.float32)
    data[1, 3, 4] = np.nan
    source = _stack_file(tmp_path / "nan.ome.tif", data, "CYX", ["blue450", "green525", "orange600"])
    code, out, _ = _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "out"], capsys)
    assert code == 0
    result = read_image(tmp_path / "out" / "nan.unmixed.ome.tif").data
    assert np.isnan(result[:, 3, 4]).all() and np.isfinite(result).sum() == 3 * 399
    assert " 1 " in out.splitlines()[-1]  # the NaN count in the summary table


def test_extra_channels_are_ignored_with_a_warning(tmp_path, demo_matrix, capsys):
    data = np.full((4, 16, 16), 150, np.uint16)
    source = _stack_file(tmp_path / "x.ome.tif", data, "CYX", ["blue450", "green525", "orange600", "far700"])
    code, _, err = _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "out"], capsys)
    assert code == 0 and any(line.startswith("warning:") and "far700" in line for line in err)


def _broken_batch(tmp_path, demo):
    good = tmp_path / "good.ome.tif"
    good.write_bytes(Path(demo["sample"]).read_bytes())
    wrong = _stack_file(tmp_path / "wrong.ome.tif", np.zeros((2, 8, 8), np.uint16), "CYX", ["u", "v"])
    return good, wrong


def test_broken_file_in_batch_others_finish(tmp_path, demo, demo_matrix, capsys):
    good, wrong = _broken_batch(tmp_path, demo)
    code, _, err = _run(["apply", "--matrix", demo_matrix, wrong, good, "-o", tmp_path / "out"], capsys)
    assert code == 2
    errors = [line for line in err if not line.startswith("warning:")]
    assert len(errors) == 1 and "wrong.ome.tif" in errors[0]
    assert (tmp_path / "out" / "good.unmixed.ome.tif").exists()
    assert not (tmp_path / "out" / "wrong.unmixed.ome.tif").exists()


def _predicted(tmp_path):
    matrix = BleedThroughMatrix(kind="predicted", channels=("blue450", "green525", "orange600"),
                                labels=("Pondpetal", "Fernlight"), primary={"Pondpetal": "blue450", "Fernlight": "green525"},
                                matrix=np.array([[1.0, 0.02], [0.12, 1.0], [0.03, 0.35]]))
    return matrix.save(tmp_path / "predicted.json")


def _rank_deficient(tmp_path):
    data = BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"),
                              labels=("A", "B"), primary={"A": "blue450", "B": "green525"},
                              matrix=np.array([[1.0, 1.0], [1.0, 1.0], [0.5, 0.5]]),
                              background=np.zeros(3), background_source="dark").to_dict()
    path = tmp_path / "rank.json"
    path.write_text(json.dumps(data))
    return path


def _collinear(tmp_path):
    # Labels B and C differ by 1e-7 in one coefficient: column-scaled condition number about 1e7.
    values = np.array([[1.0, 0.2, 0.2], [0.2, 1.0, 1.0], [0.1, 0.3, 0.3 + 1e-7]])
    return BleedThroughMatrix(kind="measured", channels=("blue450", "green525", "orange600"), labels=("A", "B", "C"),
                              primary={"A": "blue450", "B": "green525", "C": "green525"}, matrix=values,
                              background=np.zeros(3), background_source="dark").save(tmp_path / "collinear.json")


def _too_many_labels(tmp_path):
    values = np.array([[1.0, 0.3, 1.0], [0.2, 1.0, 0.5]])
    return BleedThroughMatrix(kind="measured", channels=("blue450", "green525"), labels=("A", "B", "C"),
                              primary={"A": "blue450", "B": "green525", "C": "blue450"}, matrix=values,
                              background=np.zeros(2), background_source="dark").save(tmp_path / "three.json")


APPLY_BAD_INPUT = {
    "missing input": (lambda t, d, m: ["--matrix", m, t / "none.tif", "-o", t / "out"], "none.tif"),
    "glob matches nothing": (lambda t, d, m: ["--matrix", m, str(t / "*.nothing"), "-o", t / "out"], "matches no file"),
    "corrupted matrix": (lambda t, d, m: ["--matrix", d["sample"], d["sample"], "-o", t / "out"], "sample.ome.tif"),
    "missing matrix": (lambda t, d, m: ["--matrix", t / "nope.json", d["sample"], "-o", t / "out"], "nope.json"),
    "channel mismatch": (lambda t, d, m: ["--matrix", m, _stack_file(t / "uv.ome.tif", np.zeros((2, 8, 8), np.uint16),
                                                                      "CYX", ["u", "v"]), "-o", t / "out"], "uv.ome.tif"),
    "same output name": (lambda t, d, m: ["--matrix", m, d["sample"], _copy(d["sample"], t / "sample.tif"), "-o",
                                          t / "out"], "same output name"),
    "output replaces an input": (lambda t, d, m: ["--matrix", m, _copy(d["sample"], t / "a.tif"),
                                                  _copy(d["sample"], t / "a.unmixed.ome.tif"), "-o", t],
                                 "replace an input"),
    "predicted without background": (lambda t, d, m: ["--matrix", _predicted(t), d["sample"], "-o", t / "out"],
                                     "--background"),
    "rank-deficient matrix": (lambda t, d, m: ["--matrix", _rank_deficient(t), d["sample"], "-o", t / "out"],
                              "rank-deficient"),
    "matrix above the condition limit": (lambda t, d, m: ["--matrix", _collinear(t), d["sample"], "-o", t / "out"],
                                         "labels 'B', 'C' are nearly collinear"),
    "more labels than channels": (lambda t, d, m: ["--matrix", _too_many_labels(t), d["sample"], "-o", t / "out"],
                                  "3 labels but only 2 channels"),
    "uncertainty without noise model or intervals": (
        lambda t, d, m: ["--matrix", _predicted(t), d["sample"], "-o", t / "out", "--background", "estimate",
                         "--uncertainty"], "--uncertainty needs"),
    "bad weights": (lambda t, d, m: ["--matrix", m, d["sample"], "-o", t / "out", "--weights", "magic"], "--weights"),
    "bad method": (lambda t, d, m: ["--matrix", m, d["sample"], "-o", t / "out", "--method", "magic"], "--method"),
    "missing background file": (lambda t, d, m: ["--matrix", m, d["sample"], "-o", t / "out", "--background",
                                                 t / "dark.tif"], "dark.tif"),
    "output is the matrix": (lambda t, d, m: ["--matrix", m, d["sample"], "-o", m], "also an input"),
    "output is a file": (lambda t, d, m: ["--matrix", m, d["sample"], "-o", _copy(m, t / "x.json")], "is a file"),
    "damaged strip": (lambda t, d, m: ["--matrix", m, _corrupt_strip(t), "-o", t / "out"], "damaged image data"),
}


def _corrupt_strip(folder: Path) -> Path:
    """A zlib-compressed OME-TIFF whose second strip is overwritten with garbage."""
    rng = np.random.default_rng(7)
    path = folder / "corrupt.ome.tif"
    tifffile.imwrite(path, rng.integers(90, 3000, size=(3, 64, 64)).astype(np.uint16), ome=True,
                     compression="zlib", rowsperstrip=16, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    data = bytearray(path.read_bytes())
    with tifffile.TiffFile(path) as tif:
        offset = tif.pages[1].dataoffsets[1]
    data[offset:offset + 20] = b"\xff" * 20
    path.write_bytes(bytes(data))
    return path


def _copy(source, target):
    Path(target).write_bytes(Path(source).read_bytes())
    return target


@pytest.mark.parametrize("case", list(APPLY_BAD_INPUT))
def test_apply_bad_input(case, tmp_path, demo, demo_matrix, capsys):
    build, expected = APPLY_BAD_INPUT[case]
    argv = ["apply", *build(tmp_path, demo, demo_matrix)]
    listing = sorted(p.name for p in tmp_path.rglob("*"))
    before = fingerprint([p for p in tmp_path.rglob("*") if p.is_file()] + [demo["sample"], demo_matrix])
    code, _, err = _run(argv, capsys)
    assert code == 2
    errors = [line for line in err if not line.startswith("warning:")]
    assert len(errors) == 1 and errors[0].startswith("error: ") and expected in errors[0], err
    assert sorted(p.name for p in tmp_path.rglob("*")) == listing  # nothing written
    assert fingerprint([p for p in tmp_path.rglob("*") if p.is_file()] + [demo["sample"], demo_matrix]) == before


def test_read_only_output_folder(tmp_path, demo, demo_matrix, capsys, monkeypatch):
    # Simulated: the session runs as root, which ignores permission bits.
    out = tmp_path / "ro"
    out.mkdir()
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode: False if Path(p) == out else real_access(p, mode))
    code, _, err = _run(["apply", "--matrix", demo_matrix, demo["sample"], "-o", out], capsys)
    assert code == 2 and "not writable" in err[-1]
    assert list(out.iterdir()) == []


def test_failed_write_leaves_no_output(tmp_path, demo, demo_matrix, capsys, monkeypatch):
    # Disk full, simulated: writing fails after the first plane; no file appears under a final name.
    import unmix.engine.batch as batch

    real = batch._early_writeback

    def full_disk(planes, handle):
        planes = real(planes, handle)
        yield next(planes)
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(batch, "_early_writeback", full_disk)
    code, _, err = _run(["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path / "out"], capsys)
    assert code == 2 and "No space left" in err[-1] and "free space" in err[-1]
    assert not (tmp_path / "out").exists()  # not even the folder this run would have made


def test_several_series_are_unmixed_series_by_series(tmp_path, demo_matrix, capsys):
    rng = np.random.default_rng(4)
    names = ["blue450", "green525", "orange600"]
    series = [rng.integers(90, 3000, size=(3, 32, 40)).astype(np.uint16) for _ in range(2)]
    with tifffile.TiffWriter(tmp_path / "multi.ome.tif", ome=True) as writer:
        for data in series:
            writer.write(data, photometric="minisblack", metadata={"axes": "CYX", "Channel": {"Name": names}})
    code, _, err = _run(["apply", "--matrix", demo_matrix, tmp_path / "multi.ome.tif", "-o", tmp_path / "out"],
                        capsys)
    assert code == 0, err
    from unmix.io.images import read_images

    outputs = read_images(tmp_path / "out" / "multi.unmixed.ome.tif")
    matrix = load_matrix(demo_matrix)
    assert len(outputs) == 2
    for data, output in zip(series, outputs):
        np.testing.assert_array_equal(output.data, Unmixer(matrix.matrix).unmix(data, matrix.background))
    assert len(read_images(tmp_path / "out" / "multi.saturation.ome.tif")) == 2


@pytest.mark.slow
def test_dask_cluster_gives_the_same_output_as_local_threads(tmp_path, demo, demo_matrix, capsys):
    # A real dask.distributed LocalCluster with two worker processes on loopback.
    from distributed import LocalCluster

    rng = np.random.default_rng(2)
    stack = rng.integers(90, 3000, size=(3, 3, 64, 64)).astype(np.uint16)  # Z C Y X
    source = _stack_file(tmp_path / "stack.ome.tif", stack, "ZCYX", ["blue450", "green525", "orange600"])
    assert _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "local", "--quiet"], capsys)[0] == 0
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        code, _, err = _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "cluster", "--quiet",
                             "--scheduler", cluster.scheduler_address], capsys)
    assert code == 0, err
    local = read_image(tmp_path / "local" / "stack.unmixed.ome.tif").data
    remote = read_image(tmp_path / "cluster" / "stack.unmixed.ome.tif").data
    np.testing.assert_array_equal(local, remote)


def test_unreachable_scheduler_is_a_clear_error(tmp_path, demo, demo_matrix, capsys):
    code, _, err = _run(["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path / "out",
                         "--scheduler", "tcp://127.0.0.1:9"], capsys)
    assert code == 2 and "--scheduler" in err[-1]
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_killed_batch_rerun_gives_identical_outputs(tmp_path, demo_matrix):
    # SIGKILL in the middle of a batch, then the same command again: the
    # outputs equal those of an uninterrupted run (pixels and metadata, apart
    # from the recorded time), and no file under a final name is incomplete.
    import signal
    import subprocess
    import sys
    import time

    rng = np.random.default_rng(9)
    inputs = []
    for f in range(3):
        data = rng.integers(90, 3000, size=(24, 3, 128, 128)).astype(np.uint16)
        inputs.append(str(_stack_file(tmp_path / f"s{f}.ome.tif", data, "ZCYX", ["blue450", "green525", "orange600"])))
    command = [sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(demo_matrix), *inputs, "--quiet"]
    subprocess.run(command + ["-o", str(tmp_path / "clean")], check=True)

    out = tmp_path / "killed"
    process = subprocess.Popen(command + ["-o", str(out)])
    deadline = time.monotonic() + 60
    while not (out / "s0.unmixed.ome.tif").exists() and time.monotonic() < deadline:
        time.sleep(0.01)
    time.sleep(0.02)  # into the writing of the second file, or between an output and its mask
    process.send_signal(signal.SIGKILL)
    process.wait()
    for path in out.glob("*.ome.tif"):
        read_image(path)  # every file under a final name is complete and readable
    subprocess.run(command + ["-o", str(out)], check=True)
    assert not list(out.glob(".*.partial"))  # the killed run's temporaries are cleaned up
    for f in range(3):
        clean = read_image(tmp_path / "clean" / f"s{f}.unmixed.ome.tif")
        again = read_image(out / f"s{f}.unmixed.ome.tif")
        np.testing.assert_array_equal(clean.data, again.data)
        assert clean.channel_names == again.channel_names and clean.axes == again.axes
        first = read_provenance(tmp_path / "clean" / f"s{f}.unmixed.ome.tif")
        second = read_provenance(out / f"s{f}.unmixed.ome.tif")
        for record in (first, second):
            record.pop("created")
        assert first == second


def test_interrupted_output_without_its_mask_is_redone(tmp_path, demo, demo_matrix, capsys):
    # Killed between renaming the abundances and writing the mask: the rerun completes it.
    argv = ["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path, "--quiet"]
    assert _run(argv, capsys)[0] == 0
    (tmp_path / "sample.saturation.ome.tif").unlink()
    from unmix.io.atomic import machine_id

    # Owned by a process of this machine that no longer runs.
    stale = [tmp_path / f".sample.unmixed.ome.tif.999999999-{machine_id()}-abcdef.partial",
             tmp_path / f".unmix-manifest.json.999999999-{machine_id()}-abcdef.partial"]
    for path in stale:
        path.write_bytes(b"half")
    assert _run(argv, capsys)[0] == 0
    assert (tmp_path / "sample.saturation.ome.tif").exists()
    assert not any(path.exists() for path in stale)


def test_ome_zarr_input_gives_ome_zarr_output(tmp_path, demo_matrix, capsys):
    # Reference reader: ome-zarr finds the written image; pixels equal the kernel's.
    from ome_zarr.io import parse_url
    from ome_zarr.reader import Reader

    from unmix.io.images import Image, write_ome_zarr

    rng = np.random.default_rng(6)
    data = rng.integers(90, 3000, size=(3, 2, 24, 30)).astype(np.uint16)  # C Z Y X
    source = write_ome_zarr(tmp_path / "z.ome.zarr", Image(data, "CZYX", ("blue450", "green525", "orange600")))
    argv = ["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "out", "--quiet", "--residual"]
    code, _, err = _run(argv, capsys)
    assert code == 0, err
    output = tmp_path / "out" / "z.unmixed.ome.zarr"
    result = read_image(output)
    matrix = load_matrix(demo_matrix)
    assert result.axes == "CZYX" and result.channel_names == matrix.labels
    np.testing.assert_array_equal(result.data, Unmixer(matrix.matrix).unmix(data, matrix.background))
    nodes = list(Reader(parse_url(str(output)))())
    np.testing.assert_array_equal(np.asarray(nodes[0].data[0]), result.data)
    assert (tmp_path / "out" / "z.saturation.ome.zarr").is_dir()
    assert (tmp_path / "out" / "z.residual.ome.zarr").is_dir()
    assert _run(argv, capsys)[0] == 0  # rerun: kept
    assert read_provenance(output)["matrix"]["sha256"] == matrix.sha256()


@pytest.mark.parametrize("choice", ["estimate", "dark"])
def test_background_estimated_or_from_a_dark_frame(choice, tmp_path, demo, demo_matrix, capsys, scenario):
    background = "estimate" if choice == "estimate" else str(demo["dark"])
    argv = ["apply", "--matrix", demo_matrix, demo["sample"], "-o", tmp_path, "--quiet", "--background", background]
    assert _run(argv, capsys)[0] == 0
    levels = read_provenance(tmp_path / "sample.unmixed.ome.tif")["background"]["levels"]
    offset = scenario.raw["camera"]["offset_adu"]  # known offset of the simulated camera
    if choice == "dark":
        np.testing.assert_allclose(levels, offset, atol=0.5)
    else:  # the sample's own background: offset plus some autofluorescence
        assert all(offset - 1 <= level <= offset + 25 for level in levels)


@pytest.mark.parametrize("pile_up", [4095, 255])
@pytest.mark.parametrize("container", ["tiff", "zarr"])
def test_saturation_mask_at_the_contract_level(tmp_path, capsys, pile_up, container):
    # Reference: numpy comparisons on the input at the level the contract's rule gives: the
    # matrix's 4095, or lower when the input itself piles up at 255 (an 8-bit converter).
    from unmix.io.images import Image, write_ome_zarr

    matrix = BleedThroughMatrix(kind="measured", channels=("a", "b"), labels=("P", "Q"), primary={"P": "a", "Q": "b"},
                                matrix=np.array([[1.0, 0.2], [0.3, 1.0]]), background=np.array([10.0, 10.0]),
                                background_source="dark", saturation=np.array([4095.0, 4095.0]))
    matrix_path = matrix.save(tmp_path / "m.json")
    rng = np.random.default_rng(2)
    data = rng.integers(20, pile_up - 5, size=(3, 2, 30, 40)).astype(np.uint16)  # Z C Y X
    data[1, 1, 5:8, 5:9] = pile_up   # 12 pixels, 0.33 % of the channel: a pile-up
    data[2, 0, 20, 30] = pile_up
    if container == "tiff":
        source = _stack_file(tmp_path / "s.ome.tif", data, "ZCYX", "ab")
        mask_path = tmp_path / "out" / "s.saturation.ome.tif"
    else:
        source = write_ome_zarr(tmp_path / "s.ome.zarr", Image(np.moveaxis(data, 1, 0), "CZYX", ("a", "b")))
        mask_path = tmp_path / "out" / "s.saturation.ome.zarr"
    code, _, err = _run(["apply", "--matrix", matrix_path, source, "-o", tmp_path / "out", "--quiet"], capsys)
    assert code == 0, err
    expected = np.any(data >= pile_up, axis=1).astype(np.uint8)
    mask = read_image(mask_path)
    np.testing.assert_array_equal(np.asarray(mask.data)[0], expected)
    manifest = json.loads((tmp_path / "out" / "unmix-manifest.json").read_text())
    assert next(iter(manifest["outputs"].values()))["saturated_pixels"] == int(expected.sum()) == 13


@pytest.mark.slow
def test_ome_zarr_tasks_store_blocks_locally_and_the_client_on_a_cluster(tmp_path, demo_matrix, capsys):
    # Local threads: each task stores its chunk; on a cluster the submitting process does. Same output.
    import zarr
    from distributed import LocalCluster

    from unmix.io.images import Image, write_ome_zarr

    rng = np.random.default_rng(6)
    data = rng.integers(90, 3000, size=(3, 5, 48, 40)).astype(np.uint16)  # C Z Y X
    source = write_ome_zarr(tmp_path / "z.ome.zarr", Image(data, "CZYX", ("blue450", "green525", "orange600")))
    assert _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "local", "--quiet"], capsys)[0] == 0
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        code, _, err = _run(["apply", "--matrix", demo_matrix, source, "-o", tmp_path / "cluster", "--quiet",
                             "--scheduler", cluster.scheduler_address], capsys)
    assert code == 0, err
    matrix = load_matrix(demo_matrix)
    expected = Unmixer(matrix.matrix).unmix(data, matrix.background)
    for folder in ("local", "cluster"):
        stored = np.asarray(zarr.open_array(str(tmp_path / folder / "z.unmixed.ome.zarr" / "0"), mode="r")[...])
        np.testing.assert_array_equal(stored, expected)


def test_pyramidal_ome_tiff_is_read_at_full_resolution(tmp_path, demo_matrix, capsys):
    # A pyramid (sub-resolutions in SubIFDs): apply and the eager reader both take level 0.
    from unmix.io.images import read_image

    rng = np.random.default_rng(8)
    data = rng.integers(90, 3000, size=(3, 64, 96)).astype(np.uint16)
    path = tmp_path / "pyramid.ome.tif"
    with tifffile.TiffWriter(path, ome=True) as writer:
        writer.write(data, subifds=1, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
        writer.write(data[:, ::2, ::2], subfiletype=1, photometric="minisblack")
    np.testing.assert_array_equal(read_image(path).data, data)
    code, _, err = _run(["apply", "--matrix", demo_matrix, path, "-o", tmp_path / "out", "--quiet"], capsys)
    assert code == 0, err
    matrix = load_matrix(demo_matrix)
    # numpy reference: the same solver on the full-resolution pixels read by tifffile directly
    np.testing.assert_array_equal(read_image(tmp_path / "out" / "pyramid.unmixed.ome.tif").data,
                                  Unmixer(matrix.matrix).unmix(tifffile.imread(path), matrix.background))


@pytest.mark.parametrize("compression", ["lzw", "zstd"])
def test_a_missing_codec_names_what_to_install(tmp_path, demo_matrix, compression):
    # imagecodecs is a dependency; an installation without it must say so, in apply as in measure.
    import subprocess
    import sys

    rng = np.random.default_rng(9)
    path = tmp_path / f"{compression}.ome.tif"
    tifffile.imwrite(path, rng.integers(90, 3000, size=(3, 32, 32)).astype(np.uint16), ome=True,
                     compression=compression, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    hide = "import sys; sys.modules['imagecodecs'] = None; sys.modules['compression'] = None; "
    for argv in (["apply", "--matrix", str(demo_matrix), str(path), "-o", str(tmp_path / "out")],
                 ["measure", "--control", f"A={path}", "-o", str(tmp_path / "m.json")]):
        done = subprocess.run([sys.executable, "-c", hide + "from unmix.cli.main import main; "
                               f"sys.exit(main({argv!r}))"], capture_output=True, text=True)
        assert done.returncode == 2, done.stderr
        errors = [line for line in done.stderr.splitlines() if line.startswith("error:")]
        assert len(errors) == 1 and "pip install imagecodecs" in errors[0] and path.name in errors[0], done.stderr
        assert "damaged" not in errors[0]
    code = subprocess.run([sys.executable, "-m", "unmix.cli", "apply", "--matrix", str(demo_matrix), str(path),
                           "-o", str(tmp_path / "out"), "--quiet"]).returncode
    assert code == 0  # with the codec installed


def test_glob_rerun_into_the_input_folder_skips_earlier_outputs(tmp_path, demo, demo_matrix, capsys):
    # Outputs written beside the inputs match the same glob on the rerun: they are not inputs.
    _copy(demo["sample"], tmp_path / "sample.ome.tif")
    argv = ["apply", "--matrix", demo_matrix, str(tmp_path / "*.tif"), "-o", tmp_path, "--quiet"]
    assert _run(argv, capsys)[0] == 0
    code, out, err = _run([*argv[:-1]], capsys)
    assert code == 0, err
    manifest = json.loads((tmp_path / "unmix-manifest.json").read_text())
    assert list(manifest["outputs"]) == ["sample.unmixed.ome.tif"]


@pytest.mark.parametrize("residual", [False, True])
def test_planes_larger_than_the_memory_budget_are_cut_into_strips(tmp_path, demo_matrix, capsys, residual):
    # 16 MiB budget, planes of 3 x 600 x 1000 pixels: blocks of strips, a tiled output, the same
    # values as the whole plane unmixed at once (numpy reference of the solver on the full array).
    from unmix.engine.batch import ApplySettings, _rows_per_block
    from unmix.io.images import read_image

    rng = np.random.default_rng(11)
    data = rng.integers(90, 3000, size=(2, 3, 600, 1000)).astype(np.uint16)
    data[1, 0, :30, :40] = 4095  # saturated corner, 0.1 % of the pixels (above the 0.01 % rule)
    path = tmp_path / "wide.ome.tif"
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": "ZCYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    extra = ["--residual"] if residual else []
    code, _, err = _run(["apply", "--matrix", demo_matrix, path, "-o", tmp_path / "out", "--memory", "16M",
                         "--quiet", *extra], capsys)
    assert code == 0, err
    image = read_image(path, lazy=True)
    assert _rows_per_block(image, ApplySettings(memory=16 << 20, residual=residual), 3) < 600
    matrix = load_matrix(demo_matrix)
    unmixer = Unmixer(matrix.matrix)
    out = read_image(tmp_path / "out" / "wide.unmixed.ome.tif")
    with tifffile.TiffFile(tmp_path / "out" / "wide.unmixed.ome.tif") as tif:
        assert tif.pages[0].is_tiled
    for z in range(2):
        np.testing.assert_array_equal(out.data[:, z], unmixer.unmix(data[z], matrix.background))
    mask = read_image(tmp_path / "out" / "wide.saturation.ome.tif").data
    assert mask.shape == (1, 2, 600, 1000) and mask.sum() == 1200 and mask[0, 1, :30, :40].all()
    if residual:
        misfit = read_image(tmp_path / "out" / "wide.residual.ome.tif").data
        np.testing.assert_allclose(misfit[0, 1], unmixer.residual(data[1], out.data[:, 1], matrix.background),
                                   rtol=1e-6)


@pytest.mark.parametrize("memory", ["1G", "16M"])
def test_the_mask_is_standard_deflate_chunks_that_zlib_decodes(tmp_path, demo_matrix, capsys, memory):
    # The mask's chunks are written pre-compressed; each must be a plain zlib stream (TIFF
    # compression 8, Adobe deflate; TIFF 6.0 supplement) that Python's own zlib module decodes to
    # the mask's rows, in whole-plane strips (1G) and in padded tiles (16M), including the short
    # last strip where the saturated rows are.
    import zlib

    data = np.full((3, 600, 1000), 500, np.uint16)
    data[1, 590:, 900:] = 4095
    path = tmp_path / "edge.ome.tif"
    tifffile.imwrite(path, data, ome=True, photometric="minisblack",
                     metadata={"axes": "CYX", "Channel": {"Name": ["blue450", "green525", "orange600"]}})
    code, _, err = _run(["apply", "--matrix", demo_matrix, path, "-o", tmp_path / "out", "--memory", memory,
                         "--quiet"], capsys)
    assert code == 0, err
    expected = np.zeros((600, 1000), np.uint8)
    expected[590:, 900:] = 1
    with tifffile.TiffFile(tmp_path / "out" / "edge.saturation.ome.tif") as tif:
        page = tif.pages[0]
        assert page.compression == 8 and page.is_tiled == (memory == "16M")
        np.testing.assert_array_equal(page.asarray(), expected)
        rows = page.tilelength if page.is_tiled else page.rowsperstrip
        width = page.tilewidth if page.is_tiled else 1000
        decoded = []
        for offset, count in zip(page.dataoffsets, page.databytecounts):
            tif.filehandle.seek(offset)
            decoded.append(np.frombuffer(zlib.decompress(tif.filehandle.read(count)), np.uint8).reshape(-1, width))
        np.testing.assert_array_equal(np.concatenate(decoded)[:600, :1000], expected)
        assert all(len(chunk) == rows for chunk in decoded[:-1])


def test_local_batches_hold_a_block_per_core_within_the_budget(monkeypatch):
    # Local threads: batches of one block per core once blocks are large (so that writing starts
    # early), more small blocks per batch, never past the memory budget; a cluster gets what the
    # budget allows. The rule's arithmetic, recomputed here from its definition.
    import dask.array as da

    from unmix.engine.batch import (_IN_FLIGHT, _LOCAL_BATCH_BYTES, ApplySettings, _blocks_per_batch,
                                    _bytes_per_pixel)
    from unmix.io.images import Image

    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    settings = ApplySettings()
    per_pixel = _bytes_per_pixel(4, 3, 2, settings)
    large = Image(da.zeros((4, 1024, 1024), dtype=np.uint16), "CYX", ("a", "b", "c", "d"))
    small = Image(da.zeros((4, 64, 64), dtype=np.uint16), "CYX", ("a", "b", "c", "d"))
    budget = settings.memory // (_IN_FLIGHT * per_pixel * 1024 * 1024)
    assert _blocks_per_batch(large, 1024, 3, settings) == 2
    assert _blocks_per_batch(large, 1024, 3, settings, local=False) == min(64, budget) > 2
    small_batch = _blocks_per_batch(small, 64, 3, settings)
    assert small_batch == min(64, 2 * _LOCAL_BATCH_BYTES // (per_pixel * 64 * 64)) == 64
    tight = ApplySettings(memory=16 << 20)
    assert _blocks_per_batch(large, 16, 3, tight) * _IN_FLIGHT * per_pixel * 16 * 1024 <= tight.memory


def test_write_back_hints_pass_the_planes_through_and_a_refusal_changes_nothing(tmp_path, monkeypatch):
    # posix_fadvise is a hint (POSIX.1-2001): a file system that refuses it must not fail the run.
    from unmix.engine.batch import _early_writeback

    if not hasattr(os, "posix_fadvise"):
        pytest.skip("no posix_fadvise on this system")
    advised = []

    def refuse(fd, offset, length, advice):
        advised.append(advice)
        raise OSError(22, "refused")

    monkeypatch.setattr(os, "posix_fadvise", refuse)
    planes = [np.full((64, 64), i, np.float32) for i in range(10)]  # 16 KiB each
    with open(tmp_path / "out.raw", "wb") as handle:
        passed = list(_early_writeback(iter(planes), handle, every=32 << 10))
    assert len(passed) == 10 and all(a is b for a, b in zip(passed, planes))
    assert advised and set(advised) == {os.POSIX_FADV_DONTNEED}


def test_a_huge_plane_is_planned_within_the_budget():
    # 3 x 100000^2 uint16 (60 GB): strips whose pixels in flight stay within the default budget.
    import dask.array as da

    from unmix.engine.batch import _IN_FLIGHT, ApplySettings, _blocks_per_batch, _bytes_per_pixel, _rows_per_block
    from unmix.io.images import Image

    image = Image(da.zeros((3, 100_000, 100_000), dtype=np.uint16, chunks=(1, 1000, 100_000)), "CYX", ("a", "b", "c"))
    settings = ApplySettings()
    rows = _rows_per_block(image, settings, 3)
    batch = _blocks_per_batch(image, rows, 3, settings)
    in_flight = _IN_FLIGHT * batch * rows * 100_000 * _bytes_per_pixel(3, 3, 2, settings)
    assert rows % 16 == 0 and 16 <= rows < 100_000 and in_flight <= settings.memory


def test_measure_prints_and_stores_the_spillover_spreading(demo, tmp_path, capsys):
    # The stored figures are the noise model propagated through least squares (Nguyen et al. 2013,
    # Cytometry A 83:306; checked against simulated controls in tests/test_uncertainty.py).
    from unmix.matrix import load_matrix
    from unmix.measure.spreading import spreading_matrix

    argv = ["measure", "--bootstrap", "200", "-o", tmp_path / "m.json", "--unstained", demo["unstained"]]
    for label, paths in demo["controls"].items():
        argv += ["--control", f"{label}={','.join(map(str, paths))}"]
    code, out, _ = _run(argv, capsys)
    assert code == 0 and "Spillover spreading" in out
    matrix = load_matrix(tmp_path / "m.json")
    spread, floor = spreading_matrix(matrix.matrix, matrix.noise_model)
    stored = matrix.qc["spreading"]
    assert stored["labels"] == list(matrix.labels)
    np.testing.assert_allclose(stored["matrix"], spread, rtol=1e-12)
    np.testing.assert_allclose(stored["floor"], floor, rtol=1e-12)
